"""Tests of the test zoo itself (tests/zoo.py) and of the trained digits model.

These pin down that every zoo model is valid ONNX, runs, carries the figures its builder claims,
and that the full-size architectures match their published sizes. They do not import qfit.

The graph-reading counters below (params, MACs, peak live bytes) are written from the ONNX graph
alone, independently of the builders' own arithmetic, so the two derivations check each other.
"""

from __future__ import annotations

import functools
import math
import pathlib
import sys

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from hypothesis import given, settings, strategies as st
from onnx import numpy_helper
from onnx.reference import ReferenceEvaluator

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))
import zoo  # noqa: E402

MODELS_DIR = pathlib.Path(__file__).resolve().parent / "models"
SMALL = sorted(zoo.ZOO)


@functools.lru_cache(maxsize=None)
def built(name: str, opset: int = zoo.DEFAULT_OPSET) -> zoo.ZooModel:
    """Each model once per session: the full-size ones take a noticeable moment to check."""
    builders = dict(zoo.ZOO, mobilenet_v2=zoo.mobilenet_v2, resnet18=zoo.resnet18)
    return builders[name](opset=opset)


def run_ort(model: onnx.ModelProto, feeds: dict, outputs=None) -> list[np.ndarray]:
    session = ort.InferenceSession(model.SerializeToString(), providers=["CPUExecutionProvider"])
    return session.run(outputs, feeds)


def random_input(zm: zoo.ZooModel, seed: int = 0) -> dict:
    return {zm.input_name: np.random.default_rng(seed).standard_normal(zm.input_shape).astype(np.float32)}


# -- independent readers of a finished graph -----------------------------------------------------

def constant_arrays(model: onnx.ModelProto) -> dict[str, np.ndarray]:
    """Initializers, Constant-node values, and Transposes of those: the weights as exporters hide them."""
    arrays = {init.name: numpy_helper.to_array(init) for init in model.graph.initializer}
    for node in model.graph.node:
        if node.op_type == "Constant":
            arrays[node.output[0]] = numpy_helper.to_array(node.attribute[0].t)
        elif node.op_type == "Transpose" and node.input[0] in arrays:
            perm = list(node.attribute[0].ints)
            arrays[node.output[0]] = np.transpose(arrays[node.input[0]], perm)
    return arrays


def consumers(model: onnx.ModelProto) -> dict[str, list[onnx.NodeProto]]:
    users: dict[str, list[onnx.NodeProto]] = {}
    for node in model.graph.node:
        for name in node.input:
            users.setdefault(name, []).append(node)
    return users


def params_from_graph(model: onnx.ModelProto) -> int:
    """The zoo's params convention (module docstring of zoo.py), read off the graph."""
    arrays, users = constant_arrays(model), consumers(model)
    total = 0
    for node in model.graph.node:
        if node.op_type == "Conv":
            weight = arrays[node.input[1]]
            total += weight.size
            next_ops = [n.op_type for n in users.get(node.output[0], [])]
            if len(node.input) > 2 and node.input[2]:
                total += arrays[node.input[2]].size
            elif next_ops == ["BatchNormalization"]:
                total += weight.shape[0]  # BN folds into one bias per output channel
        elif node.op_type == "Gemm":
            total += sum(arrays[name].size for name in node.input[1:] if name)
        elif node.op_type == "MatMul":
            total += sum(arrays[name].size for name in node.input if name in arrays)
            if any(name in arrays for name in node.input):
                for add in users.get(node.output[0], []):
                    if add.op_type == "Add":
                        total += sum(arrays[name].size for name in add.input if name in arrays)
        elif node.op_type in ("LSTM", "GRU", "RNN"):
            total += sum(arrays[name].size for name in node.input[1:4] if name)
    return total


def inferred_shapes(model: onnx.ModelProto) -> dict[str, tuple[int, ...]]:
    inferred = onnx.shape_inference.infer_shapes(model, strict_mode=True)
    shapes = {}
    for vi in [*inferred.graph.input, *inferred.graph.value_info, *inferred.graph.output]:
        shapes[vi.name] = tuple(d.dim_value for d in vi.type.tensor_type.shape.dim)
    for init in model.graph.initializer:
        shapes[init.name] = tuple(init.dims)
    return shapes


