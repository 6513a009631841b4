"""Cross-layer equalization, bias absorption and bias correction (Nagel, van Baalen, Blankevoort,
Welling, "Data-Free Quantization Through Weight Equalization and Bias Correction", ICCV 2019)."""
from __future__ import annotations

import numpy as np
import pytest
from onnx import TensorProto, helper, numpy_helper

import zoo
from digits_folders import INPUT_SHAPES, MODEL, write_folders
from qfit.quant import equalize
from qfit import check as pipeline
from qfit.measure.compare import ErrorSums
from qfit.data import Batch
from qfit.graph.load import prepare_model
from qfit.quant.plan import PlanOptions, make_plan
from qfit.quant.quantize import quantize_weight
from qfit.quant.quantize import Quantizer
from qfit.report.build import build_report
from qfit.runtime.sessions import Runner


def separable(seed=0, spread_decades=3.0, activation="relu", size=12, positive_offsets=False):
    """Conv 3->16 -> act -> depthwise 16 -> act -> 1x1 16->8 -> act -> GAP -> Gemm 8->10.

    Depthwise channel i is multiplied by a_i (log-uniform over `spread_decades` decades) and the
    1x1 conv's input column i by 1 / a_i. For ReLU that leaves the function of the unscaled network
    unchanged, and it is the situation Nagel et al. (sec. 3, fig. 2) show for MobileNetV2: depthwise
    channel ranges that differ by orders of magnitude, so per-tensor weight quantization rounds the
    small channels to zero."""
    rng = np.random.default_rng(seed)
    c, m = 16, 8
    a = (10.0 ** rng.uniform(-spread_decades, 0, c)).astype(np.float32)
    bd = rng.normal(0, 0.1, c) * a
    if positive_offsets:  # channels whose pre-activation never goes below ~2 a_i: absorbable
        bd = np.abs(bd) + 3.0 * a
    values = dict(
        w1=rng.normal(0, 0.3, (c, 3, 3, 3)), b1=rng.normal(0, 0.1, c),
        wd=rng.normal(0, 0.3, (c, 1, 3, 3)) * a[:, None, None, None], bd=bd,
        wp=rng.normal(0, 0.3, (m, c, 1, 1)) / a[None, :, None, None], bp=rng.normal(0, 0.1, m),
        wg=rng.normal(0, 0.3, (10, m)), bg=rng.normal(0, 0.1, 10))
    inits = [numpy_helper.from_array(np.asarray(v, np.float32), k) for k, v in values.items()]

    def act(x, y, name):
        if activation == "relu":
            return [helper.make_node("Relu", [x], [y], name=name)]
        inits.append(numpy_helper.from_array(np.array(0, np.float32), f"{name}_lo"))
        inits.append(numpy_helper.from_array(np.array(6, np.float32), f"{name}_hi"))
        return [helper.make_node("Clip", [x, f"{name}_lo", f"{name}_hi"], [y], name=name)]

    nodes = [helper.make_node("Conv", ["x", "w1", "b1"], ["c1"], pads=[1] * 4, name="conv"), *act("c1", "a1", "act1"),
             helper.make_node("Conv", ["a1", "wd", "bd"], ["c2"], pads=[1] * 4, group=c, name="depthwise"),
             *act("c2", "a2", "act2"),
             helper.make_node("Conv", ["a2", "wp", "bp"], ["c3"], name="pointwise"), *act("c3", "a3", "act3"),
             helper.make_node("GlobalAveragePool", ["a3"], ["g"], name="gap"),
             helper.make_node("Flatten", ["g"], ["f"], name="flatten"),
             helper.make_node("Gemm", ["f", "wg", "bg"], ["y"], transB=1, name="classifier")]
    graph = helper.make_graph(nodes, "separable",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, size, size])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 10])], inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], ir_version=9)


class Samples:
    def __init__(self, xs, name="x"):
        self.xs, self.name = xs, name

    def __len__(self):
        return len(self.xs)

    def batches(self, size):
        for i in range(0, len(self.xs), size):
            yield Batch({self.name: self.xs[i:i + size]}, None, [str(j) for j in range(i, min(i + size, len(self.xs)))])


def _inputs(seed, n=48, shape=(3, 12, 12)):
    return np.random.default_rng(seed).normal(0, 1, (n, *shape)).astype(np.float32)


def _outputs(loaded, xs, name="x"):
    output = loaded.output_names[0]
    return Runner(loaded.model, [output], batch_size=16)({name: xs})[output]


@pytest.mark.parametrize("build", [lambda: separable(), lambda: zoo.ds_cnn_kws().model],
                         ids=["separable_relu", "ds_cnn_kws"])
