"""Fixed-point requantization (qfit.quant.fixed_point) against exact rational arithmetic.

Source: Jacob et al., CVPR 2018, section 2.2 (a real factor M = 2^-n M0 with M0 in [0.5, 1) held as a
32-bit integer) and the reference code the paper describes (a saturating rounding doubling high
multiply, then a rounding right shift). Every expected value is computed with Python's `fractions`:
  doubling high multiply  floor(a*b / 2^31 + 1/2)      (the reference adds 2^30, or 1 - 2^30 for a
                                                        negative product, and truncates: ties go up)
                          except a = b = INT32_MIN -> INT32_MAX (the saturating corner case)
  rounding right shift    x / 2^e rounded to nearest, ties away from zero
  single rounding         acc * M0 * 2^(shift-31) rounded once, ties away from zero
"""
from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from qfit.quant import compiled, fixed_point as fp

INT32_MIN, INT32_MAX = -(1 << 31), (1 << 31) - 1


@pytest.fixture(autouse=True, params=["compiled", "numpy"])
def requantizer_code(request, monkeypatch):
    """Every check runs on the C kernels (qfit.quant.compiled, where a C compiler built them) and on
    the numpy blocks."""
    if request.param == "compiled":
        if not compiled.available():
            pytest.skip("no C compiler built qfit's kernels here")
    else:
        monkeypatch.setattr(compiled, "_LIBRARY", [None])
    return request.param


def round_half_away(q: Fraction) -> int:
    magnitude = math.floor(abs(q) + Fraction(1, 2))
    return magnitude if q >= 0 else -magnitude


def round_half_up(q: Fraction) -> int:
    return math.floor(q + Fraction(1, 2))


def round_half_even(q: Fraction) -> int:
    return round(q)  # Fraction.__round__ rounds ties to even


def exact_double(acc: int, m0: int, shift: int) -> int:
    left, right = max(shift, 0), max(-shift, 0)
    scaled = max(INT32_MIN, min(INT32_MAX, acc << left))
    if scaled == INT32_MIN and m0 == INT32_MIN:
        high = INT32_MAX
    else:
        high = round_half_up(Fraction(scaled * m0, 1 << 31))
    return round_half_away(Fraction(high, 1 << right))


def exact_single(acc: int, m0: int, shift: int) -> int:
    return round_half_away(Fraction(acc * m0) * Fraction(2) ** (shift - 31))


