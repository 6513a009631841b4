"""observe: one streaming pass of the float model -> per-tensor range statistics.

Each observed tensor keeps its exact running min/max and a histogram of its values on a symmetric
grid [-R, R] of HIST_BINS bins. When a batch exceeds R, R doubles and pairs of bins merge, so counts
stay exact and memory stays fixed whatever the number of samples. The four range methods are
computed afterwards from those statistics:

  minmax      [min, max]
  percentile  the p-th and (100-p)-th percentiles (default p = 99.99), from the histogram CDF
  mse         the clipping range [a*min, a*max] minimising the expected squared quantization error
              over the histogram (a searched on a grid)
  entropy     the threshold minimising KL(P || Q) between the clipped histogram of |x| and its
              quantized version: the KL-divergence threshold search of Migacz 2017, over every
              candidate threshold, with exact zeros left out, among the thresholds whose expected
              squared error stays within ENTROPY_ERROR_BOUND of the unclipped range's (see
              _entropy_range for why)
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np

from qfit.quant import compiled
from qfit.quant.scale_floor import MIN_HISTOGRAM_RADIUS

HIST_BINS = 4096  # over [-R, R]; 2048 bins per sign, as the entropy method expects
DEFAULT_PERCENTILE = 99.99
# Values are binned in slices of this many elements so the temporaries stay in the CPU cache
# (a whole activation batch would stream through memory once per numpy operation).
BIN_CHUNK = 1 << 16


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
    zeros: int = 0  # values exactly 0 (they sit in the histogram's bin [0, R/2048) too)
    histogram: bool = True  # False: min/max/count only, enough for the min-max method

    def update(self, values: np.ndarray) -> None:
        flat = np.asarray(values, dtype=np.float32).ravel()
        if flat.size == 0:
            return
        fast = compiled.available()   # one C pass each for the range and the bins (qfit.quant.compiled)
        if fast:
            lo, hi, bad = compiled.min_max(flat)
        else:
            lo, hi = float(flat.min()), float(flat.max())
            bad = not (np.isfinite(lo) and np.isfinite(hi))   # NaN or Inf somewhere: min or max shows it
        if bad:
            finite = np.isfinite(flat)
            self.nonfinite += int((~finite).sum())
            flat = flat[finite]
            if flat.size == 0:
                return
            lo, hi = float(flat.min()), float(flat.max())
        self.min, self.max = min(self.min, lo), max(self.max, hi)
        self.count += flat.size
        if not self.histogram:
            return
        needed = max(abs(lo), abs(hi))
        if self.radius == 0.0:
            if needed == 0.0:
                self.hist[HIST_BINS // 2] += flat.size  # all zeros so far: the bin just above 0
                self.zeros += flat.size
                return
            # floored: for denormal-sized values BINS / 2R would overflow float32 (see scale_floor)
            self.radius = max(float(2.0 ** np.ceil(np.log2(needed))), MIN_HISTOGRAM_RADIUS)
            if self.hist.any():  # zeros seen before a range existed: keep them at 0
                zeros = self.hist.sum()
                self.hist[:] = 0
                self.hist[HIST_BINS // 2] = zeros
        while needed > self.radius:
            self._double()
        # bin = floor((x + R) * BINS / 2R), the same float32 arithmetic for every slice. x >= -R, so
        # bins are >= 0; x = R (or a value rounding up to it) lands in an extra bin folded into the last.
        per_bin = HIST_BINS / (2 * self.radius)
        counts = np.zeros(HIST_BINS + 1, np.int64)
        if fast:
            self.zeros += compiled.histogram(flat, self.radius, per_bin, counts)
        else:
            self.zeros += self._bin_in_slices(flat, per_bin, counts)
        counts[HIST_BINS - 1] += counts[HIST_BINS]
        self.hist += counts[:HIST_BINS]

    def _bin_in_slices(self, flat: np.ndarray, per_bin: float, counts: np.ndarray) -> int:
        """numpy's binning (the C kernel's arithmetic): add the bins of `flat` to `counts`, slice by
        slice; returns the count of exact zeros."""
        size = min(BIN_CHUNK, flat.size)
        scaled = np.empty(size, np.float32)
        index = np.empty(size, np.intp)
        zeros = 0
        for start in range(0, flat.size, BIN_CHUNK):
            part = flat[start:start + BIN_CHUNK]
            n = part.size
            zeros += int(np.count_nonzero(part == 0))
            np.add(part, self.radius, out=scaled[:n])
            np.multiply(scaled[:n], per_bin, out=scaled[:n])
            index[:n] = scaled[:n]  # truncation = floor for these non-negative values
            counts += np.bincount(index[:n], minlength=HIST_BINS + 1)
        return zeros

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
    if not stats.histogram and method != "minmax":
        raise ValueError(f"tensor '{stats.name}': method {method!r} needs a histogram, but its statistics "
                         f"were collected for min-max only")
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


# The entropy threshold may cost at most this factor (3 dB) in expected squared error over the
# unclipped range. To first order the output error is a sum of each tensor's error through the layers
# after it, and uncorrelated errors add in power, so tensors that each stay within 2x of min-max's
# error keep the output within about 3 dB of min-max's SQNR (an estimate; the tests measure it).
ENTROPY_ERROR_BOUND = 2.0


def _entropy_range(stats: TensorStats, bits: int) -> tuple[float, float]:
    """Migacz 2017's KL-divergence threshold search on the histogram of |x| (2048 bins over [0, R]):
    for every candidate threshold of n >= `levels` bins, P is the first n bins with the tail added
    to the last one and Q merges the first n bins (without the tail) into `levels` groups
    (_kl_quantized); the threshold is the first n reaching the smallest KL(P || Q) among the
    candidates whose expected squared error (_clip_and_round_error) is at most ENTROPY_ERROR_BOUND
    times the unclipped one's.

    Exact zeros are left out of the histogram first. A ReLU or ReLU6 output is often half zeros;
    int8 stores 0 exactly (it is the zero point) at every threshold, yet kept in bin 0 that spike
    is spread over its whole group by Q, which costs less the narrower the groups are. The search
    then chose the smallest candidate ([0, 1] for ReLU6 outputs in [0, 6]) and wrecked the model.

    The error bound, because P moves the clipped tail into its last bin whatever the distance, so KL
    does not see how far clipping moves values; it only sees the shape of the rest. Where that shape
    is not a smooth density at bin resolution, the search clipped hard (random-weight zoo models):
    values away from 0 (a hard-sigmoid gate in [0.23, 0.76], a model output): below them P and Q are
    both the tail piled into one bin, KL ~ 0, 99 % of the values clipped; point masses (a constant
    channel repeats one value at every position of every sample: Q spreads it over its group at a
    cost that grows with the group width, so narrow groups win); a few hundred values over 2048
    bins, where counts are noise. On a dense histogram the KL minimum lies within the bound and the
    search is Migacz's unchanged.
    """
    half = HIST_BINS // 2
    positive_only = stats.min >= 0
    # fold to |x|: bin j of `magnitude` covers [j, j+1) * radius / half
    magnitude = stats.hist[half:].astype(np.float64) + stats.hist[:half][::-1]
    magnitude[0] -= stats.zeros
    levels = 2 ** bits if positive_only else 2 ** (bits - 1)
    filled = np.nonzero(magnitude)[0]
    if filled.size == 0:  # nothing but zeros: the range is the min-max one
        return min(stats.min, 0.0), max(stats.max, 0.0)
    last = int(filled.max()) + 1
    if last <= levels:
        threshold_bin = last
    else:
        sizes = np.arange(levels, last + 1)
        kl = _kl_quantized(magnitude, sizes, levels)
        # the grid's step at threshold T: [0, T] in 2^bits - 1 steps, or [-T, T] when signed
        step_per_threshold = (1.0 if positive_only else 2.0) / (2 ** bits - 1)
        error = _clip_and_round_error(magnitude, sizes, stats.radius / half, step_per_threshold)
        kl[error > ENTROPY_ERROR_BOUND * error[-1]] = np.inf  # sizes[-1] = last clips nothing
        best = float(np.min(kl))
        if not np.isfinite(best):
            threshold_bin = last
        else:
            # the first threshold reaching the minimum; values that differ by rounding only are ties
            threshold_bin = int(sizes[np.argmax(kl <= best + 1e-12 + 1e-9 * best)])
    threshold = threshold_bin * stats.radius / half
    return (0.0 if positive_only else -threshold), threshold


def _clip_and_round_error(magnitude: np.ndarray, sizes: np.ndarray, bin_width: float,
                          step_per_threshold: float) -> np.ndarray:
    """Expected squared error of each candidate threshold T = n * bin_width (n in `sizes`) over the
    histogram of |x| (values at their bin centres x_j, exact zeros left out):
        rounding: step^2 / 12 for every value inside [0, T] (Bennett 1948), step = T * step_per_threshold
        clipping: sum over values beyond T of (x_j - T)^2, exactly,
    from cumulative sums of the counts, of count * x and of count * x^2. Not _quant_error, which
    rounds every bin exactly but costs bins x candidates; this runs for every candidate threshold."""
    centres = (np.arange(magnitude.size) + 0.5) * bin_width
    def after(weights):  # sum over bins j >= n
        return np.concatenate([np.cumsum(weights[::-1])[::-1], [0.0]])[sizes]
    threshold = sizes * bin_width
    inside = magnitude.sum() - after(magnitude)
    clipped = after(magnitude * centres ** 2) - 2 * threshold * after(magnitude * centres) \
        + threshold ** 2 * after(magnitude)
    return inside * (threshold * step_per_threshold) ** 2 / 12 + clipped


ENTROPY_BLOCK = 64  # candidate thresholds evaluated together (bounds the temporaries to 64 x levels)


def _kl_quantized(magnitude: np.ndarray, sizes: np.ndarray, levels: int) -> np.ndarray:
    """KL(P || Q) for each candidate threshold n in `sizes` (n >= levels), where
         P = magnitude[:n] with the tail magnitude[n:] added to its last bin, normalised;
         Q = P's bins merged into `levels` groups (bin j in group j * levels // n), each group's count
             spread evenly over its non-empty bins, normalised.
    Computed per group rather than per bin: with p_j = m_j (j < n-1) and q_j the share of j's group,
        sum_j P_j log(P_j / Q_j) = (sum_j p_j log p_j - sum_g S_g log share_g - tail log share_last) / T
                                   - log T + log(sum_j<n m_j)
    (T = total count, S_g = count of group g), from cumulative sums; the counts are integers, so
    every cumulative count is exact. Infinite when P has mass where Q has none (the last bin is
    empty but the tail is not)."""
    m = np.asarray(magnitude, np.float64)
    total = m.sum()
    with np.errstate(divide="ignore", invalid="ignore"):
        m_log_m = np.where(m > 0, m * np.log(m), 0.0)
    p_log_p_before = np.concatenate([[0.0], np.cumsum(m_log_m)])
    counts_before = np.concatenate([[0.0], np.cumsum(m)])
    filled_before = np.concatenate([[0], np.cumsum(m > 0)])
    group_index = np.arange(levels + 1)[None, :]
    out = np.empty(sizes.size)
    for start in range(0, sizes.size, ENTROPY_BLOCK):
        n = sizes[start:start + ENTROPY_BLOCK]
        edges = (group_index * n[:, None] + levels - 1) // levels   # first bin of each group, and the end
        group_counts = counts_before[edges[:, 1:]] - counts_before[edges[:, :-1]]
        nonempty = filled_before[edges[:, 1:]] - filled_before[edges[:, :-1]]
        share = group_counts / np.maximum(nonempty, 1)
        tail = total - counts_before[n]
        last_count = m[n - 1]
        last_p = last_count + tail
        with np.errstate(divide="ignore", invalid="ignore"):
            cross = np.where(group_counts > 0, group_counts * np.log(share), 0.0).sum(axis=1)
            cross += np.where(tail > 0, tail * np.log(share[:, -1]), 0.0)
            p_log_p = p_log_p_before[n - 1] + np.where(last_p > 0, last_p * np.log(last_p), 0.0)
            kl = (p_log_p - cross) / total - np.log(total) + np.log(counts_before[n])
        kl[(counts_before[n] == 0) | ((last_count == 0) & (tail > 0))] = np.inf
        out[start:start + n.size] = kl
    return out


def observe(model_runner, batches, tensors: list[str], progress=None,
            histograms: bool = True) -> dict[str, TensorStats]:
    """Run `model_runner(batch_inputs) -> dict name -> array` over `batches`, collecting stats.

    `model_runner` must return every name in `tensors`, in a new dict per call (observe empties it). `batches` yields qfit.data.Batch-like
    objects with `.inputs`. Memory: one TensorStats per tensor, independent of the sample count.
    `histograms=False` keeps min/max only (the min-max method needs nothing else; it is faster).
    """
    stats = {name: TensorStats(name, histogram=histograms) for name in tensors}

    def absorb(values: dict[str, np.ndarray]) -> None:
        # each tensor is let go once binned, so the batch onnxruntime is filling meanwhile grows into
        # the memory this one gives back (values is this batch's own dict)
        for name in tensors:
            stats[name].update(values.pop(name))

    # One worker bins batch k while this thread reads batch k+1 and onnxruntime runs it (numpy and
    # onnxruntime release the GIL in their loops). The worker takes batches in order, one at a time,
    # so the statistics are the same as a plain loop's; at most two batches of values are alive.
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="qfit-observe") as worker:
        pending = None
        for batch in batches:
            values = model_runner(batch.inputs)
            if pending is not None:
                pending.result()
            pending = worker.submit(absorb, values)
            if progress is not None:
                progress.update(len(batch.files))
        if pending is not None:
            pending.result()
    return stats
