"""Opsets and exporter habits: the same graphs at opset 13 and at the newest opset onnx knows here,
initializers fed through Constant nodes, and weights that reach a MatMul through Transpose/Reshape.

Every model goes through `qfit check` (CLI entry point); the int8 model is compared with
onnx.reference on the same QDQ graph (ONNX operator spec), and params / MACs with hand counts.
"""
from __future__ import annotations

import pathlib
import sys

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))
import through_qfit as tq  # noqa: E402

NEWEST = onnx.defs.onnx_opset_version()
OPSETS = [13, NEWEST]


def model_at(nodes, inputs: dict, outputs: list[str], inits: dict, opset: int) -> onnx.ModelProto:
    opsets = [helper.make_opsetid("", opset)]
    graph = helper.make_graph(
        nodes, f"opset{opset}",
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, list(s)) for n, s in inputs.items()],
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, None) for n in outputs],
        [numpy_helper.from_array(np.asarray(v), k) for k, v in inits.items()])
    # the lowest IR version that may carry this opset (onnx.helper's own table)
    model = helper.make_model(graph, opset_imports=opsets, ir_version=helper.find_min_ir_version_for(opsets))
    inferred = onnx.shape_inference.infer_shapes(model, strict_mode=True)
    del model.graph.output[:]
    model.graph.output.extend(inferred.graph.output)
    onnx.checker.check_model(model, full_check=True)
    return model


def rand(shape, seed, scale=None):
    rng = np.random.default_rng(seed)
    fan_in = int(np.prod(shape[1:])) if len(shape) > 1 else 1
    return (rng.standard_normal(shape) * (scale or np.sqrt(2.0 / fan_in))).astype(np.float32)


def constant(name: str, array) -> onnx.NodeProto:
    return helper.make_node("Constant", [], [name], name=f"const_{name}", value=numpy_helper.from_array(np.asarray(array)))