def macs_from_graph(model: onnx.ModelProto) -> int:
    """The zoo's MACs convention, from onnx's own shape inference rather than the builders' sums."""
    shapes = inferred_shapes(model)
    total = 0
    for node in model.graph.node:
        if node.op_type == "Conv":
            weight = shapes[node.input[1]]  # [Cout, Cin/groups, *kernel]
            total += math.prod(shapes[node.output[0]]) * math.prod(weight[1:])
        elif node.op_type == "Gemm":
            trans_a = any(a.name == "transA" and a.i for a in node.attribute)
            a = shapes[node.input[0]]
            total += math.prod(shapes[node.output[0]]) * (a[0] if trans_a else a[1])
        elif node.op_type == "MatMul":
            total += math.prod(shapes[node.output[0]]) * shapes[node.input[0]][-1]
    return total


def peak_live_int8_bytes(model: onnx.ModelProto) -> int:
    """The liveness rule of zoo.py's docstring, walked over the node list.

    Tensors that share storage (a BN after its conv, a Relu/Clip on a tensor nobody else reads)
    form one buffer; a buffer lives from its first producer to its last reader.
    """
    shapes = inferred_shapes(model)
    users = consumers(model)
    weights = set(constant_arrays(model))
    buffer_of: dict[str, str] = {}
    for node in model.graph.node:
        if node.op_type in ("BatchNormalization", "Relu", "Clip") and len(users.get(node.input[0], [])) == 1:
            buffer_of[node.output[0]] = buffer_of.get(node.input[0], node.input[0])

    def buffer(name):
        return buffer_of.get(name, name)

    start, end, size = {}, {}, {}
    for vi in model.graph.input:
        start[vi.name] = -1
    last = len(model.graph.node)
    for step, node in enumerate(model.graph.node):
        for name in [*node.input, *node.output]:
            if not name or name in weights:
                continue
            b = buffer(name)
            start.setdefault(b, step)
            end[b] = max(end.get(b, step), step)
            size[b] = max(size.get(b, 0), math.prod(shapes[name]))
    for vi in model.graph.output:
        end[buffer(vi.name)] = last
    return max(sum(size[b] for b in size if start[b] <= step <= end[b]) for step in range(last))


def with_every_tensor_as_output(model: onnx.ModelProto) -> onnx.ModelProto:
    inferred = onnx.shape_inference.infer_shapes(model, strict_mode=True)
    exposed = onnx.ModelProto()
    exposed.CopyFrom(inferred)
    present = {o.name for o in exposed.graph.output}
    exposed.graph.output.extend(vi for vi in inferred.graph.value_info if vi.name not in present)
    return exposed


# -- every zoo model ----------------------------------------------------------------------------

@pytest.mark.parametrize("name", SMALL + ["mobilenet_v2", "resnet18"])
def test_zoo_model_passes_full_onnx_checker(name):
    zm = built(name)
    onnx.checker.check_model(zm.model, full_check=True)
    assert zm.model.opset_import[0].version == zoo.DEFAULT_OPSET
    assert zm.model.ir_version in (9, 10)


@pytest.mark.parametrize("name", SMALL + ["mobilenet_v2", "resnet18"])
def test_zoo_model_runs_in_onnxruntime_with_finite_output_of_declared_shape(name):
    zm = built(name)
    (out,) = run_ort(zm.model, random_input(zm))
    assert out.shape == zm.output_shape
    assert np.isfinite(out).all()
    assert out.std() > 1e-4  # the output depends on the input at all


@pytest.mark.parametrize("name", SMALL + ["mobilenet_v2", "resnet18"])
def test_zoo_every_intermediate_tensor_stays_in_a_sane_range(name):
    # He-normal init and data-matched BN statistics should keep every activation O(1): neither
    # vanishing nor exploding, so quantization tests see realistic ranges.
    zm = built(name)
    exposed = with_every_tensor_as_output(zm.model)
    for vi, value in zip(exposed.graph.output, run_ort(exposed, random_input(zm))):
        assert np.isfinite(value).all(), vi.name
        rms = float(np.sqrt(np.mean(value.astype(np.float64) ** 2)))
        assert 0.05 < rms < 50, (vi.name, rms)


