"""observe: one streaming pass of the float model -> per-tensor range statistics.

Each observed tensor keeps its exact running min/max and a histogram of its values on a symmetric
grid [-R, R] of HIST_BINS bins. When a batch exceeds R, R doubles and pairs of bins merge, so counts
stay exact and memory stays fixed whatever the number of samples. The four range methods are
computed afterwards from those statistics:

  minmax      [min, max]
  percentile  the p-th and (100-p)-th percentiles (default p = 99.99), from the histogram CDF
  mse         the clipping range [a*min, a*max] minimising the expected squared quantization error
              over the histogram (a searched on a grid)
  entropy     the threshold minimising KL(P || Q) between the clipped histogram and its quantized
              version (Migacz, "8-bit Inference with TensorRT", GTC 2017)
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

HIST_BINS = 4096  # over [-R, R]; 2048 bins per sign, as the entropy method expects
DEFAULT_PERCENTILE = 99.99


@dataclass
class TensorStats:
    """Streaming statistics of one tensor (memory independent of the number of samples)."""

    name: str
    count: int = 0
    min: float = np.inf
    max: float = -np.inf
    radius: float = 0.0  # histogram covers [-radius, radius]
    hist: np.ndarray = field(default_factory=lambda: np.zeros(HIST_BINS, dtype=np.int64))
    nonfinite: int = 0

    def update(self, values: np.ndarray) -> None:
        flat = np.asarray(values, dtype=np.float32).ravel()
        if flat.size == 0:
            return
        finite = np.isfinite(flat)
        if not finite.all():
            self.nonfinite += int((~finite).sum())
            flat = flat[finite]
            if flat.size == 0:
                return
        lo, hi = float(flat.min()), float(flat.max())
        self.min, self.max = min(self.min, lo), max(self.max, hi)
        self.count += flat.size
        needed = max(abs(lo), abs(hi))
        if self.radius == 0.0:
            if needed == 0.0:
                self.hist[HIST_BINS // 2] += flat.size  # all zeros so far: the bin just above 0
                return
            self.radius = float(2.0 ** np.ceil(np.log2(needed)))
            if self.hist.any():  # zeros seen before a range existed: keep them at 0
                zeros = self.hist.sum()
                self.hist[:] = 0
                self.hist[HIST_BINS // 2] = zeros
        while needed > self.radius:
            self._double()
        index = ((flat + self.radius) * (HIST_BINS / (2 * self.radius))).astype(np.int64)
        np.clip(index, 0, HIST_BINS - 1, out=index)
        self.hist += np.bincount(index, minlength=HIST_BINS)

    def _double(self) -> None:
        # bins pair up: the old grid [-R, R] becomes the middle half of [-2R, 2R]
        merged = self.hist.reshape(-1, 2).sum(axis=1)
        quarter = HIST_BINS // 4
        self.hist = np.zeros(HIST_BINS, dtype=np.int64)
        self.hist[quarter:quarter + merged.size] = merged
        self.radius *= 2.0

    def edges(self) -> np.ndarray:
        return np.linspace(-self.radius, self.radius, HIST_BINS + 1)

    def centers(self) -> np.ndarray:
        e = self.edges()
        return (e[:-1] + e[1:]) / 2


def range_for(stats: TensorStats, method: str, bits: int = 8, symmetric: bool = False,
              percentile: float = DEFAULT_PERCENTILE) -> tuple[float, float]:
    """The (lo, hi) clipping range of `stats` by `method`; lo <= 0 <= hi always."""
    if stats.count == 0 or stats.radius == 0.0:
        return (min(stats.min, 0.0) if np.isfinite(stats.min) else 0.0,
                max(stats.max, 0.0) if np.isfinite(stats.max) else 0.0)
    lo, hi = min(stats.min, 0.0), max(stats.max, 0.0)
    if method == "minmax":
        pass
    elif method == "percentile":
        lo, hi = _percentile_range(stats, percentile)
    elif method == "mse":
        lo, hi = _mse_range(stats, bits, symmetric)
    elif method == "entropy":
        lo, hi = _entropy_range(stats, bits)
    else:
        raise ValueError(f"unknown calibration method {method!r}")
    lo, hi = min(lo, 0.0), max(hi, 0.0)
    return max(lo, min(stats.min, 0.0)), min(hi, max(stats.max, 0.0))


def _percentile_range(stats: TensorStats, percentile: float) -> tuple[float, float]:
    cdf = np.cumsum(stats.hist) / stats.count
    edges = stats.edges()
    tail = (100.0 - percentile) / 100.0
    lo_index = int(np.searchsorted(cdf, tail, side="left"))
    hi_index = int(np.searchsorted(cdf, 1.0 - tail, side="left"))
    lo = edges[lo_index] if stats.min < 0 else 0.0
    hi = edges[min(hi_index + 1, HIST_BINS)] if stats.max > 0 else 0.0
    return float(lo), float(hi)


def _quant_error(centers: np.ndarray, counts: np.ndarray, lo: np.ndarray, hi: np.ndarray,
                 levels: int) -> np.ndarray:
    """Expected squared error of quantizing the histogram to `levels` levels on each [lo, hi]."""
    step = np.maximum((hi - lo) / (levels - 1), 1e-30)[:, None]
    q = np.clip(np.round((centers[None, :] - lo[:, None]) / step), 0, levels - 1) * step + lo[:, None]
    return ((centers[None, :] - q) ** 2 * counts[None, :]).sum(axis=1)


def _mse_range(stats: TensorStats, bits: int, symmetric: bool) -> tuple[float, float]:
    nonzero = stats.hist > 0
    centers, counts = stats.centers()[nonzero], stats.hist[nonzero].astype(np.float64)
    lo0, hi0 = min(stats.min, 0.0), max(stats.max, 0.0)
    if symmetric:
        bound = max(-lo0, hi0)
        lo0, hi0 = -bound, bound
    alphas = np.linspace(0.05, 1.0, 96)
    best = np.inf, 1.0
    for chunk in np.array_split(alphas, 4):  # bounds the temporary array to ~24 x bins
        err = _quant_error(centers, counts, chunk * lo0, chunk * hi0, 2 ** bits)
        i = int(np.argmin(err))
        if err[i] < best[0]:
            best = float(err[i]), float(chunk[i])
    return best[1] * lo0, best[1] * hi0


def _entropy_range(stats: TensorStats, bits: int) -> tuple[float, float]:
    half = HIST_BINS // 2
    positive_only = stats.min >= 0
    # fold to |x|: bin j of `magnitude` covers [j, j+1) * radius / half
    magnitude = stats.hist[half:].astype(np.float64) + stats.hist[:half][::-1]
    levels = 2 ** bits if positive_only else 2 ** (bits - 1)
    last = int(np.nonzero(magnitude)[0].max()) + 1
    if last <= levels:
        threshold_bin = last
    else:
        best_kl, threshold_bin = np.inf, last
        for i in range(levels, last + 1, max(1, (last - levels) // 256)):
            p = magnitude[:i].copy()
            p[i - 1] += magnitude[i:].sum()
            kl = _kl_quantized(p, magnitude[:i], levels)
            if kl < best_kl:
                best_kl, threshold_bin = kl, i
    threshold = threshold_bin * stats.radius / half
    return (0.0 if positive_only else -threshold), threshold


def _kl_quantized(p: np.ndarray, reference: np.ndarray, levels: int) -> float:
    """KL(P || Q) where Q merges P's bins into `levels` groups, spread back over non-empty bins."""
    n = p.size
    group = (np.arange(n) * levels) // n
    present = reference > 0
    sums = np.bincount(group, weights=reference, minlength=levels)
    nonempty = np.bincount(group, weights=present.astype(np.float64), minlength=levels)
    q = np.where(present, sums[group] / np.maximum(nonempty[group], 1), 0.0)
    p_sum, q_sum = p.sum(), q.sum()
    if p_sum == 0 or q_sum == 0:
        return np.inf
    p, q = p / p_sum, q / q_sum
    mask = p > 0
    if np.any(q[mask] == 0):
        return np.inf
    return float(np.sum(p[mask] * np.log(p[mask] / q[mask])))


def observe(model_runner, batches, tensors: list[str], progress=None) -> dict[str, TensorStats]:
    """Run `model_runner(batch_inputs) -> dict name -> array` over `batches`, collecting stats.

    `model_runner` must return every name in `tensors`. `batches` yields qfit.data.Batch-like
    objects with `.inputs`. Memory: one TensorStats per tensor, independent of the sample count.
    """
    stats = {name: TensorStats(name) for name in tensors}
    for batch in batches:
        values = model_runner(batch.inputs)
        for name in tensors:
            stats[name].update(values[name])
        if progress is not None:
            progress.update(len(batch.files))
    return stats
