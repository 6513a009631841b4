"""Fixed-point requantization: the integer arithmetic an int8 MCU kernel runs between layers.

A layer accumulates int8 x int8 products in int32; the real factor s_in * s_w / s_out that maps the
accumulator to the output's int8 grid is stored as a 32-bit multiplier M0 in [2^30, 2^31) and a
power-of-two exponent, so that factor ~= M0 * 2^(shift - 31) (Jacob et al., CVPR 2018, section 2.2).

Two ways to apply it are in use (`ROUNDINGS`):

* "double": the paper's reference scheme, which common MCU int8 kernel libraries implement (from
  memory): a saturating rounding doubling high multiply (the high 32 bits of 2 * x * M0, rounded half
  away from zero), then a rounding right shift (ties away from zero). Two roundings; their errors
  can add up to one step, always away from zero at the tie.
* "single": one rounding of the exact product x * M0 * 2^(shift - 31), half away from zero, as a
  kernel with a 64-bit intermediate does.

Every function takes numpy int64 arrays (broadcasting per-channel multipliers and shifts) and is exact:
no floating point touches an accumulator.
"""
from __future__ import annotations

import math

import numpy as np

ROUNDINGS = ("double", "single")
INT32_MIN, INT32_MAX = -(1 << 31), (1 << 31) - 1


def quantize_multiplier(real: float) -> tuple[int, int]:
    """(M0, shift) with real ~= M0 * 2^(shift - 31), M0 in [2^30, 2^31); (0, 0) for 0.

    frexp gives real = q * 2^shift with q in [0.5, 1); M0 = round(q * 2^31), half away from zero; a
    q that rounds up to 2^31 moves one power of two into the shift. Factors below 2^-31 cannot be
    represented in this format (M0 would need a shift past the accumulator's width) and become 0.
    """
    if not math.isfinite(real) or real < 0:
        raise ValueError(f"requantization factor must be finite and >= 0, got {real}")
    if real == 0.0:
        return 0, 0
    q, shift = math.frexp(real)
    m0 = int(math.floor(q * (1 << 31) + 0.5))
    if m0 == 1 << 31:
        m0 //= 2
        shift += 1
    if shift < -31:
        return 0, 0
    return m0, shift


def quantize_multipliers(reals) -> tuple[np.ndarray, np.ndarray]:
    """Per-channel `quantize_multiplier`: int64 arrays of M0 and shift."""
    pairs = [quantize_multiplier(float(r)) for r in np.asarray(reals, dtype=np.float64).ravel()]
    m0 = np.array([p[0] for p in pairs], dtype=np.int64).reshape(np.shape(reals))
    shift = np.array([p[1] for p in pairs], dtype=np.int64).reshape(np.shape(reals))
    return m0, shift


def _saturate_int32(x: np.ndarray) -> np.ndarray:
    return np.clip(x, INT32_MIN, INT32_MAX)


def _truncating_div_pow2(x: np.ndarray, bits: int) -> np.ndarray:
    """x / 2^bits rounded toward zero, as C's integer division does."""
    return np.where(x >= 0, x >> bits, -((-x) >> bits))


def saturating_rounding_doubling_high_mul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """High 32 bits of 2*a*b, rounded half away from zero; INT32_MIN * INT32_MIN saturates to INT32_MAX."""
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    product = a * b  # |a|, |b| <= 2^31: the product fits int64
    nudge = np.where(product >= 0, 1 << 30, 1 - (1 << 30))
    high = _truncating_div_pow2(product + nudge, 31)
    return np.where((a == INT32_MIN) & (b == INT32_MIN), INT32_MAX, high)


def rounding_divide_by_pow2(x: np.ndarray, exponent: np.ndarray) -> np.ndarray:
    """x / 2^exponent rounded to nearest, ties away from zero (exponent in [0, 31])."""
    x = np.asarray(x, dtype=np.int64)
    exponent = np.asarray(exponent, dtype=np.int64)
    mask = (np.int64(1) << exponent) - 1
    remainder = x & mask
    threshold = (mask >> 1) + (x < 0)
    return (x >> exponent) + (remainder > threshold)


def multiply_double(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """The two-step scheme: left shift (factor >= 1), doubling high multiply, rounding right shift."""
    acc = np.asarray(acc, dtype=np.int64)
    shift = np.asarray(shift, dtype=np.int64)
    left = np.maximum(shift, 0)
    right = np.maximum(-shift, 0)
    # A left shift that leaves int32 saturates here; the kernel's behaviour there is undefined in C.
    scaled = _saturate_int32(acc << left)
    return rounding_divide_by_pow2(saturating_rounding_doubling_high_mul(scaled, m0), np.minimum(right, 62))


def multiply_single(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """One rounding of acc * M0 * 2^(shift - 31), half away from zero, exact in int64.

    |acc| < 2^31 and M0 < 2^31 keep the product below 2^62; a factor >= 2^31 (shift > 31) is shifted
    left after the multiply and saturated to the int32 range."""
    acc = np.asarray(acc, dtype=np.int64)
    m0 = np.asarray(m0, dtype=np.int64)
    shift = np.asarray(shift, dtype=np.int64)
    product = acc * m0
    right = np.clip(31 - shift, 0, 62)
    left = np.clip(shift - 31, 0, 62)
    half = np.where(right > 0, np.int64(1) << np.maximum(right - 1, 0), 0)
    magnitude = (np.abs(product) + half) >> right
    rounded = np.where(product < 0, -magnitude, magnitude)
    return np.where(left > 0, _saturate_int32(rounded << np.minimum(left, 31)), rounded)


def multiply(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray, rounding: str) -> np.ndarray:
    """acc * M0 * 2^(shift - 31) in the named rounding ("double" or "single")."""
    if rounding == "double":
        return multiply_double(acc, m0, shift)
    if rounding == "single":
        return multiply_single(acc, m0, shift)
    raise ValueError(f"unknown rounding '{rounding}' (choose from {', '.join(ROUNDINGS)})")


def requantize(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray, zero_point: int, rounding: str,
               low: int = -128, high: int = 127) -> np.ndarray:
    """Accumulator -> output integers: scale, add the output zero point, clamp to [low, high].

    An activation clamp fused into the layer (ReLU, ReLU6) narrows [low, high] to its quantized bounds,
    so the saturation and the clamp are one step, as in an int8 kernel."""
    scaled = multiply(acc, m0, shift, rounding) + np.int64(zero_point)
    return np.clip(scaled, low, high)
