"""Quantization arithmetic checked against the ONNX operator spec, rounding theory and exact integers."""
import itertools

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

from qfit.graph.load import prepare_model
from qfit.quant.observe import TensorStats
from qfit.quant.plan import PlanOptions, make_plan
from qfit.quant.quantize import activation_params, build_qdq, calibrated_ranges, quantize_bias, quantize_weight
from qfit.runtime.sessions import Runner


def _single_conv_model(cin=3, cout=8, size=16, k=3, seed=0, relu=False):
    rng = np.random.default_rng(seed)
    w = rng.normal(0, 0.1, (cout, cin, k, k)).astype(np.float32)
    b = rng.normal(0, 0.1, cout).astype(np.float32)
    nodes = [helper.make_node("Conv", ["x", "w", "b"], ["y" if not relu else "c"], pads=[k // 2] * 4)]
    if relu:
        nodes.append(helper.make_node("Relu", ["c"], ["y"]))
    graph = helper.make_graph(nodes, "conv", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, cin, size, size])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, cout, size, size])],
                              [numpy_helper.from_array(w, "w"), numpy_helper.from_array(b, "b")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 9
    return model


def _calibrated(model, samples, method="minmax"):
    loaded = prepare_model(model)
    plan = make_plan(loaded, PlanOptions())
    runner = Runner(loaded.model, plan.calibrated_tensors())
    stats = {t: TensorStats(t) for t in plan.calibrated_tensors()}
    for x in samples:
        values = runner({"x": x})
        for t in stats:
            stats[t].update(values[t])
    ranges = calibrated_ranges(plan, stats, method, 99.99)
    return loaded, plan, build_qdq(loaded, plan, ranges)


def _reference_quantize(x, scale, zero_point, dtype):
    """QuantizeLinear as the ONNX spec's reference evaluator computes it."""
    zp_type = helper.np_dtype_to_tensor_dtype(np.dtype(dtype))
    graph = helper.make_graph(
        [helper.make_node("QuantizeLinear", ["x", "s", "z"], ["q"])], "q",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(x.shape))],
        [helper.make_tensor_value_info("q", zp_type, list(x.shape))],
        [numpy_helper.from_array(np.array(scale, np.float32), "s"),
         numpy_helper.from_array(np.array(zero_point, dtype), "z")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)])
    return ReferenceEvaluator(model).run(None, {"x": x})[0]


def test_weight_quantization_matches_onnx_reference_quantizelinear_including_ties():
    # ONNX operator spec (QuantizeLinear): round half to even, saturate to the integer range.
    rng = np.random.default_rng(1)
    w = rng.normal(0, 1, (64,)).astype(np.float32)
    amax = np.abs(w).max()
    scale = np.float32(amax / 127)
    # exact ties at k + 0.5 steps exercise round-half-to-even
    w[:8] = (np.arange(8) + 0.5).astype(np.float32) * scale
    q, s = quantize_weight(w, axis=None)
    assert float(s) == pytest.approx(float(scale))
    ref = _reference_quantize(w, s, 0, np.int8)
    np.testing.assert_array_equal(q, ref)


@pytest.mark.parametrize("bits,dtype", [(8, np.int8), (16, np.int16)])
def test_activation_quantizer_in_the_written_model_matches_onnx_reference(bits, dtype):
    # ONNX operator spec via onnx.reference: the QDQ pair written by qfit, run by the reference
    # evaluator, equals q = saturate(round_half_even(x / s) + z) then (q - z) * s.
    rng = np.random.default_rng(2)
    x = rng.normal(0.5, 2.0, (1, 3, 8, 8)).astype(np.float32)
    scale, zp = activation_params(-1.5, 4.0, bits)  # part of x saturates on both sides
    q = _reference_quantize(x, scale, zp, dtype)
    lo, hi = np.iinfo(dtype).min, np.iinfo(dtype).max
    expected = np.clip(np.round(x / np.float32(scale)) + zp, lo, hi)
    np.testing.assert_array_equal(q.astype(np.int64), expected.astype(np.int64))


def test_qdq_model_runs_the_same_in_onnxruntime_and_onnx_reference():
    # ONNX operator spec via onnx.reference: the whole written graph, per-channel DQ and int32 bias included.
    rng = np.random.default_rng(3)
    model = _single_conv_model(relu=True)
    samples = [rng.normal(0, 1, (1, 3, 16, 16)).astype(np.float32) for _ in range(4)]
    _, _, qm = _calibrated(model, samples)
    onnx.checker.check_model(qm.model, full_check=True)
    x = samples[0]
    ours = Runner(qm.model, ["y"], faithful=True)({"x": x})["y"]
    ref = ReferenceEvaluator(qm.model).run(None, {"x": x})[0]
    step = qm.activations["y"].scale
    assert np.max(np.abs(ours - ref)) <= step * 1.0001


def test_per_channel_weight_error_is_at_most_half_a_step():
    # Definition of rounding to the nearest level: |w - q*s| <= s/2 inside the clipping range.
    rng = np.random.default_rng(4)
    w = rng.normal(0, 1, (16, 8, 3, 3)).astype(np.float32) * rng.uniform(0.01, 5, (16, 1, 1, 1)).astype(np.float32)
    w[3] = 0.0  # an all-zero channel must not divide by zero
    q, s = quantize_weight(w, axis=0)
    assert np.all(np.isfinite(s)) and s[3] == 1.0 and np.all(q[3] == 0)
    err = np.abs(w - q.astype(np.float32) * s[:, None, None, None])
    assert np.all(err <= s[:, None, None, None] / 2 * (1 + 1e-6))