def mixed_model(opset: int) -> onnx.ModelProto:
    """Conv+BN+ReLU -> hard-swish -> Split -> MaxPool | AveragePool -> Concat -> Pad -> Resize ->
    ReduceMean -> Gemm -> Softmax, written the way each opset spells it."""
    c = 8
    rng = np.random.default_rng(1)
    inits = {"w": rand((c, 3, 3, 3), 0), "b": rand((c,), 1, 0.1),
             "gamma": rng.uniform(0.5, 1.5, c).astype(np.float32), "beta": rand((c,), 2, 0.2),
             "mean": rand((c,), 3, 0.2), "var": rng.uniform(0.5, 2.0, c).astype(np.float32),
             "pads": np.array([0, 0, 1, 1, 0, 0, 1, 1], np.int64), "scales": np.array([1, 1, 2, 2], np.float32),
             "fc_w": rand((5, c), 4), "fc_b": rand((5,), 5, 0.1)}
    nodes = [helper.make_node("Conv", ["x", "w", "b"], ["conv"], name="conv", kernel_shape=[3, 3], pads=[1] * 4),
             helper.make_node("BatchNormalization", ["conv", "gamma", "beta", "mean", "var"], ["bn"], name="bn"),
             helper.make_node("Relu", ["bn"], ["relu"], name="relu")]
    if opset >= 14:
        nodes.append(helper.make_node("HardSwish", ["relu"], ["hs"], name="hswish"))
    else:  # before opset 14 exporters write x * HardSigmoid(x)
        nodes += [helper.make_node("HardSigmoid", ["relu"], ["gate"], name="hsig", alpha=1 / 6, beta=0.5),
                  helper.make_node("Mul", ["relu", "gate"], ["hs"], name="hswish")]
    if opset >= 18:
        nodes.append(helper.make_node("Split", ["hs"], ["s1", "s2"], name="split", axis=1, num_outputs=2))
    else:
        inits["halves"] = np.array([c // 2, c // 2], np.int64)
        nodes.append(helper.make_node("Split", ["hs", "halves"], ["s1", "s2"], name="split", axis=1))
    nodes += [helper.make_node("MaxPool", ["s1"], ["p1"], name="maxpool", kernel_shape=[2, 2], strides=[2, 2]),
              helper.make_node("AveragePool", ["s2"], ["p2"], name="avgpool", kernel_shape=[2, 2], strides=[2, 2]),
              helper.make_node("Concat", ["p1", "p2"], ["cat"], name="concat", axis=1),
              helper.make_node("Pad", ["cat", "pads"], ["pad"], name="pad", mode="constant"),
              helper.make_node("Resize", ["pad", "", "scales"], ["up"], name="resize", mode="nearest")]
    if opset >= 18:
        inits["axes"] = np.array([2, 3], np.int64)
        nodes.append(helper.make_node("ReduceMean", ["up", "axes"], ["pool"], name="reduce", keepdims=0))
    else:
        nodes.append(helper.make_node("ReduceMean", ["up"], ["pool"], name="reduce", axes=[2, 3], keepdims=0))
    nodes += [helper.make_node("Gemm", ["pool", "fc_w", "fc_b"], ["logits"], name="fc", transB=1),
              helper.make_node("Softmax", ["logits"], ["y"], name="softmax", axis=-1)]
    return model_at(nodes, {"x": (1, 3, 16, 16)}, ["y"], inits, opset)


# conv 8 x 16 x 16 outputs x 3 x 3 x 3 + Gemm 8 x 5 (definition of convolution / matrix product)
MIXED_MACS = 8 * 16 * 16 * 3 * 9 + 8 * 5
MIXED_PARAMS = 8 * 3 * 9 + 8 + 5 * 8 + 5  # BN folded into the conv bias


def check_and_compare(model: onnx.ModelProto, tmp_path: pathlib.Path, name: str) -> tq.Checked:
    run = tq.check(model, tmp_path, name=name, samples=6, extra_args=["--eval-limit", "2"])
    assert run.exit_code == 0
    onnx.checker.check_model(run.int8_model, full_check=True)
    # ONNX operator spec via onnx.reference on the same QDQ graph
    forced = tq.forced_agreement(run.int8_model, tq.single_samples(run.int8_model, 2, seed=3))
    assert forced.integer_fraction >= 0.999 and forced.output_fraction >= 0.999, forced
    free = tq.free_running_agreement(run.int8_model, tq.random_batch(run.int8_model, 8, seed=4))
    assert free.output_fraction >= 0.999, free
    return run


@pytest.mark.parametrize("opset", OPSETS)
def test_opset_mixed_model_goes_through_check(opset, tmp_path):
    run = check_and_compare(mixed_model(opset), tmp_path, f"mixed{opset}")
    assert run.report["model"]["opset"] == opset
    # int16-capable QDQ needs opset >= 21: older models are converted up to it. A newer model is
    # written at the oldest opset where every one of its ops has the same definition (ONNX operator
    # schemas, onnx.defs), so its graph means the same and onnxruntime has the QDQ ops for it.
    written = {i.domain: i.version for i in run.int8_model.opset_import}[""]
    assert 21 <= written <= max(opset, 21)
    for node in mixed_model(opset).graph.node:
        assert (onnx.defs.get_schema(node.op_type, written).since_version
                == onnx.defs.get_schema(node.op_type, max(opset, 21)).since_version), node.op_type
    assert run.report["model"]["macs"] == MIXED_MACS
    assert run.report["model"]["params"] == MIXED_PARAMS
    assert "BatchNormalization" not in tq.op_types(run.int8_model)
    assert not run.report["model"]["float_nodes"]


def test_opset_newest_is_what_this_onnx_knows():
    # the newest opset must be one onnxruntime here runs; the mixed model above runs at it
    assert NEWEST >= 21


def constant_fed_model(opset: int) -> onnx.ModelProto:
    """Every initializer arrives through a Constant node, as some exporters write graphs."""
    nodes = [constant("w", rand((6, 2, 3, 3), 0)), constant("b", rand((6,), 1, 0.1)),
             constant("shape", np.array([1, -1], np.int64)), constant("fc_w", rand((96, 4), 2)),
             constant("fc_b", rand((4,), 3, 0.1)),
             helper.make_node("Conv", ["x", "w", "b"], ["conv"], name="conv", kernel_shape=[3, 3], strides=[2, 2],
                              pads=[1] * 4),
             helper.make_node("Relu", ["conv"], ["relu"], name="relu"),
             helper.make_node("Reshape", ["relu", "shape"], ["flat"], name="flatten"),
             helper.make_node("Gemm", ["flat", "fc_w", "fc_b"], ["y"], name="fc")]
    return model_at(nodes, {"x": (1, 2, 8, 8)}, ["y"], {}, opset)


@pytest.mark.parametrize("opset", OPSETS)
def test_opset_constant_node_initializers_are_quantized_as_weights(opset, tmp_path):
    run = check_and_compare(constant_fed_model(opset), tmp_path, f"constants{opset}")
    assert "Constant" not in tq.op_types(run.int8_model)
    int8 = sorted(tuple(i.dims) for i in run.int8_model.graph.initializer if i.data_type == TensorProto.INT8
                  and len(i.dims) > 1)
    assert int8 == [(6, 2, 3, 3), (96, 4)]
    # conv 6 x 4 x 4 outputs x 2 x 3 x 3 + Gemm 96 x 4 (definition of convolution / matrix product)
    assert run.report["model"]["macs"] == 6 * 4 * 4 * 2 * 9 + 96 * 4
    assert run.report["model"]["params"] == 6 * 2 * 9 + 6 + 96 * 4 + 4
    flash = {r["name"]: r for r in run.report["flash"]["layers"]}
    assert flash["conv"]["weight_bytes"] == 108 and flash["fc"]["weight_bytes"] == 384


def hidden_weights_model(opset: int) -> onnx.ModelProto:
    """MatMul weights behind a Transpose (stored [out, in]) and behind a Reshape of a flat Constant."""
    nodes = [helper.make_node("Transpose", ["w1_out_in"], ["w1"], name="w1_t", perm=[1, 0]),
             helper.make_node("MatMul", ["x", "w1"], ["h"], name="mm1"),
             helper.make_node("Add", ["h", "b1"], ["hb"], name="bias1"),
             helper.make_node("Relu", ["hb"], ["r"], name="relu"),
             constant("w2_flat", rand((16 * 6,), 1, 0.3)),
             constant("w2_shape", np.array([16, 6], np.int64)),
             helper.make_node("Reshape", ["w2_flat", "w2_shape"], ["w2"], name="w2_reshape"),
             helper.make_node("MatMul", ["r", "w2"], ["y"], name="mm2")]
    inits = {"w1_out_in": rand((16, 12), 0), "b1": rand((16,), 2, 0.1)}
    return model_at(nodes, {"x": (1, 5, 12)}, ["y"], inits, opset)


@pytest.mark.parametrize("opset", OPSETS)
def test_opset_weights_through_transpose_and_reshape_are_folded_and_quantized(opset, tmp_path):
    run = check_and_compare(hidden_weights_model(opset), tmp_path, f"hidden{opset}")
    ops = tq.op_types(run.int8_model)
    assert "Transpose" not in ops and "Reshape" not in ops and "Constant" not in ops
    int8 = {tuple(i.dims) for i in run.int8_model.graph.initializer if i.data_type == TensorProto.INT8
            and len(i.dims) > 1}
    assert int8 == {(12, 16), (16, 6)}  # folded to the [K, N] layout MatMul reads
    # per output feature: DequantizeLinear along the last axis with one scale per column
    inits = {i.name: numpy_helper.to_array(i) for i in run.int8_model.graph.initializer}
    for node in run.int8_model.graph.node:
        if node.op_type == "DequantizeLinear" and inits.get(node.input[0]) is not None \
                and inits[node.input[0]].ndim == 2:
            axis = {a.name: a.i for a in node.attribute}.get("axis")
            assert axis == 1 and inits[node.input[1]].shape == (inits[node.input[0]].shape[1],)
    # 5 tokens x (12 -> 16) + 5 x (16 -> 6) (definition of the matrix product)
    assert run.report["model"]["macs"] == 5 * 12 * 16 + 5 * 16 * 6
    assert run.report["model"]["params"] == 12 * 16 + 16 + 16 * 6  # the Add after mm1 is its bias
    assert any("folded" in note for note in run.report["model"]["notes"])
