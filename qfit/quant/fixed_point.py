"""Fixed-point requantization: the integer arithmetic an int8 MCU kernel runs between layers.

A layer accumulates int8 x int8 products in int32; the real factor s_in * s_w / s_out that maps the
accumulator to the output's int8 grid is stored as a 32-bit multiplier M0 in [2^30, 2^31) and a
power-of-two exponent, so that factor ~= M0 * 2^(shift - 31) (Jacob et al., CVPR 2018, section 2.2).

Two ways to apply it are in use (`ROUNDINGS`):

* "double": the paper's reference scheme, which common MCU int8 kernel libraries implement (from
  memory): a saturating rounding doubling high multiply (the high 32 bits of 2 * x * M0, rounded to
  nearest with ties towards +infinity: the reference code adds 2^30, or 1 - 2^30 for a negative
  product, and divides truncating), then a rounding right shift (ties away from zero). Two roundings;
  their errors can add up to one step.
* "single": one rounding of the exact product x * M0 * 2^(shift - 31), half away from zero, as a
  kernel with a 64-bit intermediate does.

`multiply_single_even` rounds once with ties to even, as the ONNX integer operators (QLinearConv,
QLinearMatMul) specify; it exists to check kernels against the ONNX spec's worked cases.

Every function takes numpy int64 arrays (broadcasting per-channel multipliers and shifts) and is exact:
no floating point touches an accumulator.
"""
from __future__ import annotations

import math

import numpy as np

from qfit.ops.kernels.common import storage_dtype
from qfit.quant import compiled

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


def saturating_rounding_doubling_high_mul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """High 32 bits of 2*a*b, i.e. a*b / 2^31 rounded to nearest, ties towards +infinity;
    INT32_MIN * INT32_MIN saturates to INT32_MAX.

    The reference code adds 2^30 (1 - 2^30 for a negative product) and divides truncating towards
    zero; for every product that is floor((a*b + 2^30) / 2^31), which an arithmetic shift computes."""
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    high = (a * b + (1 << 30)) >> 31  # |a|, |b| <= 2^31: the product fits int64
    return np.where((a == INT32_MIN) & (b == INT32_MIN), INT32_MAX, high)


def rounding_divide_by_pow2(x: np.ndarray, exponent: np.ndarray) -> np.ndarray:
    """x / 2^exponent rounded to nearest, ties away from zero (exponent in [0, 62]).

    floor((x + 2^(e-1) - 1 + [x >= 0]) / 2^e): a tie rounds up for x >= 0 and down for x < 0."""
    x = np.asarray(x, dtype=np.int64)
    exponent = np.asarray(exponent, dtype=np.int64)
    half = (np.int64(1) << exponent) >> 1
    nudge = np.where(exponent > 0, half - 1, 0) + (x >= 0) * (exponent > 0)
    return (x + nudge) >> exponent