def test_per_channel_ranges_equal_channel_max_abs_within_one_step():
    # Definition of symmetric per-channel quantization: 127 * s_c = max |W_c|.
    rng = np.random.default_rng(5)
    w = rng.normal(0, 1, (10, 20)).astype(np.float32)
    q, s = quantize_weight(w, axis=1)  # Gemm B (K, N): channels along axis 1
    recovered = np.abs(q.astype(np.float32) * s[None, :]).max(axis=0)
    assert np.all(np.abs(recovered - np.abs(w).max(axis=0)) <= s)


def test_sqnr_of_8bit_uniform_quantization_of_uniform_data_is_6_02_times_8_db():
    # Bennett 1948; Widrow & Kollar, "Quantization Noise", 2008: SQNR = 6.02 N dB for a full-scale
    # uniform input and an N-bit uniform quantizer (noise power s^2/12, signal power (2^N s)^2/12).
    rng = np.random.default_rng(6)
    x = rng.uniform(-1, 1, 1_000_000).astype(np.float32)
    stats = TensorStats("x")
    stats.update(x)
    scale, zp = activation_params(stats.min, stats.max, 8)
    xq = (np.clip(np.round(x / scale) + zp, -128, 127) - zp) * scale
    sqnr = 10 * np.log10(np.sum(x.astype(np.float64) ** 2) / np.sum((x - xq).astype(np.float64) ** 2))
    assert abs(sqnr - 6.02 * 8) <= 0.5


def test_bias_is_int32_with_scale_input_times_weight_scale():
    # Jacob et al., CVPR 2018, section 2.4: bias scale = input scale * weight scale, zero point 0.
    b = np.array([0.5, -0.25, 1e9], np.float32)
    q, s = quantize_bias(b, 0.02, np.array([0.01, 0.02, 0.03], np.float32))
    np.testing.assert_allclose(s, [0.0002, 0.0004, 0.0006], rtol=1e-6)
    assert q.dtype == np.int32 and q[0] == 2500 and q[1] == -625
    assert q[2] == 2 ** 31 - 1  # saturates instead of wrapping


def test_degenerate_ranges_give_finite_parameters():
    for lo, hi in [(0.0, 0.0), (3.0, 3.0), (-2.0, -2.0)]:
        scale, zp = activation_params(lo, hi)
        assert np.isfinite(scale) and scale > 0 and -128 <= zp <= 127


def _exact_integer_conv(x, qm, loaded):
    """int8 x int8 products summed in int64 (as an int32 MCU kernel does), bias added, requantized."""
    xp = qm.activations["x"]
    yp = qm.activations["y"]
    node = loaded.graph.node[0]
    w_scale = qm.weight_scales[(node.name, 1)]
    w = loaded.constants[node.input[1]]
    qw = np.clip(np.round(w / w_scale[:, None, None, None]), -127, 127).astype(np.int64)
    qb = np.round(loaded.constants[node.input[2]] / (np.float32(xp.scale) * w_scale)).astype(np.int64)
    qx = np.clip(np.round(x / np.float32(xp.scale)) + xp.zero_point, -128, 127).astype(np.int64) - xp.zero_point
    k = qw.shape[2]
    pad = k // 2
    qx = np.pad(qx, ((0, 0), (0, 0), (pad, pad), (pad, pad)))
    h, wd = x.shape[2], x.shape[3]
    acc = np.zeros((1, qw.shape[0], h, wd), np.int64)
    for i, j in itertools.product(range(k), range(k)):
        acc += np.einsum("nchw,oc->nohw", qx[:, :, i:i + h, j:j + wd], qw[:, :, i, j])
    assert np.abs(acc).max() < 2 ** 31  # the sum fits an int32 accumulator
    acc += qb[None, :, None, None]
    real = acc * (np.float64(xp.scale) * w_scale.astype(np.float64))[None, :, None, None]
    return np.clip(np.round(real / yp.scale) + yp.zero_point, -128, 127).astype(np.int64)


def test_faithful_path_matches_exact_int32_accumulation_for_a_conv():
    # Exact integer computation (int8 x int8 summed in int32, then requantized), the arithmetic of
    # MCU kernels (common practice): the faithful path must agree within 1 step on >= 99.9 %.
    rng = np.random.default_rng(7)
    model = _single_conv_model(cin=16, cout=16, size=16, k=3)
    samples = [rng.normal(0, 1, (1, 16, 16, 16)).astype(np.float32) for _ in range(4)]
    loaded, _, qm = _calibrated(model, samples)
    x = samples[1]
    got = Runner(qm.model, ["y"], faithful=True)({"x": x})["y"]
    yp = qm.activations["y"]
    got_steps = np.round(got / yp.scale).astype(np.int64) + yp.zero_point
    exact = _exact_integer_conv(x, qm, loaded)
    off = np.abs(got_steps - exact)
    assert np.mean(off <= 1) >= 0.999
    assert off.max() <= 1