@pytest.mark.parametrize("name", SMALL)
def test_zoo_model_agrees_with_onnx_reference_evaluator(name):
    # onnx.reference (the ONNX project's own Python evaluator of the operator specs) is a second,
    # independent runtime: agreeing with it shows the graphs mean what the spec says.
    zm = built(name)
    feeds = random_input(zm, seed=1)
    (expected,) = ReferenceEvaluator(zm.model).run(None, feeds)
    (got,) = run_ort(zm.model, feeds)
    np.testing.assert_allclose(got, expected, rtol=1e-4, atol=1e-4)


@pytest.mark.parametrize("name", SMALL + ["mobilenet_v2", "resnet18"])
def test_zoo_builder_params_and_macs_match_the_graph(name):
    zm = built(name)
    assert zm.params == params_from_graph(zm.model)
    assert zm.macs == macs_from_graph(zm.model)


@pytest.mark.parametrize("name", SMALL)
def test_zoo_builders_are_deterministic_and_seeded(name):
    first, again = zoo.ZOO[name](), zoo.ZOO[name]()
    assert first.model.SerializeToString() == again.model.SerializeToString()
    other = zoo.ZOO[name](seed=1)
    assert other.model.SerializeToString() != first.model.SerializeToString()
    assert (other.params, other.macs) == (first.params, first.macs)


@pytest.mark.parametrize("opset", [13, 21])
@pytest.mark.parametrize("name", SMALL)
def test_zoo_model_builds_checks_and_runs_at_other_opsets(name, opset):
    zm = built(name, opset)
    onnx.checker.check_model(zm.model, full_check=True)
    assert zm.model.opset_import[0].version == opset
    (out,) = run_ort(zm.model, random_input(zm))
    assert np.isfinite(out).all() and out.shape == zm.output_shape


def test_zoo_rejects_opsets_without_optional_resize_roi():
    with pytest.raises(ValueError, match="opset"):
        zoo.concat_branches(opset=12)


def test_zoo_bn_nodes_carry_non_trivial_statistics():
    # BN folding must change the weights: gamma != 1, beta != 0, mean != 0, var != 1.
    for name in ("resnet_small", "mobilenet_v2_small", "ds_cnn_kws", "conv1d_sensor", "concat_branches"):
        model = built(name).model
        arrays = constant_arrays(model)
        bns = [n for n in model.graph.node if n.op_type == "BatchNormalization"]
        assert bns, name
        for bn in bns:
            gamma, beta, mean, var = (arrays[i] for i in bn.input[1:])
            assert np.abs(gamma - 1).max() > 0.1 and np.abs(beta).max() > 0.01
            assert np.abs(mean).max() > 0.01 and np.abs(var - 1).max() > 0.01 and (var > 0).all()


# -- published architectures ----------------------------------------------------------------------

def test_zoo_mobilenet_v2_full_size_matches_published_figures():
    zm = built("mobilenet_v2")
    # Sandler et al., CVPR 2018, Table 2 / abstract-level figures: 3.4 M params, 300 M
    # multiply-adds at width 1.0, 224x224 (from memory). Folded params come to 3.49 M.
    assert abs(zm.params - 3.4e6) / 3.4e6 < 0.04
    assert abs(zm.macs - 300e6) / 300e6 < 0.01
    # torchvision's mobilenet_v2 model card lists num_params 3,504,872 (from memory): the same
    # architecture counted with BN gamma/beta and bias-free convs must hit it exactly.
    assert zm.extra["torch_convention_params"] == 3_504_872


def test_zoo_resnet18_full_size_matches_published_figures():
    zm = built("resnet18")
    # He et al., CVPR 2016, Table 1: 18-layer net, 1.8 x 10^9 FLOPs, which the paper counts as
    # multiply-adds (from memory).
    assert abs(zm.macs - 1.8e9) / 1.8e9 < 0.02
    # torchvision's resnet18 model card lists num_params 11,689,512 (from memory); folding the
    # 4,800 BN channels into conv biases leaves 11.68 M.
    assert zm.extra["torch_convention_params"] == 11_689_512
    assert abs(zm.params - 11.69e6) / 11.69e6 < 0.005


def test_zoo_ds_cnn_matches_hello_edge_operation_count():
    zm = built("ds_cnn_kws")
    # Zhang et al., "Hello Edge" (2017), DS-CNN small: about 5.4 M operations (from memory); they
    # count a multiply-add as two operations.
    assert abs(2 * zm.macs - 5.4e6) / 5.4e6 < 0.05


