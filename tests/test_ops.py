"""Operator coverage: one tiny graph per operator of the coverage list, quantized by `qfit check`.

For every case:
  * the int8 model qfit writes agrees with onnx.reference (the ONNX operator spec, executable) on
    the same QDQ graph: every quantized tensor within one integer level, with both runtimes fed the
    same integers at every quantizer, and the graph outputs within one output quantization step;
  * MACs and element operations equal a hand formula written beside the case;
  * qfit does with the op what docs/operators.md says: its own quantizer, its input's quantizer
    (shared), fused into the previous layer's clamp, removed/folded by the loader, or kept float with
    a note in the report.
"""
from __future__ import annotations

import math
import pathlib
import sys
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))
import through_qfit as tq  # noqa: E402

OPSET = 17


def make_model(nodes, inputs: dict, outputs: list[str], inits: dict | None = None, opset: int = OPSET,
               output_types: dict | None = None) -> onnx.ModelProto:
    graph = helper.make_graph(
        nodes, "op_case",
        [helper.make_tensor_value_info(n, TensorProto.FLOAT, list(s)) for n, s in inputs.items()],
        [helper.make_tensor_value_info(n, (output_types or {}).get(n, TensorProto.FLOAT), None) for n in outputs],
        [numpy_helper.from_array(np.asarray(v), k) for k, v in (inits or {}).items()])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)],
                              ir_version=9 if opset <= 20 else 10)
    inferred = onnx.shape_inference.infer_shapes(model, strict_mode=True)
    del model.graph.output[:]
    model.graph.output.extend(inferred.graph.output)
    onnx.checker.check_model(model, full_check=True)
    return model


def weights(shape, seed=0, scale=None):
    rng = np.random.default_rng(seed)
    fan_in = int(np.prod(shape[1:])) if len(shape) > 1 else 1
    return (rng.standard_normal(shape) * (scale or math.sqrt(2.0 / fan_in))).astype(np.float32)


def f32(values) -> np.ndarray:
    return np.asarray(values, np.float32)


def i64(values) -> np.ndarray:
    return np.asarray(values, np.int64)


@dataclass
class Case:
    """One operator case: the graph, the node under test, its hand-counted cost, what qfit must do."""

    build: Callable[[], onnx.ModelProto]
    node: str                   # name of the node under test (its output tensor is node + ":out")
    handling: str               # own | shared | fused | unfused | float | removed | folded
    macs: int = 0               # hand formula, written in the case
    elementwise_ops: int | None = None  # hand formula for the node under test; None: not checked
    low: float | None = None    # calibration data range (default standard normal)
    high: float | None = None
    extra: dict = field(default_factory=dict)


def node(op, inputs, outputs, name, **attrs):
    return helper.make_node(op, inputs, outputs, name=name, **attrs)


# ---- builders -------------------------------------------------------------------------------------