def _left_and_right(shift: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    shift = np.asarray(shift, dtype=np.int64)
    return np.maximum(shift, 0), np.minimum(np.maximum(-shift, 0), 62)


def multiply_double(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """The two-step scheme: left shift (factor >= 1), doubling high multiply, rounding right shift."""
    acc = np.asarray(acc, dtype=np.int64)
    left, right = _left_and_right(shift)
    # A left shift that leaves int32 saturates here; the kernel's behaviour there is undefined in C.
    scaled = _saturate_int32(acc << left)
    return rounding_divide_by_pow2(saturating_rounding_doubling_high_mul(scaled, m0), right)


def _single_exponents(shift: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    shift = np.asarray(shift, dtype=np.int64)
    return np.clip(31 - shift, 0, 62), np.clip(shift - 31, 0, 62)


def multiply_single(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """One rounding of acc * M0 * 2^(shift - 31), half away from zero, exact in int64.

    |acc| < 2^31 and M0 < 2^31 keep the product below 2^62; a factor >= 2^31 (shift > 31) is shifted
    left after the multiply and saturated to the int32 range."""
    product = np.asarray(acc, dtype=np.int64) * np.asarray(m0, dtype=np.int64)
    right, left = _single_exponents(shift)
    rounded = rounding_divide_by_pow2(product, right)
    return np.where(left > 0, _saturate_int32(rounded << np.minimum(left, 31)), rounded)


def multiply_single_even(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray) -> np.ndarray:
    """One rounding of acc * M0 * 2^(shift - 31), ties to even (the ONNX spec's rounding)."""
    product = np.asarray(acc, dtype=np.int64) * np.asarray(m0, dtype=np.int64)
    right, left = _single_exponents(shift)
    floor = product >> right
    remainder = product - (floor << right)
    half = (np.int64(1) << right) >> 1
    up = (right > 0) & ((remainder > half) | ((remainder == half) & (floor % 2 == 1)))
    rounded = floor + up
    return np.where(left > 0, _saturate_int32(rounded << np.minimum(left, 31)), rounded)


SPEC_ROUNDING = "single-even"  # not a user option: the ONNX integer operators' rounding, for checks
_MULTIPLY = {"double": multiply_double, "single": multiply_single, SPEC_ROUNDING: multiply_single_even}


def multiply(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray, rounding: str) -> np.ndarray:
    """acc * M0 * 2^(shift - 31) in the named rounding ("double" or "single")."""
    if rounding not in _MULTIPLY:
        raise ValueError(f"unknown rounding '{rounding}' (choose from {', '.join(ROUNDINGS)})")
    return _MULTIPLY[rounding](acc, m0, shift)


def requantize(acc: np.ndarray, m0: np.ndarray, shift: np.ndarray, zero_point: int, rounding: str,
               low: int = -128, high: int = 127) -> np.ndarray:
    """Accumulator -> output integers: scale, add the output zero point, clamp to [low, high].

    An activation clamp fused into the layer (ReLU, ReLU6) narrows [low, high] to its quantized bounds,
    so the saturation and the clamp are one step, as in an int8 kernel."""
    scaled = multiply(acc, m0, shift, rounding) + np.asarray(zero_point, dtype=np.int64)
    return np.clip(scaled, low, high)


# The first constants of Requantizer._constants, in the order qfit.quant.compiled.requantize takes
# them: M0, threshold, offset, right shift, low and high (centred), zero point.
KERNEL_CONSTANTS = 7


class Requantizer:
    """`requantize` (with an optional per-channel bias added to the accumulator first) with its
    constants prepared once, for the evaluation's hot loop.

    Same integers as `requantize(acc + bias, ...)` (tests/test_integer_fixed_point.py checks it), in
    fewer passes over the data, cache-sized block by block. With x = acc * M0 and no left shift (every
    factor < 1, the usual case), nested floors give
      double:  floor((floor((x + K) / 2^31) + [x >= T]) / 2^r),  K = bias*M0 + 2^30 + (2^(r-1) - 1) 2^31,
               T = -2^30 - bias*M0 (the sign test of the doubling high multiply's result; T = +inf
               where r = 0, so no rounding term is added)
      single:  floor((x + K + [x >= T]) / 2^R),  R = 31 - shift, K = bias*M0 + 2^(R-1) - 1, T = -bias*M0
    Both are exact in int64: |acc + bias| < 2^31 and M0 < 2^31. The accumulator may be float32 or
    float64 holding exact integers (a float sum of int8 products): the multiply casts it.
    """

    BLOCK_VALUES = 1 << 16  # values per block: the int64 temporaries stay in the CPU cache

    def __init__(self, m0, shift, zero_point, rounding: str, low: int, high: int, bias=None,
                 acc_bound: int | None = None):
        if rounding not in _MULTIPLY:
            raise ValueError(f"unknown rounding '{rounding}' (choose from {', '.join(ROUNDINGS)})")
        self.m0 = np.asarray(m0, dtype=np.int64)
        self.shift = np.asarray(shift, dtype=np.int64)
        self.bias = np.zeros((), np.int64) if bias is None else np.asarray(bias, dtype=np.int64)
        self.zero_point = np.asarray(zero_point, dtype=np.int64)
        self.rounding, self.low, self.high = rounding, int(low), int(high)
        bias_m0 = self.bias * self.m0
        never = np.iinfo(np.int64).max
        if rounding == "double":
            left, right = _left_and_right(self.shift)
            self.fast = not np.any(left)
            half = np.where(right > 0, (np.int64(1) << right) >> 1, 0)
            self.offset = bias_m0 + (1 << 30) + np.where(right > 0, half - 1, 0) * (np.int64(1) << 31)
            self.threshold = np.where(right > 0, -(1 << 30) - bias_m0, never)
            self.right = right
        else:
            right, left = _single_exponents(self.shift)
            self.fast = rounding == "single" and not np.any(left) and bool(np.all(right > 0))
            self.offset = bias_m0 + ((np.int64(1) << right) >> 1) - 1
            self.threshold = -bias_m0
            self.right = right
        # clamp before adding the zero point, so adding it and narrowing to int32 is one pass
        self.low_centred = self.low - self.zero_point
        self.high_centred = self.high - self.zero_point
        self.threshold, self.offset, self.right = (np.asarray(v, np.int64) for v in
                                                   (self.threshold, self.offset, self.right))
        # Double rounding with |acc + bias| < 2^30 known: h = floor((x + K) / 2^31) fits int32 and the
        # sign test x >= T is h >= 2^(r-1) - 1 (T + K = (2^(r-1) - 1) 2^31), so the tail runs in int32.
        self.narrow = bool(rounding == "double" and self.fast and acc_bound is not None and acc_bound < (1 << 30)
                           and np.all(self.right <= 30) and max(abs(self.low), abs(self.high)) < (1 << 30))
        self.half_minus_one = np.where(self.right > 0, ((np.int64(1) << self.right) >> 1) - 1,
                                       INT32_MAX).astype(np.int32)
        self.dtype = storage_dtype(self.low, self.high)
        self._by_rank: dict[int, list[np.ndarray]] = {}
        self._per_channel: dict[tuple[int, int, int], list[np.ndarray]] = {}

    def __call__(self, acc: np.ndarray) -> np.ndarray:
        """Output integers (in `storage_dtype` of [low, high]) for an accumulator array (not modified)."""
        if not self.fast:
            exact = np.asarray(acc).astype(np.int64) + self.bias
            return requantize(exact, self.m0, self.shift, self.zero_point, self.rounding,
                              self.low, self.high).astype(self.dtype)
        acc = np.asarray(acc)
        out = np.empty(acc.shape, self.dtype)
        if acc.size == 0:
            return out
        constants = self._constants(acc.ndim)
        if acc.ndim == 0:
            return self._block(acc, out, constants)
        if compiled.can_requantize(acc, out) and self._compiled(acc, out, constants):
            return out
        # Axes after the last one along which a constant varies merge into one long axis, so numpy's
        # inner loops run over it with scalar constants; then blocks of about BLOCK_VALUES values.
        varying = [a for c in constants for a in range(acc.ndim) if c.shape[a] > 1]
        last = max(varying, default=-1)
        if last < acc.ndim - 2:
            merged = acc.shape[:last + 1] + (-1,)
            acc, out_view = acc.reshape(merged), out.reshape(merged)
            constants = [c.reshape(c.shape[:last + 1] + (1,)) for c in constants]
        else:
            out_view = out
        shape, axis, inner = acc.shape, acc.ndim - 1, 1
        while axis > 0 and inner * shape[axis] <= self.BLOCK_VALUES:
            inner *= shape[axis]
            axis -= 1
        step = max(1, self.BLOCK_VALUES // inner)
        blocks = [prefix + (slice(start, start + step),) for prefix in np.ndindex(*shape[:axis])
                  for start in range(0, shape[axis], step)]

        def run(indices):
            for index in indices:
                self._block(acc[index], out_view[index], [c[_constant_index(c, index[:-1], index[-1])]
                                                          for c in constants])

        if len(blocks) < 4:
            run(blocks)
        else:  # numpy releases the GIL inside each operation: two threads share the blocks
            list(_pool().map(run, (blocks[0::2], blocks[1::2])))
        return out

    def _compiled(self, acc: np.ndarray, out: np.ndarray, constants: list[np.ndarray]) -> bool:
        """One compiled pass (qfit.quant.compiled) over acc viewed as (outer, channels, inner), where
        the constants vary along one axis at most; False (nothing done) otherwise."""
        kernel_constants = constants[:KERNEL_CONSTANTS]
        varying = sorted({a for c in kernel_constants for a in range(acc.ndim) if c.shape[a] > 1})
        if len(varying) > 1:
            return False
        axis = varying[0] if varying else acc.ndim - 1
        channels = acc.shape[axis] if varying else 1
        view = (int(np.prod(acc.shape[:axis], dtype=np.int64)), channels, -1)
        acc3 = np.ascontiguousarray(acc).reshape(view)
        out3 = out.reshape(view)
        key = (acc.ndim, axis, channels)
        per_channel = self._per_channel.get(key)
        if per_channel is None:
            per_channel = self._per_channel[key] = [
                np.ascontiguousarray(np.broadcast_to(c.reshape(-1), (channels,)), dtype=np.int64)
                for c in kernel_constants]
        # one thread: split over the requantizer's two threads, the demo's integer path took 1.36x
        # as long (onnxruntime's own threads run the next layer's sums on those cores)
        compiled.requantize(acc3, out3, *per_channel, double=self.rounding == "double")
        return True

    def _constants(self, ndim: int) -> list[np.ndarray]:
        """The per-channel constants with `ndim` axes (leading ones), cached per rank."""
        if ndim not in self._by_rank:
            self._by_rank[ndim] = [c.reshape((1,) * (ndim - c.ndim) + c.shape) if c.ndim <= ndim else c
                                   for c in (self.m0, self.threshold, self.offset, self.right,
                                             self.low_centred, self.high_centred, self.zero_point,
                                             self.half_minus_one, self.right.astype(np.int32))]
        return self._by_rank[ndim]

    def _block(self, acc: np.ndarray, out: np.ndarray, constants: list[np.ndarray]) -> np.ndarray:
        m0, threshold, offset, right, low, high, zero_point, half_minus_one, right32 = constants
        x = np.multiply(acc, m0, dtype=np.int64, casting="unsafe")
        if self.narrow:
            x += offset
            x >>= 31
            h = x.astype(np.int32)
            h += h >= half_minus_one
            h >>= right32
            np.clip(h, low, high, out=h)
            np.add(h, zero_point, out=out, casting="unsafe")
            return out
        rounds_up = x >= threshold
        x += offset
        if self.rounding == "double":
            x >>= 31
        x += rounds_up
        x >>= right
        np.clip(x, low, high, out=x)
        np.add(x, zero_point, out=out, casting="unsafe")
        return out


_POOL: list = []


def _pool():
    """A two-thread pool for the requantizer's blocks, started on first use."""
    if not _POOL:
        from concurrent.futures import ThreadPoolExecutor
        _POOL.append(ThreadPoolExecutor(max_workers=2, thread_name_prefix="qfit-requantize"))
    return _POOL[0]


def _constant_index(constant: np.ndarray, prefix: tuple, block: slice) -> tuple:
    """The slice of a broadcast constant that lines up with the block acc[prefix + (block,)]."""
    axis = len(prefix)
    head = tuple(i if constant.shape[a] > 1 else 0 for a, i in enumerate(prefix))
    return head + ((block if constant.shape[axis] > 1 else slice(None)),)
