"""compiled: two hot loops of the evaluation in C99, built with the machine's C compiler on first use.

* requantize: qfit.quant.fixed_point.Requantizer's fast path in one pass per value,
      x = acc * M0;  up = [x >= T];  x = x + K;  (double: x = floor(x / 2^31));  x = floor((x + up) / 2^r)
      y = clamp(x, low - z, high - z) + z
  the same int64 arithmetic as its numpy blocks (nine passes over int64 temporaries there).
* error_sums: qfit.measure.compare.ErrorSums' sums of one tensor in one pass, in float64.
* min_max, histogram: qfit.quant.observe.TensorStats' range and bins of one batch, in float32 as numpy
  computes them (the same bins).

The source below is compiled once per machine (`cc -O2 -std=c99 -ffp-contract=off -shared -fPIC`, or $CC;
no fused multiply-add, so float32 arithmetic rounds as numpy's does) into a
private cache folder ($XDG_CACHE_HOME/qfit or ~/.cache/qfit, named by the source's hash) and loaded
with ctypes, which releases the GIL during each call. Where no compiler works, `available()` is
False and the callers keep their numpy code, which gives the same integers (tests compare both on
the same accumulators, and each against exact fractions: tests/test_integer_fixed_point.py).
Chosen over a JIT compiler package: nothing to install, and the library adds kilobytes to the
process where numba and LLVM added about 120 MiB (the demo check's peak went from 300 to 416 MiB).
"""
from __future__ import annotations

import ctypes
import hashlib
import os
import shutil
import subprocess
import sys
import sysconfig
import tempfile

import numpy as np

SOURCE = r"""
#include <stdint.h>
#include <math.h>

/* x >> n on a negative int64 is implementation-defined in C99; GCC and Clang define it as an
   arithmetic shift, floor(x / 2^n) (GCC manual, "Integers implementation"; from memory). The library
   is checked against the numpy code on load (qfit.quant.compiled._self_check) and not used if not. */
#define REQUANTIZE(NAME, ACC, OUT)                                                                   \
void NAME(const ACC *acc, OUT *out, int64_t outer, int64_t channels, int64_t inner,                 \
          const int64_t *m0, const int64_t *threshold, const int64_t *offset, const int64_t *right, \
          const int64_t *low, const int64_t *high, const int64_t *zero_point, int32_t double_rounding) \
{                                                                                                    \
    const int64_t first = double_rounding ? 31 : 0;                                                  \
    for (int64_t o = 0; o < outer; ++o) {                                                            \
        for (int64_t c = 0; c < channels; ++c) {                                                     \
            const ACC *a = acc + (o * channels + c) * inner;                                         \
            OUT *y = out + (o * channels + c) * inner;                                               \
            const int64_t m = m0[c], t = threshold[c], k = offset[c], r = right[c];                  \
            const int64_t lo = low[c], hi = high[c], z = zero_point[c];                              \
            for (int64_t i = 0; i < inner; ++i) {                                                    \
                const int64_t x = (int64_t)a[i] * m;                                                 \
                int64_t v = (((x + k) >> first) + (x >= t)) >> r;                                    \
                v = v < lo ? lo : v;                                                                 \
                v = v > hi ? hi : v;                                                                 \
                y[i] = (OUT)(v + z);                                                                 \
            }                                                                                        \
        }                                                                                            \
    }                                                                                                \
}

REQUANTIZE(qfit_requantize_float32_int8, float, int8_t)
REQUANTIZE(qfit_requantize_float32_uint8, float, uint8_t)
REQUANTIZE(qfit_requantize_float32_int16, float, int16_t)
REQUANTIZE(qfit_requantize_float32_uint16, float, uint16_t)
REQUANTIZE(qfit_requantize_float32_int32, float, int32_t)
REQUANTIZE(qfit_requantize_int64_int8, int64_t, int8_t)
REQUANTIZE(qfit_requantize_int64_uint8, int64_t, uint8_t)
REQUANTIZE(qfit_requantize_int64_int16, int64_t, int16_t)
REQUANTIZE(qfit_requantize_int64_uint16, int64_t, uint16_t)
REQUANTIZE(qfit_requantize_int64_int32, int64_t, int32_t)

/* sums[0..6] = sum x^2, sum e^2, sum x e, sum |e|, max |e|, min x, max x over e = x - y, in float64,
   in four interleaved partial sums (a fixed order: the same result on every run). */
void qfit_error_sums(const float *x, const float *y, int64_t n, double *sums)
{
    double xx0 = 0, xx1 = 0, xx2 = 0, xx3 = 0, ee0 = 0, ee1 = 0, ee2 = 0, ee3 = 0;
    double xe0 = 0, xe1 = 0, xe2 = 0, xe3 = 0, ab0 = 0, ab1 = 0, ab2 = 0, ab3 = 0;
    double max_abs = 0.0, lo = INFINITY, hi = -INFINITY;
    int64_t i = 0;
#define LANE(XX, EE, XE, AB, J)                                                                      \
    {                                                                                                \
        const double a = (double)x[i + J], e = a - (double)y[i + J], d = fabs(e);                   \
        XX += a * a; EE += e * e; XE += a * e; AB += d;                                              \
        max_abs = d > max_abs ? d : max_abs;                                                         \
        lo = a < lo ? a : lo;                                                                        \
        hi = a > hi ? a : hi;                                                                        \
    }
    for (; i + 4 <= n; i += 4) {
        LANE(xx0, ee0, xe0, ab0, 0) LANE(xx1, ee1, xe1, ab1, 1)
        LANE(xx2, ee2, xe2, ab2, 2) LANE(xx3, ee3, xe3, ab3, 3)
    }
    for (; i < n; ++i) LANE(xx0, ee0, xe0, ab0, 0)
#undef LANE
    sums[0] = (xx0 + xx1) + (xx2 + xx3);
    sums[1] = (ee0 + ee1) + (ee2 + ee3);
    sums[2] = (xe0 + xe1) + (xe2 + xe3);
    sums[3] = (ab0 + ab1) + (ab2 + ab3);
    sums[4] = max_abs;
    sums[5] = lo;
    sums[6] = hi;
}

/* Range statistics of one batch of a tensor (qfit.quant.observe.TensorStats): min and max, and the
   count of values that are NaN or infinite (the caller takes another path when there are any). */
void qfit_min_max(const float *x, int64_t n, float *low, float *high, int64_t *nonfinite)
{
    float lo = INFINITY, hi = -INFINITY;
    int64_t bad = 0;
    for (int64_t i = 0; i < n; ++i) {
        const float v = x[i];
        bad += !(v - v == 0.0f);   /* NaN - NaN and inf - inf are NaN */
        lo = v < lo ? v : lo;
        hi = v > hi ? v : hi;
    }
    *low = lo; *high = hi; *nonfinite = bad;
}

/* Histogram counts over [-radius, radius]: bin = (int)((x + radius) * per_bin) in float32, the
   observe module's numpy arithmetic; counts has bins + 1 entries (x = radius lands in the last one,
   which the caller folds into the one before), zeros counts the values exactly 0. */
void qfit_histogram(const float *x, int64_t n, float radius, float per_bin, int64_t *counts, int64_t *zeros)
{
    int64_t z = 0;
    for (int64_t i = 0; i < n; ++i) {
        const float v = x[i];
        const float scaled = (v + radius) * per_bin;
        counts[(int64_t)scaled] += 1;
        z += v == 0.0f;
    }
    *zeros += z;
}
"""