def random_cases(seed: int, count: int):
    rng = np.random.default_rng(seed)
    accs = np.concatenate([rng.integers(INT32_MIN, INT32_MAX, count // 2, endpoint=True),
                           rng.integers(-5000, 5000, count // 2)])
    # real factors from 2^-40 (below the representable range: M0 = 0) up to 300 (left shifts)
    reals = np.exp2(rng.uniform(-40, 8.3, count))
    return accs, reals


def test_quantize_multiplier_represents_the_factor_to_31_bits():
    # Source: Jacob 2018, eq. (6): M = 2^-n M0, M0 in [0.5, 1); here M0 is held as round(M0 * 2^31).
    for real in [1e-6, 0.000123, 0.3, 0.5, 0.75, 0.999999999, 1.0, 1.5, 3.0, 255.0, 2.0 ** 20]:
        m0, shift = fp.quantize_multiplier(real)
        assert (1 << 30) <= m0 < (1 << 31)
        represented = Fraction(m0) * Fraction(2) ** (shift - 31)
        assert abs(represented - Fraction(real)) <= Fraction(2) ** (shift - 32)  # half a unit of M0
    assert fp.quantize_multiplier(0.0) == (0, 0)
    assert fp.quantize_multiplier(2.0 ** -40) == (0, 0)   # below 2^-31: not representable


def test_doubling_high_multiply_matches_fractions_including_the_saturating_corner():
    rng = np.random.default_rng(3)
    a = np.concatenate([rng.integers(INT32_MIN, INT32_MAX, 3000, endpoint=True), [INT32_MIN, INT32_MIN, INT32_MAX,
                                                                                 -(1 << 30), 1 << 30, -1, 1]])
    b = np.concatenate([rng.integers(INT32_MIN, INT32_MAX, 3000, endpoint=True), [INT32_MIN, INT32_MAX, INT32_MIN,
                                                                                 1, 1, 1 << 30, 1 << 30]])
    got = fp.saturating_rounding_doubling_high_mul(a, b)
    for x, y, g in zip(a.tolist(), b.tolist(), got.tolist()):
        want = INT32_MAX if x == y == INT32_MIN else round_half_up(Fraction(x * y, 1 << 31))
        assert g == want, (x, y)
    # the corner: INT32_MIN * INT32_MIN = 2^62 would give 2^31, one past INT32_MAX
    assert int(fp.saturating_rounding_doubling_high_mul(np.int64(INT32_MIN), np.int64(INT32_MIN))) == INT32_MAX
    # ties: +0.5 goes up to 1, -0.5 goes up to 0 (the reference's nudge 1 - 2^30 for negatives)
    assert int(fp.saturating_rounding_doubling_high_mul(np.int64(1 << 30), np.int64(1))) == 1
    assert int(fp.saturating_rounding_doubling_high_mul(np.int64(-(1 << 30)), np.int64(1))) == 0


def test_rounding_divide_by_power_of_two_rounds_ties_away_from_zero():
    values = np.arange(-70, 71)
    for exponent in range(0, 6):
        got = fp.rounding_divide_by_pow2(values, np.int64(exponent))
        want = [round_half_away(Fraction(v, 1 << exponent)) for v in values.tolist()]
        assert got.tolist() == want


@pytest.mark.parametrize("rounding,exact", [("double", exact_double), ("single", exact_single)])
def test_multiply_matches_fractions_on_random_accumulators_and_multipliers(rounding, exact):
    accs, reals = random_cases(seed=11, count=2000)
    for acc, real in zip(accs.tolist(), reals.tolist()):
        m0, shift = fp.quantize_multiplier(real)
        got = int(fp.multiply(np.int64(acc), np.int64(m0), np.int64(shift), rounding))
        want = exact(acc, m0, shift)
        if rounding == "single" and shift > 31:
            want = max(INT32_MIN, min(INT32_MAX, want))
        assert got == want, (acc, real, m0, shift)


def test_multipliers_of_one_and_above_take_the_left_shift():
    # Source: Jacob 2018's reference code shifts left for a factor >= 1 before the doubling multiply.
    for real in (1.0, 1.75, 6.0, 100.0):
        m0, shift = fp.quantize_multiplier(real)
        assert shift >= 1
        for acc in (-1000, -3, 0, 7, 999, 1 << 20):
            assert int(fp.multiply_double(np.int64(acc), m0, shift)) == exact_double(acc, m0, shift)
            assert int(fp.multiply_single(np.int64(acc), m0, shift)) == exact_single(acc, m0, shift)
    # a left shift out of int32 saturates (to INT32_MAX, then x M0 = 1/2) instead of wrapping negative
    m0, shift = fp.quantize_multiplier(4.0)
    assert int(fp.multiply_double(np.int64(1 << 30), m0, shift)) == exact_double(1 << 30, m0, shift) == 1 << 30


def test_double_and_single_differ_by_at_most_one_and_only_at_the_double_roundings_ties():
    # Source: the two roundings of the scheme can compound; the difference is bounded by one step.
    rng = np.random.default_rng(5)
    acc = rng.integers(-(1 << 24), 1 << 24, 200_000)
    for real in (0.0123, 0.00071, 0.31):
        m0, shift = fp.quantize_multiplier(real)
        double = fp.multiply_double(acc, m0, shift)
        single = fp.multiply_single(acc, m0, shift)
        assert np.abs(double - single).max() <= 1
        assert np.any(double != single)


def test_single_rounding_with_ties_to_even_matches_fractions():
    # Source: the ONNX spec's QuantizeLinear rounds half to even; `multiply_single_even` is its fixed point.
    m0, shift = 1 << 30, -1     # factor 1/4: acc = 2, 6, -2 land on exact ties
    for acc in range(-20, 21):
        got = int(fp.multiply_single_even(np.int64(acc), m0, shift))
        assert got == round_half_even(Fraction(acc * m0) * Fraction(2) ** (shift - 31)), acc


@pytest.mark.parametrize("rounding", ["double", "single"])
def test_prepared_requantizer_equals_requantize_with_bias_and_per_channel_constants(rounding):
    # The blocked fast path must give the same integers as the plain definition above.
    rng = np.random.default_rng(8)
    reals = np.exp2(rng.uniform(-20, 0.9, 6))   # includes factors >= 1 (the general path)
    m0, shift = fp.quantize_multipliers(reals)
    shape = (1, 6, 1, 1)
    acc = rng.integers(-(1 << 22), 1 << 22, (3, 6, 40, 50))
    bias = rng.integers(-(1 << 20), 1 << 20, shape)
    want = fp.requantize(acc + bias, m0.reshape(shape), shift.reshape(shape), -7, rounding, -128, 100)
    fast = fp.Requantizer(m0.reshape(shape), shift.reshape(shape), -7, rounding, -128, 100, bias=bias)
    assert np.array_equal(fast(acc), want)
    assert np.array_equal(fast(acc.astype(np.float64)), want)   # exact integers held in floats
    small = fp.Requantizer(m0[:1], shift[:1], 3, rounding, -128, 127)   # a per-tensor factor < 1
    acc1 = rng.integers(-(1 << 30), 1 << 30, 10_000)
    assert np.array_equal(small(acc1), fp.requantize(acc1, m0[:1], shift[:1], 3, rounding))


def test_prepared_double_rounding_with_a_known_accumulator_bound_takes_the_int32_tail_and_agrees():
    # |acc + bias| < 2^30 lets the tail run in int32; it must give the plain definition's integers,
    # ties included (factors 2^-k M0 with M0 = 2^30 put many products exactly on the ties).
    rng = np.random.default_rng(12)
    for m0 in (1 << 30, (1 << 30) + 1, (1 << 31) - 1, 3 << 29):
        for shift in range(-30, 1):
            acc = np.arange(-6000, 6000)
            fast = fp.Requantizer(m0, shift, 0, "double", -(1 << 20), 1 << 20, bias=np.int64(7), acc_bound=6100)
            assert fast.narrow
            assert np.array_equal(fast(acc), fp.requantize(acc + 7, m0, shift, 0, "double", -(1 << 20), 1 << 20))
    reals = np.exp2(rng.uniform(-31, -0.1, 5))
    m0s, shifts = fp.quantize_multipliers(reals)
    shape = (1, 5, 1, 1)
    acc = rng.integers(-(1 << 29), 1 << 29, (2, 5, 6, 7))
    bias = rng.integers(-(1 << 20), 1 << 20, shape)
    fast = fp.Requantizer(m0s.reshape(shape), shifts.reshape(shape), 3, "double", -128, 127, bias=bias,
                          acc_bound=(1 << 29) + (1 << 20))
    assert fast.narrow
    assert np.array_equal(fast(acc), fp.requantize(acc + bias, m0s.reshape(shape), shifts.reshape(shape), 3,
                                                   "double", -128, 127))