def test_zoo_mobilenet_channel_rounding_follows_the_reference_rule():
    # Reference MobileNet code rounds channels to the nearest multiple of 8, never below 90 % of
    # the unrounded value (common practice in width-multiplied nets).
    assert [zoo._make_divisible(c * 0.35) for c in (32, 16, 24, 32, 64, 96, 160, 320)] == [16, 8, 8, 16, 24, 32, 56, 112]
    assert zoo._make_divisible(32 * 1.0) == 32


# -- hand-computed activation peaks ---------------------------------------------------------------

@pytest.mark.parametrize("name, expected", [("mobilenet_v2", 1_505_280), ("mobilenet_v2_small", 138_240)])
def test_zoo_mobilenet_v2_hand_computed_peak_matches_a_liveness_walk(name, expected):
    zm = built(name)
    # The figure in zoo.py was worked out by hand (block 2: expanded tensor + its depthwise output);
    # the walk derives it again from the graph.
    assert zm.int8_layer_order_peak_bytes == expected
    assert peak_live_int8_bytes(zm.model) == expected


@pytest.mark.parametrize("name, expected", [("ds_cnn_kws", 16_000), ("conv1d_sensor", 4_096), ("dense_autoencoder", 768)])
def test_zoo_chain_peak_matches_a_liveness_walk(name, expected):
    zm = built(name)
    assert zm.int8_chain_peak_bytes == expected
    assert peak_live_int8_bytes(zm.model) == expected


def test_zoo_liveness_walk_counts_a_residual_input_as_live():
    # Guard for the walk itself: in resnet_small's identity block the block input must stay live
    # across both convs, so the peak exceeds any single conv's input + output.
    model = built("resnet_small").model
    shapes = inferred_shapes(model)
    largest_pair = max(math.prod(shapes[n.input[0]]) + math.prod(shapes[n.output[0]])
                       for n in model.graph.node if n.op_type == "Conv")
    assert peak_live_int8_bytes(model) == largest_pair + 16 * 32 * 32


# -- model-specific features ----------------------------------------------------------------------

def attrs(node) -> dict:
    return {a.name: onnx.helper.get_attribute_value(a) for a in node.attribute}


def test_zoo_conv1d_sensor_has_stride_dilation_and_same_upper_padding():
    model = built("conv1d_sensor").model
    convs = [attrs(n) for n in model.graph.node if n.op_type == "Conv"]
    assert any(c.get("strides") == [2] for c in convs)
    assert any(c.get("dilations") == [2] for c in convs)
    same = [c for c in convs if c.get("auto_pad") == b"SAME_UPPER"]
    assert len(same) == 1 and same[0]["kernel_shape"] == [4]  # even kernel: pads 1 before, 2 after
    ops = {n.op_type for n in model.graph.node}
    assert {"MaxPool", "GlobalAveragePool", "Gemm", "Softmax"} <= ops
    (probs,) = run_ort(model, random_input(built("conv1d_sensor")))
    np.testing.assert_allclose(probs.sum(), 1.0, rtol=1e-5)


def test_zoo_concat_branches_has_three_branches_and_the_extra_ops():
    model = built("concat_branches").model
    ops = [n.op_type for n in model.graph.node]
    assert {"Resize", "Pad", "HardSwish", "HardSigmoid", "LeakyRelu", "Sigmoid", "Mul", "MaxPool"} <= set(ops)
    (concat,) = [n for n in model.graph.node if n.op_type == "Concat"]
    assert len(concat.input) == 3
    stem_out = model.graph.node[2].output[0]  # Conv, BN, HardSwish
    assert len(consumers(model)[stem_out]) == 3


def test_zoo_unsupported_middle_counts_lstm_weights():
    zm = built("unsupported_middle")
    (lstm,) = [n for n in zm.model.graph.node if n.op_type == "LSTM"]
    arrays = constant_arrays(zm.model)
    hidden, features = 24, 16
    # ONNX operator spec for LSTM: W [dirs, 4*hidden, input], R [dirs, 4*hidden, hidden], B [dirs, 8*hidden].
    assert [arrays[i].shape for i in lstm.input[1:4]] == [(1, 96, 16), (1, 96, 24), (1, 192)]
    assert zm.extra["lstm_params"] == 4 * hidden * features + 4 * hidden * hidden + 8 * hidden
    lstm_bytes = 4 * sum(arrays[i].size for i in lstm.input[1:4])
    assert lstm_bytes == 4 * zm.extra["lstm_params"]
    assert zm.params > zm.extra["lstm_params"]  # the conv front-end and head count too


