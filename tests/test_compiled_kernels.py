"""qfit.quant.compiled (C99 kernels built with the machine's compiler) against qfit's numpy code and
exact arithmetic. The requantizer's integers are checked against fractions in
tests/test_integer_fixed_point.py, on both codes; here: the choice between them, the error sums, the
load-time check, and that a whole evaluation gives the same figures either way."""
from __future__ import annotations

import numpy as np
import pytest

from qfit.measure.compare import ErrorSums
from qfit.quant import compiled, fixed_point as fp

pytestmark = pytest.mark.skipif(not compiled.available(), reason="no C compiler built qfit's kernels here")


def _numpy_only(monkeypatch):
    monkeypatch.setattr(compiled, "_LIBRARY", [None])


@pytest.mark.parametrize("rounding", ["double", "single"])
@pytest.mark.parametrize("acc_type", [np.float32, np.int64])
@pytest.mark.parametrize("low, high, zero", [(-128, 127, -3), (0, 255, 7), (-32768, 32767, 0), (0, 65535, 12),
                                             (-(1 << 20), 1 << 20, 0)])
def test_compiled_and_numpy_requantizers_give_the_same_integers(monkeypatch, rounding, acc_type, low, high, zero):
    rng = np.random.default_rng(3)
    reals = np.exp2(rng.uniform(-24, -0.2, 5))
    m0, shift = fp.quantize_multipliers(reals)
    for shape, axis in (((2, 5, 7, 9), 1), ((6, 5), 1), ((5, 33), 0), ((4, 3, 5), 2)):
        per_channel = [1] * len(shape)
        per_channel[axis] = 5
        bias = rng.integers(-(1 << 12), 1 << 12, per_channel)
        acc = rng.integers(-(1 << 23), 1 << 23, shape).astype(acc_type)
        make = lambda: fp.Requantizer(m0.reshape(per_channel), shift.reshape(per_channel), zero, rounding, low, high,
                                      bias=bias)
        got = make()(acc)
        with monkeypatch.context() as m:
            _numpy_only(m)
            want = make()(acc)
        assert got.dtype == want.dtype and np.array_equal(got, want), (shape, axis)


def test_error_sums_compiled_match_numpy_and_exact_float64_sums(monkeypatch):
    rng = np.random.default_rng(4)
    x = rng.normal(0, 3, 100_003).astype(np.float32)    # not a multiple of the kernel's four lanes
    y = (x + rng.normal(0, 0.05, x.size)).astype(np.float32)
    got = ErrorSums()
    got.update(x, y)
    _numpy_only(monkeypatch)
    numpy_path = ErrorSums()
    numpy_path.update(x, y)
    a, e = x.astype(np.float64), x.astype(np.float64) - y.astype(np.float64)
    exact = {"signal": math_fsum(a * a), "noise": math_fsum(e * e), "abs_error": math_fsum(np.abs(e))}
    for key, value in exact.items():   # math.fsum: correctly rounded sums (Shewchuk's algorithm)
        assert getattr(got, key) == pytest.approx(value, rel=1e-12)
        assert getattr(numpy_path, key) == pytest.approx(value, rel=1e-5)
    assert got.max_abs_error == float(np.abs(e).max()) and (got.lo, got.hi) == (float(x.min()), float(x.max()))
    assert got.to_dict() == numpy_path.to_dict()


def math_fsum(values: np.ndarray) -> float:
    import math
    return math.fsum(values.tolist())


def test_a_library_that_shifts_negative_values_wrongly_is_refused():
    class Wrong:   # stands for a build whose >> is a logical shift: every value comes out changed
        @staticmethod
        def qfit_requantize_int64_int32(acc, out, outer, channels, inner, *rest):
            pass   # leaves the zeros

    assert compiled._self_check(compiled._LIBRARY[0]) is True
    assert compiled._self_check(Wrong()) is False


def test_the_numpy_code_is_kept_when_asked(monkeypatch):
    monkeypatch.setattr(compiled, "_LIBRARY", [])
    monkeypatch.setenv("QFIT_NO_COMPILED", "1")
    assert compiled.available() is False


def _batches(rng):
    relu = np.maximum(rng.normal(0, 2, (4, 8, 30, 30)), 0).astype(np.float32)   # a zero spike
    edges = np.array([-4.0, 4.0, 2.0, -2.0, 0.0, 3.9999998, -1e-39, 1e-39], np.float32)   # on bin edges, denormals
    wide = (rng.standard_cauchy(50_000) * 10).astype(np.float32)                  # doubles the range often
    bad = rng.normal(0, 1, 1000).astype(np.float32)
    bad[[3, 500]] = [np.nan, np.inf]
    return [relu, edges, wide, bad, rng.normal(0, 1e-3, 777).astype(np.float32)]


@pytest.mark.parametrize("histogram", [True, False])
def test_range_statistics_compiled_match_numpy_exactly(monkeypatch, histogram):
    from qfit.quant.observe import TensorStats
    rng = np.random.default_rng(6)
    batches = _batches(rng)
    got = TensorStats("t", histogram=histogram)
    for batch in batches:
        got.update(batch)
    _numpy_only(monkeypatch)
    want = TensorStats("t", histogram=histogram)
    for batch in batches:
        want.update(batch)
    assert np.array_equal(got.hist, want.hist)
    assert (got.min, got.max, got.count, got.nonfinite, got.zeros, got.radius) == \
           (want.min, want.max, want.count, want.nonfinite, want.zeros, want.radius)
    assert got.nonfinite == 2 and got.count == sum(b.size for b in batches) - 2


def test_a_whole_check_on_the_digits_model_gives_the_same_figures_with_and_without_the_kernels(tmp_path,
                                                                                              monkeypatch):
    # scikit-learn's bundled digits set (held-out split) through the committed digits CNN: calibration
    # (histograms), the integer-path evaluation and the per-layer error sums run once on the C kernels
    # and once on the numpy code; the int8 model and every reported figure must be the same.
    from digits_folders import INPUT_SHAPES, MODEL, write_folders
    from through_qfit import check_with_report
    from qfit import check as pipeline

    calib, evaluation = write_folders(tmp_path / "digits")

    def run(out):
        options = pipeline.CheckOptions(model_path=str(MODEL), calib_dir=calib, eval_dir=evaluation,
                                        out_dir=str(tmp_path / out), flash_limit_bytes=1 << 20,
                                        sram_limit_bytes=256 << 10, input_shapes=INPUT_SHAPES, progress=False,
                                        isolated_samples=0)
        reported = check_with_report(options)
        return reported.result.quantized.model.SerializeToString(), reported.report

    with_kernels = run("compiled")
    _numpy_only(monkeypatch)
    without = run("numpy")
    assert with_kernels[0] == without[0]
    assert with_kernels[1]["accuracy"] == without[1]["accuracy"]
    assert with_kernels[1]["layers"] == without[1]["layers"]
    assert with_kernels[1]["accuracy"]["int8"] >= 95.0   # the digits CNN stays accurate in int8 (float 98.70 %)