def test_equalization_leaves_a_relu_network_unchanged(build):
    # Nagel et al. 2019, sec. 4.1: ReLU(x / s) = ReLU(x) / s for s > 0 (positive scaling equivariance),
    # so rescaling channel pairs changes no output. Checked on fresh inputs, not the ones equalized on.
    loaded = prepare_model(build())
    name = loaded.input_names[0]
    shape = loaded.shapes[name][1:]
    original = {k: v.copy() for k, v in loaded.constants.items()}
    serialized = loaded.model.SerializeToString()
    result = equalize.equalize(loaded, None)
    assert result.pairs, "the model has Conv -> ReLU -> Conv pairs"
    assert any(not np.array_equal(result.loaded.constants[k], v) for k, v in original.items())
    xs = _inputs(5, 16, shape)
    before, after = _outputs(loaded, xs, name), _outputs(result.loaded, xs, name)
    np.testing.assert_allclose(after, before, rtol=1e-4, atol=1e-5 * np.abs(before).max())
    # and the model it was given is untouched
    assert loaded.model.SerializeToString() == serialized
    assert all(np.array_equal(loaded.constants[k], v) for k, v in original.items())


def test_equalization_balances_each_pair_to_the_geometric_mean_of_the_ranges():
    # Nagel et al. 2019, eq. 9-11: s_i = sqrt(r1_i / r2_i) makes both ranges sqrt(r1_i r2_i). The
    # depthwise layer sits in two pairs; once the sweeps converge each pair is balanced.
    loaded = prepare_model(separable())
    r1 = np.abs(loaded.constants["wd"].reshape(16, -1)).max(axis=1)
    result = equalize.equalize(loaded, None)
    r1_after = np.abs(result.loaded.constants["wd"].reshape(16, -1)).max(axis=1)
    r2_after = np.abs(result.loaded.constants["wp"].reshape(8, 16)).max(axis=0)
    np.testing.assert_allclose(r1_after, r2_after, rtol=1e-4)
    assert result.pairs[1]["range_spread_after"] < result.pairs[1]["range_spread_before"] / 100
    assert r1.max() / r1.min() > 100


def test_per_tensor_collapse_of_a_depthwise_separable_model_is_recovered_by_equalization():
    # Nagel et al. 2019, sec. 3 and table 1: with per-tensor weight quantization, MobileNetV2's
    # depthwise layers (channel ranges orders of magnitude apart) collapse the model; equalization
    # recovers it. Here: output SQNR and agreement with the float model on fresh inputs.
    loaded = prepare_model(separable())
    calib, test = Samples(_inputs(0, 64)), _inputs(1, 64)
    reference = _outputs(loaded, test)
    options = PlanOptions(per_channel=False)

    def int8_figures(model):
        stats = pipeline.calibrate(model, make_plan(model, options), calib, 16, False)
        _, quantized = Quantizer(model, stats, "minmax", 99.99).build(options)
        got = Runner(quantized.model, ["y"], faithful=True, batch_size=16)({"x": test})["y"]
        sums = ErrorSums()
        sums.update(reference, got)
        return sums.sqnr_db(), float(np.mean(got.argmax(1) == reference.argmax(1)))

    plain_sqnr, plain_agreement = int8_figures(loaded)
    equalized_sqnr, equalized_agreement = int8_figures(equalize.equalize(loaded, calib).loaded)
    assert plain_sqnr < 10 and plain_agreement < 0.5          # collapsed
    assert equalized_sqnr > 30 and equalized_agreement > 0.95  # recovered


def test_relu6_pairs_keep_the_function_on_the_calibration_data():
    # ReLU6 is not positively homogeneous (Nagel et al. replace it by ReLU). qfit keeps the clip out of
    # reach of every rescaled channel on the calibration data, so there the outputs must not change.
    loaded = prepare_model(separable(activation="relu6"))
    xs = _inputs(3, 64)
    result = equalize.equalize(loaded, Samples(xs))
    assert [p["activation"] for p in result.pairs] == ["relu6", "relu6"]
    before, after = _outputs(loaded, xs), _outputs(result.loaded, xs)
    np.testing.assert_allclose(after, before, rtol=1e-4, atol=1e-5 * np.abs(before).max())
    assert result.pairs[1]["range_spread_after"] < result.pairs[1]["range_spread_before"] / 100


def test_bias_absorption_keeps_the_function_on_calibration_data_and_narrows_the_activation_range():
    # Nagel et al. 2019, sec. 4.1.2: h = ReLU(x) with x >= c > 0 gives h = (h - c) + c, and the next
    # layer absorbs W2 c in its bias. Exact where the data never falls below c (1x1 next layer).
    loaded = prepare_model(separable(positive_offsets=True, spread_decades=1.0))
    xs = _inputs(4, 64)
    without = equalize.equalize(loaded, Samples(xs), absorb=False)
    with_absorption = equalize.equalize(loaded, Samples(xs), absorb=True)
    assert with_absorption.absorbed_channels > 0
    before, after = _outputs(loaded, xs), _outputs(with_absorption.loaded, xs)
    np.testing.assert_allclose(after, before, rtol=1e-4, atol=1e-5 * np.abs(before).max())

    def a2_max(model):
        return float(Runner(model.model, ["a2"], batch_size=16)({"x": xs})["a2"].max())
    assert a2_max(with_absorption.loaded) < a2_max(without.loaded)