ACC_TYPES = {np.dtype(np.float32): "float32", np.dtype(np.int64): "int64"}
OUT_TYPES = {np.dtype(t): np.dtype(t).name for t in (np.int8, np.uint8, np.int16, np.uint16, np.int32)}

_LIBRARY: list = []   # [ctypes.CDLL or None] once tried


def cache_folder() -> str:
    """$XDG_CACHE_HOME/qfit or ~/.cache/qfit; a relative one (no home known) is refused: a library
    is only ever loaded from a private, absolute place."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    if not os.path.isabs(base):
        raise OSError("no absolute cache folder for qfit's kernels")
    return os.path.join(base, "qfit")


def _suffix() -> str:
    tag = f"{sys.implementation.cache_tag}-{sysconfig.get_platform()}".replace(os.sep, "_")
    return f"-{tag}.so"


def library_path() -> str:
    digest = hashlib.sha256(SOURCE.encode()).hexdigest()[:16]
    return os.path.join(cache_folder(), f"kernels-{digest}{_suffix()}")


def _build(path: str) -> None:
    """Compile SOURCE into `path` (written under a temporary name in the same folder, then renamed, so
    a concurrent run never loads half a file)."""
    compiler = os.environ.get("CC") or shutil.which("cc") or shutil.which("gcc")
    if not compiler:
        raise OSError("no C compiler")
    folder = os.path.dirname(path)
    os.makedirs(folder, mode=0o700, exist_ok=True)
    with tempfile.TemporaryDirectory(dir=folder) as work:
        source = os.path.join(work, "kernels.c")
        with open(source, "w") as f:
            f.write(SOURCE)
        built = os.path.join(work, "kernels.so")
        subprocess.run([compiler, "-O2", "-std=c99", "-ffp-contract=off", "-shared", "-fPIC", "-o", built, source, "-lm"],
                       check=True, capture_output=True, timeout=120)
        os.replace(built, path)
    for name in os.listdir(folder):   # builds of older sources for this Python go
        if name.startswith("kernels-") and name.endswith(_suffix()) and os.path.join(folder, name) != path:
            try:
                os.remove(os.path.join(folder, name))
            except OSError:
                pass


def _load():
    path = library_path()
    if not os.path.exists(path):
        _build(path)
    library = ctypes.CDLL(path)
    i64, f64 = ctypes.c_int64, ctypes.POINTER(ctypes.c_double)
    for acc in ACC_TYPES.values():
        for out in OUT_TYPES.values():
            function = getattr(library, f"qfit_requantize_{acc}_{out}")
            function.argtypes = [ctypes.c_void_p, ctypes.c_void_p, i64, i64, i64] + [ctypes.c_void_p] * 7 + [ctypes.c_int32]
            function.restype = None
    library.qfit_error_sums.argtypes = [ctypes.c_void_p, ctypes.c_void_p, i64, f64]
    library.qfit_min_max.argtypes = [ctypes.c_void_p, i64, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_void_p]
    library.qfit_histogram.argtypes = [ctypes.c_void_p, i64, ctypes.c_float, ctypes.c_float, ctypes.c_void_p,
                                       ctypes.c_void_p]
    for function in (library.qfit_error_sums, library.qfit_min_max, library.qfit_histogram):
        function.restype = None
    return library


def _self_check(library) -> bool:
    """The library's requantization of negative and positive accumulators equals Python's integer
    arithmetic (whose >> is floor division by a power of two), in both roundings."""
    acc = np.array([-(1 << 30) + 7, -123457, -4097, -2, -1, 0, 1, 2, 4097, 123457, (1 << 30) - 9], np.int64)
    m, t, k, r, lo, hi, z = 1518500250, -(1 << 30), (1 << 30) + (1 << 31) * 3, 3, -140, 120, 5
    for double, first in ((1, 31), (0, 0)):
        out = np.zeros(acc.size, np.int32)
        constants = [np.array([v], np.int64) for v in (m, t, k, r, lo, hi, z)]
        library.qfit_requantize_int64_int32(acc.ctypes.data, out.ctypes.data, 1, 1, acc.size,
                                            *(c.ctypes.data for c in constants), double)
        expected = [min(max((((int(a) * m + k) >> first) + (int(a) * m >= t)) >> r, lo), hi) + z for a in acc]
        if out.tolist() != expected:
            return False
    return True


def available() -> bool:
    """True when the kernels are built (or load from the cache); tried once per process. Setting
    QFIT_NO_COMPILED=1 keeps the numpy code (the tests use it to compare both)."""
    if not _LIBRARY:
        library = None
        if not os.environ.get("QFIT_NO_COMPILED"):
            try:
                library = _load()
            except (OSError, subprocess.SubprocessError, AttributeError):
                library = None
            if library is not None and not _self_check(library):
                library = None
        _LIBRARY.append(library)
    return _LIBRARY[0] is not None


def can_requantize(acc: np.ndarray, out: np.ndarray) -> bool:
    return available() and acc.dtype in ACC_TYPES and out.dtype in OUT_TYPES


def requantize(acc: np.ndarray, out: np.ndarray, m0, threshold, offset, right, low, high, zero_point,
               double: bool) -> None:
    """acc, out: C-contiguous (outer, channels, inner); the constants: C-contiguous int64, one per
    channel (call `can_requantize` first)."""
    function = getattr(_LIBRARY[0], f"qfit_requantize_{ACC_TYPES[acc.dtype]}_{OUT_TYPES[out.dtype]}")
    function(acc.ctypes.data, out.ctypes.data, *acc.shape,
             *(c.ctypes.data for c in (m0, threshold, offset, right, low, high, zero_point)), int(double))


def error_sums(x: np.ndarray, y: np.ndarray) -> tuple[float, ...]:
    """(sum x^2, sum e^2, sum x e, sum |e|, max |e|, min x, max x), e = x - y; x, y contiguous float32."""
    sums = np.zeros(7, np.float64)
    _LIBRARY[0].qfit_error_sums(x.ctypes.data, y.ctypes.data, x.size, sums.ctypes.data_as(ctypes.POINTER(ctypes.c_double)))
    return tuple(float(v) for v in sums)


def min_max(x: np.ndarray) -> tuple[float, float, int]:
    """(min, max, count of NaN or infinite values) of contiguous float32 x (size > 0); min and max
    skip NaN."""
    low, high, bad = np.zeros(1, np.float32), np.zeros(1, np.float32), np.zeros(1, np.int64)
    _LIBRARY[0].qfit_min_max(x.ctypes.data, x.size, low.ctypes.data, high.ctypes.data, bad.ctypes.data)
    return float(low[0]), float(high[0]), int(bad[0])


def histogram(x: np.ndarray, radius: float, per_bin: float, counts: np.ndarray) -> int:
    """Add the bins (int)((x + radius) * per_bin), in float32, of contiguous float32 x (every value in
    [-radius, radius]) to int64 `counts` (bins + 1 entries); returns the count of exact zeros."""
    zeros = np.zeros(1, np.int64)
    _LIBRARY[0].qfit_histogram(x.ctypes.data, x.size, float(np.float32(radius)), float(np.float32(per_bin)),
                               counts.ctypes.data, zeros.ctypes.data)
    return int(zeros[0])