def test_zoo_matmul_weights_arrive_through_constant_and_transpose():
    model = built("matmul_transposed_weights").model
    producers = {o: n for n in model.graph.node for o in n.output}
    initializers = {i.name for i in model.graph.initializer}
    weights = constant_arrays(model)
    matmuls = [n for n in model.graph.node if n.op_type == "MatMul"]
    weight_sources = [producers[n.input[1]] for n in matmuls if n.input[1] in weights]
    assert sorted(p.op_type for p in weight_sources) == ["Constant", "Transpose"]
    assert all(p.input[0] in initializers for p in weight_sources if p.op_type == "Transpose")
    # The other two multiply activation by activation, batched over a leading dimension.
    shapes = inferred_shapes(model)
    batched = [n for n in matmuls if not any(i in weights for i in n.input)]
    assert len(batched) == 2 and all(len(shapes[i]) == 3 for n in batched for i in n.input)


# -- random DAGs --------------------------------------------------------------------------------

@settings(max_examples=40, deadline=None, derandomize=True, database=None)  # reproducible, no cache dir
@given(seed=st.integers(0, 10_000), n_nodes=st.integers(4, 14))
def test_zoo_random_dag_is_valid_branched_and_exactly_sized(seed, n_nodes):
    zm = zoo.random_dag(seed, n_nodes)
    model = zm.model
    onnx.checker.check_model(model, full_check=True)
    assert len(model.graph.node) == n_nodes
    stem = model.graph.node[0]
    assert stem.op_type == "Conv" and len(consumers(model)[stem.output[0]]) >= 2  # 2-3 branches fork here
    assert model.graph.node[-1].op_type == "Concat"
    assert zm.params == params_from_graph(model) and zm.macs == macs_from_graph(model)
    (out,) = run_ort(model, random_input(zm))
    assert out.shape == zm.output_shape and np.isfinite(out).all()


def test_zoo_random_dag_depends_on_its_seed():
    a, b = zoo.random_dag(1, 10), zoo.random_dag(1, 10)
    assert a.model.SerializeToString() == b.model.SerializeToString()
    shapes = {tuple(n.op_type for n in zoo.random_dag(s, 10).model.graph.node) for s in range(10)}
    assert len(shapes) > 5


def test_zoo_random_dag_refuses_too_few_nodes():
    with pytest.raises(ValueError, match="n_nodes"):
        zoo.random_dag(0, 3)


# -- the trained digits model -----------------------------------------------------------------------

def digits_heldout():
    """The split of tests/models/train_digits.py: 30 % held out, stratified, random_state=0;
    pixels (0..16) scaled by 1/16."""
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split

    digits = load_digits()
    images = (digits.images.astype(np.float32) / 16.0)[:, None, :, :]
    _, x_test, _, y_test = train_test_split(images, digits.target, test_size=0.3, random_state=0,
                                            stratify=digits.target)
    return x_test, y_test


def test_zoo_digits_cnn_file_has_the_documented_interface():
    path = MODELS_DIR / "digits_cnn.onnx"
    assert path.stat().st_size < 200 * 1024
    model = onnx.load(path)
    onnx.checker.check_model(model, full_check=True)
    (image,) = model.graph.input
    dims = image.type.tensor_type.shape.dim
    assert image.name == "image" and dims[0].dim_param == "N" and [d.dim_value for d in dims[1:]] == [1, 8, 8]
    assert [o.name for o in model.graph.output] == ["logits"]
    assert model.opset_import[0].version == 13
    assert "BatchNormalization" in {n.op_type for n in model.graph.node}


def test_zoo_digits_cnn_heldout_accuracy_is_at_least_97_percent():
    # Data: UCI "Optical Recognition of Handwritten Digits" as bundled with scikit-learn
    # (sklearn.datasets.load_digits); 540 held-out images. The training run recorded 98.70 %.
    x_test, y_test = digits_heldout()
    assert len(y_test) == 540
    (logits,) = run_ort(onnx.load(MODELS_DIR / "digits_cnn.onnx"), {"image": x_test})
    accuracy = float((logits.argmax(axis=1) == y_test).mean())
    assert accuracy >= 0.97