def test_per_channel_ranges_equal_the_max_abs_weight_of_each_channel_within_one_step():
    # Definition of symmetric per-channel quantization (s_c = max|W_c| / 127, q in [-127, 127]):
    # the dequantized channel's largest magnitude is max|W_c| to within one step s_c.
    loaded = equalize.equalize(prepare_model(separable()), None).loaded
    for name in ("w1", "wd", "wp"):
        w = loaded.constants[name]
        q, scale = quantize_weight(w, 0)
        dequantized = q.astype(np.float64) * scale.reshape(-1, 1, 1, 1)
        per_channel = np.abs(dequantized.reshape(w.shape[0], -1)).max(axis=1)
        true_max = np.abs(w.reshape(w.shape[0], -1)).max(axis=1)
        assert np.all(np.abs(per_channel - true_max) <= scale + 1e-12)


def _conv_direct(x, w, pad):
    """Plain loops: y[o, i, j] = sum_c,k,l w[o, c, k, l] * x_padded[c, i + k, j + l]."""
    c, h, width = x.shape
    o, _, kh, kw = w.shape
    xp = np.zeros((c, h + 2 * pad, width + 2 * pad))
    xp[:, pad:pad + h, pad:pad + width] = x
    y = np.zeros((o, h + 2 * pad - kh + 1, width + 2 * pad - kw + 1))
    for i in range(y.shape[1]):
        for j in range(y.shape[2]):
            y[:, i, j] = np.tensordot(w, xp[:, i:i + kh, j:j + kw], axes=([1, 2, 3], [0, 1, 2]))
    return y


def test_bias_correction_subtracts_the_weight_error_times_the_mean_input_and_removes_the_mean_shift():
    # Nagel et al. 2019, sec. 4.2: E[W' x] - E[W x] = (W' - W) E[x]. The shift is recomputed here by
    # direct convolution of the mean int8 input, and the corrected model's mean output error per
    # channel must shrink.
    loaded = prepare_model(separable(spread_decades=1.0))
    xs = np.abs(_inputs(6, 64))  # positive inputs: E[x] far from 0, so the shift is visible
    calib = Samples(xs)
    options = PlanOptions(per_channel=False)
    plan = make_plan(loaded, options)
    stats = pipeline.calibrate(loaded, plan, calib, 16, False)
    builder = Quantizer(loaded, stats, "minmax", 99.99)
    plan, quantized = builder.build(options)
    correction = equalize.bias_correction(loaded, plan, quantized, calib, 16)
    fix = correction.fixes["conv"]
    mean_x = Runner(quantized.model, [quantized.dequantized["x"]], faithful=True, batch_size=16)(
        {"x": xs})[quantized.dequantized["x"]].astype(np.float64).mean(axis=0)
    q, scale = quantize_weight(loaded.constants["w1"], None)
    error = q.astype(np.float64) * float(scale) - loaded.constants["w1"].astype(np.float64)
    expected = _conv_direct(mean_x, error, 1).reshape(16, -1).mean(axis=1)
    np.testing.assert_allclose(fix.shift, expected, rtol=1e-3, atol=1e-7)

    corrected = Quantizer(correction.structure(loaded), stats, "minmax", 99.99, bias_correction=correction)
    _, fixed = corrected.build(options)
    # pre-activation of the depthwise conv (not fused away: read the int8 model's c1 via its ReLU
    # input) -- measure the mean per-channel error of the first conv's output, before the clamp
    float_c1 = Runner(loaded.model, ["c1"], batch_size=16)({"x": xs})["c1"].mean(axis=(0, 2, 3))

    def mean_error(model):
        got = Runner(model.model, ["c1"], faithful=True, batch_size=16)({"x": xs})["c1"].mean(axis=(0, 2, 3))
        return np.abs(got - float_c1)
    assert mean_error(fixed).mean() < 0.2 * mean_error(quantized).mean()


def test_check_reports_equalization_and_bias_correction_before_and_after(tmp_path):
    calib, evaluation = write_folders(tmp_path / "data")
    options = pipeline.CheckOptions(model_path=str(MODEL), calib_dir=calib, eval_dir=evaluation,
                                    out_dir=str(tmp_path / "out"), flash_limit_bytes=1 << 20,
                                    sram_limit_bytes=256 << 10, input_shapes=INPUT_SHAPES, progress=False,
                                    equalize=True, bias_correction=True, isolated_samples=0, per_channel=False)
    report = build_report(pipeline.check(options))
    eq, bc = report["equalization"], report["bias_correction"]
    assert eq["enabled"] and bc["enabled"]
    assert eq["pairs_equalized"] >= 1 and bc["layers_corrected"] >= 1
    for section in (eq, bc):
        assert set(section["before"]) >= {"drop_pt", "int8", "output_sqnr_db"}
        assert set(section["after"]) >= {"drop_pt", "int8", "output_sqnr_db"}
    # the final figures are those of the written model: the bias-corrected one
    assert report["accuracy"]["drop_pt"] == pytest.approx(bc["after"]["drop_pt"])
    assert report["accuracy"]["float"] == pytest.approx(100 * 533 / 540, abs=0.01)  # tests/models/README.md