def conv_case(cin=4, cout=8, size=(10, 10), kernel=(3, 3), group=1, bias=True, **attrs):
    """x -> Conv(attrs) -> y; MACs = numel(y) * Cin/group * prod(kernel) (definition of convolution)."""
    x_shape = (1, cin, *size)
    w = weights((cout, cin // group, *kernel))
    inits = {"w": w}
    ins = ["x", "w"]
    if bias:
        inits["b"] = weights((cout,), 1, 0.1)
        ins.append("b")

    def build():
        return make_model([node("Conv", ins, ["y"], "conv", kernel_shape=list(kernel), group=group, **attrs)],
                          {"x": x_shape}, ["y"], inits)
    return build


def out_size(n, k, stride=1, pad_total=0, dilation=1):
    # ONNX Conv/Pool spec: floor((n + pads - dilation*(k-1) - 1) / stride) + 1
    return (n + pad_total - dilation * (k - 1) - 1) // stride + 1


def unary_case(op, shape=(1, 4, 6, 6), inits=None, extra_inputs=(), **attrs):
    def build():
        return make_model([node(op, ["x", *extra_inputs], ["y"], "op", **attrs)], {"x": shape}, ["y"], inits)
    return build


def after_conv(op, extra_inputs=(), inits=None, channels=4, size=6, **attrs):
    """x -> Conv 3x3 -> op -> y: an activation right after a layer with weights."""
    all_inits = {"w": weights((channels, channels, 3, 3)), "b": weights((channels,), 1, 0.1), **(inits or {})}

    def build():
        return make_model([node("Conv", ["x", "w", "b"], ["c"], "conv", kernel_shape=[3, 3], pads=[1, 1, 1, 1]),
                           node(op, ["c", *extra_inputs], ["y"], "op", **attrs)],
                          {"x": (1, channels, size, size)}, ["y"], all_inits)
    return build


def binary_case(op, a_shape=(1, 4, 6, 6), b_shape=(1, 4, 6, 6)):
    def build():
        return make_model([node(op, ["a", "b"], ["y"], "op")], {"a": a_shape, "b": b_shape}, ["y"])
    return build


def constant_operand_case(op, constant, shape=(1, 4, 6, 6)):
    def build():
        return make_model([node(op, ["x", "k"], ["y"], "op")], {"x": shape}, ["y"], {"k": constant})
    return build


def matmul_weight_case(x_shape, w_shape, weight_first=False):
    def build():
        ins = ["w", "x"] if weight_first else ["x", "w"]
        return make_model([node("MatMul", ins, ["y"], "op")], {"x": x_shape}, ["y"], {"w": weights(w_shape)})
    return build


def concat_case():
    def build():
        return make_model(
            [node("Conv", ["x", "w1", "b1"], ["a"], "conv_a", kernel_shape=[1, 1]),
             node("Conv", ["x", "w2", "b2"], ["b"], "conv_b", kernel_shape=[1, 1]),
             node("Concat", ["a", "b"], ["y"], "op", axis=1)],
            {"x": (1, 4, 6, 6)}, ["y"],
            {"w1": weights((3, 4, 1, 1), 1), "b1": weights((3,), 2, 0.1),
             # the second branch has a range about 4x the first's, so matched scales are visible
             "w2": weights((5, 4, 1, 1), 3) * 4, "b2": weights((5,), 4, 0.1)})
    return build


def split_case():
    def build():
        return make_model([node("Split", ["x", "parts"], ["y1", "y2"], "op", axis=1)],
                          {"x": (1, 6, 4, 4)}, ["y1", "y2"], {"parts": i64([2, 4])})
    return build


def split_then_conv_case():
    """Split into two parts, each read by a conv: the multi-output op inside a graph, not at its end."""
    def build():
        return make_model(
            [node("Split", ["x", "parts"], ["s1", "s2"], "op", axis=1),
             node("Conv", ["s1", "w1"], ["y1"], "conv1", kernel_shape=[1, 1]),
             node("Conv", ["s2", "w2"], ["y2"], "conv2", kernel_shape=[1, 1])],
            {"x": (1, 6, 4, 4)}, ["y1", "y2"],
            {"parts": i64([2, 4]), "w1": weights((3, 2, 1, 1)), "w2": weights((3, 4, 1, 1), 1)})
    return build


def lstm_case(gru=False):
    steps, features, hidden = 6, 4, 5
    gates = 3 if gru else 4
    op = "GRU" if gru else "LSTM"

    def build():
        rng = np.random.default_rng(0)
        inits = {"W": rng.uniform(-0.4, 0.4, (1, gates * hidden, features)).astype(np.float32),
                 "R": rng.uniform(-0.4, 0.4, (1, gates * hidden, hidden)).astype(np.float32),
                 "B": rng.uniform(-0.4, 0.4, (1, 2 * gates * hidden)).astype(np.float32),
                 "w_in": weights((features, features, 1)), "w_out": weights((3, hidden)), "shape": i64([1, hidden])}
        return make_model(
            [node("Conv", ["x", "w_in"], ["c"], "conv", kernel_shape=[1]),
             node("Transpose", ["c"], ["seq"], "to_seq", perm=[2, 0, 1]),
             node(op, ["seq", "W", "R", "B"], ["", "h"], "op", hidden_size=hidden),
             node("Reshape", ["h", "shape"], ["h2"], "flat"),
             node("Gemm", ["h2", "w_out"], ["y"], "head", transB=1)],
            {"x": (1, features, steps)}, ["y"], inits)
    params = gates * hidden * (features + hidden) + 2 * gates * hidden  # ONNX LSTM/GRU spec: W, R, B
    return build, params, features * features * steps + hidden * 3


def resize_case(mode):
    def build():
        return make_model([node("Resize", ["x", "", "scales"], ["y"], "op", mode=mode)],
                          {"x": (1, 3, 4, 4)}, ["y"], {"scales": f32([1, 1, 2, 2])})
    return build


def batchnorm_case(lone=False):
    c = 4
    rng = np.random.default_rng(3)
    bn = {"gamma": rng.uniform(0.5, 1.5, c).astype(np.float32), "beta": f32(rng.normal(0, 0.2, c)),
          "mean": f32(rng.normal(0, 0.2, c)), "var": rng.uniform(0.5, 2.0, c).astype(np.float32)}

    def build():
        nodes = [] if lone else [node("Conv", ["x", "w"], ["c"], "conv", kernel_shape=[3, 3], pads=[1] * 4)]
        nodes.append(node("BatchNormalization", ["x" if lone else "c", "gamma", "beta", "mean", "var"], ["y"],
                          "op", epsilon=1e-5))
        inits = dict(bn) if lone else {"w": weights((c, c, 3, 3)), **bn}
        return make_model(nodes, {"x": (1, c, 6, 6)}, ["y"], inits)
    return build


def passthrough_case(op):
    def build():
        return make_model([node("Conv", ["x", "w"], ["c"], "conv", kernel_shape=[1, 1]),
                           node(op, ["c"], ["d"], "op"),
                           node("Relu", ["d"], ["y"], "relu")],
                          {"x": (1, 4, 5, 5)}, ["y"], {"w": weights((4, 4, 1, 1))})
    return build


_lstm_build, LSTM_PARAMS, LSTM_OTHER_MACS = lstm_case()
_gru_build, GRU_PARAMS, GRU_OTHER_MACS = lstm_case(gru=True)

CASES: dict[str, Case] = {
    # Conv: MACs = numel(output) * Cin/group * prod(kernel) (definition of convolution)
    "conv2d_padded": Case(conv_case(pads=[1, 1, 1, 1]), "conv", "own", macs=8 * 10 * 10 * 4 * 9),
    "conv2d_grouped": Case(conv_case(group=2, pads=[1, 1, 1, 1]), "conv", "own", macs=8 * 10 * 10 * 2 * 9),
    "conv2d_depthwise": Case(conv_case(cin=8, cout=8, group=8, pads=[1, 1, 1, 1]), "conv", "own",
                             macs=8 * 10 * 10 * 1 * 9),
    "conv2d_dilated": Case(conv_case(dilations=[2, 2]), "conv", "own",
                           macs=8 * out_size(10, 3, dilation=2) ** 2 * 4 * 9),
    "conv2d_strided": Case(conv_case(strides=[2, 2], pads=[1, 1, 1, 1], bias=False), "conv", "own",
                           macs=8 * out_size(10, 3, 2, 2) ** 2 * 4 * 9),
    # auto_pad SAME_*: output = ceil(input / stride) (ONNX Conv spec)
    "conv2d_same_upper": Case(conv_case(kernel=(4, 4), strides=[2, 2], auto_pad="SAME_UPPER"), "conv", "own",
                              macs=8 * 5 * 5 * 4 * 16),
    "conv2d_same_lower": Case(conv_case(kernel=(4, 4), auto_pad="SAME_LOWER"), "conv", "own",
                              macs=8 * 10 * 10 * 4 * 16),
    "conv2d_valid": Case(conv_case(auto_pad="VALID"), "conv", "own", macs=8 * 8 * 8 * 4 * 9),
    "conv1d": Case(conv_case(size=(32,), kernel=(5,), strides=[2], pads=[2, 2]), "conv", "own",
                   macs=8 * out_size(32, 5, 2, 4) * 4 * 5),
    # ConvTranspose: every input element is scattered into Cout/group * prod(kernel) outputs
    "conv_transpose": Case(lambda: make_model(
        [node("ConvTranspose", ["x", "w", "b"], ["y"], "conv", kernel_shape=[3, 3], strides=[2, 2],
              pads=[1, 1, 1, 1], output_padding=[1, 1])],
        {"x": (1, 4, 5, 5)}, ["y"], {"w": weights((4, 6, 3, 3)), "b": weights((6,), 1, 0.1)}),
        "conv", "own", macs=4 * 5 * 5 * 6 * 9),
    # Gemm / MatMul: MACs = numel(output) * K (definition of the matrix product)
    "gemm_trans_b": Case(lambda: make_model(
        [node("Gemm", ["x", "w", "b"], ["y"], "fc", transB=1)], {"x": (1, 12)}, ["y"],
        {"w": weights((7, 12)), "b": weights((7,), 1, 0.1)}), "fc", "own", macs=12 * 7),
    "gemm_plain": Case(lambda: make_model(
        [node("Gemm", ["x", "w", "b"], ["y"], "fc", alpha=0.5, beta=2.0)], {"x": (1, 12)}, ["y"],
        {"w": weights((12, 7)), "b": weights((7,), 1, 0.1)}), "fc", "own", macs=12 * 7),
    "matmul_weight": Case(matmul_weight_case((1, 12), (12, 7)), "op", "own", macs=12 * 7),
    "matmul_batched_weight": Case(matmul_weight_case((1, 5, 12), (12, 7)), "op", "own", macs=5 * 7 * 12),
    "matmul_weight_first": Case(matmul_weight_case((1, 12, 5), (7, 12), weight_first=True), "op", "own",
                                macs=7 * 5 * 12),
    "matmul_activations_batched": Case(binary_case("MatMul", (1, 2, 4, 8), (1, 2, 8, 3)), "op", "own",
                                       macs=2 * 4 * 3 * 8),
    # elementwise arithmetic: one operation per output element
    "add": Case(binary_case("Add"), "op", "own", elementwise_ops=4 * 6 * 6),
    "add_broadcast_constant": Case(constant_operand_case("Add", f32(np.arange(4).reshape(1, 4, 1, 1))), "op", "own",
                                   elementwise_ops=4 * 6 * 6),
    "sub": Case(binary_case("Sub"), "op", "own", elementwise_ops=4 * 6 * 6),
    "mul": Case(binary_case("Mul"), "op", "own", elementwise_ops=4 * 6 * 6),
    "mul_constant": Case(constant_operand_case("Mul", f32(0.25)), "op", "own", elementwise_ops=4 * 6 * 6),
    "div_constant": Case(constant_operand_case("Div", f32(3.0)), "op", "own", elementwise_ops=4 * 6 * 6),
    "div_per_channel_constant": Case(constant_operand_case("Div", f32([[[[1.0]], [[2.0]], [[4.0]], [[0.5]]]])),
                                     "op", "own", elementwise_ops=4 * 6 * 6),
    # data movement
    "concat": Case(concat_case(), "op", "matched", macs=3 * 36 * 4 + 5 * 36 * 4),
    "split": Case(split_case(), "op", "shared"),
    "split_then_conv": Case(split_then_conv_case(), "op", "shared", macs=3 * 16 * 2 + 3 * 16 * 4),
    "slice": Case(unary_case("Slice", (1, 4, 8, 8), {"starts": i64([1, 2]), "ends": i64([3, 7]),
                                                     "axes": i64([1, 3])}, ("starts", "ends", "axes")),
                  "op", "shared"),
    "reshape": Case(unary_case("Reshape", (1, 4, 6, 6), {"shape": i64([1, 4, 36])}, ("shape",)), "op", "shared"),
    "flatten": Case(unary_case("Flatten", axis=1), "op", "shared"),
    "transpose": Case(unary_case("Transpose", perm=[0, 2, 3, 1]), "op", "shared"),
    "squeeze": Case(unary_case("Squeeze", (1, 4, 1, 6), {"axes": i64([2])}, ("axes",)), "op", "shared"),
    "unsqueeze": Case(unary_case("Unsqueeze", (1, 4, 6), {"axes": i64([2])}, ("axes",)), "op", "shared"),
    "pad": Case(unary_case("Pad", (1, 4, 6, 6), {"pads": i64([0, 0, 1, 2, 0, 0, 1, 2])}, ("pads",),
                           mode="constant"), "op", "shared"),
    "resize_nearest": Case(resize_case("nearest"), "op", "shared"),
    "resize_linear": Case(resize_case("linear"), "op", "own"),
    # pooling and reductions: MaxPool/AveragePool cost numel(output) * prod(kernel) comparisons or
    # additions; global pools and reductions one operation per input element
    "maxpool": Case(unary_case("MaxPool", kernel_shape=[2, 2], strides=[2, 2]), "op", "shared",
                    elementwise_ops=4 * 3 * 3 * 4),
    "maxpool_padded": Case(unary_case("MaxPool", kernel_shape=[3, 3], strides=[1, 1], pads=[1, 1, 1, 1]), "op",
                           "shared", elementwise_ops=4 * 6 * 6 * 9),
    "averagepool": Case(unary_case("AveragePool", kernel_shape=[3, 3], strides=[3, 3]), "op", "own",
                        elementwise_ops=4 * 2 * 2 * 9),
    "global_average_pool": Case(unary_case("GlobalAveragePool"), "op", "own", elementwise_ops=4 * 6 * 6),
    "global_max_pool": Case(unary_case("GlobalMaxPool"), "op", "shared", elementwise_ops=4 * 6 * 6),
    "reduce_mean": Case(unary_case("ReduceMean", axes=[2, 3], keepdims=1), "op", "own", elementwise_ops=4 * 6 * 6),
    # activations
    "relu_after_conv": Case(after_conv("Relu"), "op", "fused", macs=4 * 36 * 4 * 9),
    "relu_alone": Case(unary_case("Relu"), "op", "own", elementwise_ops=4 * 6 * 6),
    "clip_relu6_after_conv": Case(after_conv("Clip", ("lo", "hi"), {"lo": f32(0.0), "hi": f32(6.0)}), "op", "fused",
                                  macs=4 * 36 * 4 * 9),
    "clip_negative_min_after_conv": Case(after_conv("Clip", ("lo", "hi"), {"lo": f32(-1.0), "hi": f32(1.0)}), "op",
                                         "unfused", macs=4 * 36 * 4 * 9),
    "leaky_relu": Case(unary_case("LeakyRelu", alpha=0.1), "op", "own", elementwise_ops=4 * 6 * 6),
    "prelu": Case(unary_case("PRelu", inits={"slope": f32([[[0.1]], [[0.2]], [[-0.1]], [[0.3]]])},
                             extra_inputs=("slope",)), "op", "own", elementwise_ops=4 * 6 * 6),
    "sigmoid": Case(unary_case("Sigmoid"), "op", "own", elementwise_ops=4 * 6 * 6),
    "hard_sigmoid": Case(unary_case("HardSigmoid", alpha=1 / 6, beta=0.5), "op", "own", elementwise_ops=4 * 6 * 6),
    "hard_swish": Case(after_conv("HardSwish"), "op", "own", macs=4 * 36 * 4 * 9, elementwise_ops=4 * 6 * 6),
    "tanh": Case(unary_case("Tanh"), "op", "own", elementwise_ops=4 * 6 * 6),
    "softmax": Case(unary_case("Softmax", (1, 10), axis=-1), "op", "own", elementwise_ops=10),
    # folded or removed by the loader
    "batchnorm_after_conv": Case(batchnorm_case(), "op", "folded", macs=4 * 36 * 4 * 9),
    "batchnorm_alone": Case(batchnorm_case(lone=True), "op", "folded"),
    "identity": Case(passthrough_case("Identity"), "op", "removed", macs=4 * 25 * 4),
    "dropout": Case(passthrough_case("Dropout"), "op", "removed", macs=4 * 25 * 4),
    # kept float: recurrent layers and an op type the table does not know
    "lstm": Case(_lstm_build, "op", "float", macs=LSTM_OTHER_MACS, extra={"float_params": LSTM_PARAMS}),
    "gru": Case(_gru_build, "op", "float", macs=GRU_OTHER_MACS, extra={"float_params": GRU_PARAMS}),
    "unknown_op": Case(unary_case("Softplus"), "op", "float"),
}


@pytest.fixture(scope="module")
def checked(tmp_path_factory):
    """Each case through `qfit check` once (library entry point: the plan and params are inspected)."""
    cache: dict[str, tq.Checked] = {}

    def get(case_id: str) -> tq.Checked:
        if case_id not in cache:
            case = CASES[case_id]
            folder = tmp_path_factory.mktemp(case_id)
            cache[case_id] = tq.check(case.build(), folder, name=case_id, samples=6, via_cli=False,
                                      low=case.low, high=case.high, method="minmax")
        return cache[case_id]
    return get


def output_of(model: onnx.ModelProto, name: str) -> str:
    (found,) = [n.output[0] for n in model.graph.node if n.name == name]
    return found


@pytest.mark.parametrize("case_id", sorted(CASES))
def test_op_int8_model_agrees_with_onnx_reference(case_id, checked):
    run = checked(case_id)
    onnx.checker.check_model(run.int8_model, full_check=True)
    samples = tq.single_samples(run.int8_model, 3, seed=7)
    # ONNX operator spec via onnx.reference, same QDQ graph, same integer inputs at every quantizer.
    forced = tq.forced_agreement(run.int8_model, samples)
    assert forced.integer_fraction >= 0.999 and forced.max_integer_diff <= 1, forced
    assert forced.output_fraction >= 0.999, forced
    # End to end (tiny graphs have no depth for a rounding tie to cascade through).
    free = tq.free_running_agreement(run.int8_model, tq.random_batch(run.int8_model, 8, seed=8))
    assert free.output_fraction >= 0.999, free


@pytest.mark.parametrize("case_id", sorted(CASES))
def test_op_macs_and_element_ops_match_hand_formula(case_id, checked):
    case, run = CASES[case_id], checked(case_id)
    macs = run.report["macs"]
    assert macs["total"] == case.macs == run.report["model"]["macs"]
    if case.elementwise_ops is not None:
        rows = [r for r in macs["layers"] if r["name"] == case.node]
        assert rows and rows[0]["elementwise_ops"] == case.elementwise_ops, rows


def _params(run: tq.Checked, tensor: str):
    p = run.result.quantized.activations[tensor]
    return p.scale, p.zero_point


@pytest.mark.parametrize("case_id", sorted(CASES))
def test_op_is_handled_as_documented(case_id, checked):
    case, run = CASES[case_id], checked(case_id)
    loaded, plan = run.result.loaded, run.result.plan
    int8_ops = tq.op_types(run.int8_model)
    (original,) = [n for n in case.build().graph.node if n.name == case.node]
    rows = {r["name"]: r for r in run.report["layers"]}
    if case.handling == "removed":
        assert original.op_type not in int8_ops and original.op_type not in tq.op_types(loaded.model)
        assert any("removed" in note for note in run.report["model"]["notes"])
        return
    if case.handling == "folded":
        assert "BatchNormalization" not in int8_ops
        assert any("BatchNormalization" in note for note in run.report["model"]["notes"])
        return
    if case.handling == "float":
        assert rows[case.node]["precision"] == "float"
        assert case.node in run.report["model"]["float_nodes"]
        assert any(original.op_type in note and "float" in note for note in run.report["model"]["notes"])
        return
    assert rows.get(case.node, {}).get("precision", "int8") == "int8"
    outputs = [o for o in output_of_all(loaded.model, case.node) if o in loaded.shapes]
    source = original.input[0]
    if case.handling == "own":
        for out in outputs:
            assert out in plan.activations and plan.activations[out].shared_from is None, out
    elif case.handling == "shared":
        for out in outputs:
            assert plan.source_of(out) == plan.source_of(source), out
            assert _params(run, out) == _params(run, source)
    elif case.handling == "matched":
        # every input of the Concat is stored with the output's scale: the kernel copies bytes
        (out,) = outputs
        for inp in original.input:
            assert _params(run, inp) == _params(run, out), inp
    elif case.handling == "fused":
        assert source in plan.fused and source not in run.result.quantized.activations
    elif case.handling == "unfused":
        assert source not in plan.fused and source in run.result.quantized.activations
        assert outputs[0] in run.result.quantized.activations
    else:
        raise AssertionError(f"unknown handling {case.handling}")


def output_of_all(model: onnx.ModelProto, name: str) -> list[str]:
    (found,) = [list(n.output) for n in model.graph.node if n.name == name]
    return found


# ---- specific behaviours ----------------------------------------------------------------------------

def test_conv_weights_are_int8_per_output_channel(checked):
    run = checked("conv2d_grouped")
    # common practice (per-channel symmetric weights): one scale per output channel, zero point 0
    wq = run.result.plan.weights[("conv", 1)]
    assert wq.axis == 0 and wq.bits == 8
    inits = {i.name: numpy_helper.to_array(i) for i in run.int8_model.graph.initializer}
    int8_weights = [v for v in inits.values() if v.dtype == np.int8 and v.ndim == 4]
    assert len(int8_weights) == 1 and int8_weights[0].shape == (8, 2, 3, 3)
    row = tq.report_layer(run.report, "flash", "conv")
    assert row["weight_bytes"] == 8 * 2 * 3 * 3 and row["bias_bytes"] == 8 * 4  # int8 weights, int32 bias


def test_matmul_constant_first_operand_is_a_weight_with_row_channels(checked):
    run = checked("matmul_weight_first")
    # W [M, K] @ x [K, N]: output rows follow W's rows, so per-channel scales run along axis 0 (axis -2)
    wq = run.result.plan.weights[("op", 0)]
    assert wq.axis == 0
    assert tq.report_layer(run.report, "flash", "op")["weight_bytes"] == 7 * 12
    assert run.report["model"]["params"] == 7 * 12


def test_prelu_slope_is_stored_as_an_int8_weight(checked):
    run = checked("prelu")
    assert ("op", 1) in run.result.plan.weights
    assert tq.report_layer(run.report, "flash", "op")["weight_bytes"] == 4


def test_split_gives_every_output_its_input_quantizer(checked):
    run = checked("split_then_conv")
    plan = run.result.plan
    assert plan.source_of("s1") == plan.source_of("s2") == plan.source_of("x")


def test_div_by_an_activation_stays_float_with_a_note(tmp_path):
    # An int8 kernel divides by a constant as a multiply by its reciprocal; dividing by a tensor
    # that varies per element has no integer kernel, so qfit keeps it float and says so.
    model = make_model([node("Sigmoid", ["b"], ["d"], "positive"), node("Add", ["d", "one"], ["e"], "shift"),
                        node("Div", ["a", "e"], ["y"], "op")],
                       {"a": (1, 4, 3, 3), "b": (1, 4, 3, 3)}, ["y"], {"one": f32(1.0)})
    run = tq.check(model, tmp_path, via_cli=False)
    assert "op" in run.report["model"]["float_nodes"]
    agreement = tq.forced_agreement(run.int8_model, tq.single_samples(run.int8_model, 2, seed=1))
    assert agreement.output_fraction >= 0.999


def test_lstm_weights_count_at_four_bytes_and_the_report_says_float(checked):
    for case_id in ("lstm", "gru"):
        run = checked(case_id)
        row = tq.report_layer(run.report, "flash", "op")
        # ONNX LSTM/GRU spec: W [1, gates*H, I], R [1, gates*H, H], B [1, 2*gates*H]; float32 = 4 B each
        assert row["precision"] == "float"
        assert row["float_bytes"] == 4 * CASES[case_id].extra["float_params"]
        assert row["weight_bytes"] == 0
        conv_and_head = 4 * 4 * 1 + 3 * 5
        assert run.report["model"]["params"] == CASES[case_id].extra["float_params"] + conv_and_head


def test_resize_nearest_moves_bytes_and_linear_gets_its_own_range(checked):
    nearest, linear = checked("resize_nearest"), checked("resize_linear")
    assert nearest.result.plan.activations["y"].shared_from == "x"
    assert linear.result.plan.activations["y"].shared_from is None


def test_dropout_and_identity_leave_no_node_in_the_int8_model(checked):
    for case_id in ("identity", "dropout"):
        ops = tq.op_types(checked(case_id).int8_model)
        assert "Identity" not in ops and "Dropout" not in ops
