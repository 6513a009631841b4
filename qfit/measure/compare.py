"""compare: float vs quantized tensors -> per-layer error and end metrics, streaming over samples.

Per tensor (sums kept over all samples, so memory does not grow with their number):
  SQNR (dB)            10 log10( sum x^2 / sum (x - x')^2 )
  cosine similarity    sum x x' / sqrt(sum x^2 * sum x'^2)
  max abs error        max |x - x'|
  relative mean error  mean |x - x'| / (max x - min x)     (error relative to the float range)
End metrics: top-1 (top-5 when there are more than 5 classes) for float and int8 with the drop in
percentage points and its 95 % score interval for a difference of paired proportions (Tango,
Statistics in Medicine, 1998), which does not condition on the number of discordant pairs; without
labels, argmax agreement and output SQNR; for score or reconstruction outputs, output SQNR and,
given a threshold, decision flips.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from qfit.quant import compiled


@dataclass
class ErrorSums:
    """Streaming sums for the error metrics of one tensor."""

    signal: float = 0.0
    noise: float = 0.0
    quantized: float = 0.0
    dot: float = 0.0
    abs_error: float = 0.0
    max_abs_error: float = 0.0
    count: int = 0
    lo: float = np.inf
    hi: float = -np.inf

    def update(self, reference: np.ndarray, quantized: np.ndarray) -> None:
        x = np.asarray(reference, np.float32).ravel()
        y = np.asarray(quantized, np.float32).ravel()
        if compiled.available():  # one compiled pass, float64 sums (qfit.quant.compiled)
            if x.size:
                xx, ee, xe, abs_sum, max_abs, lo, hi = compiled.error_sums(x, y)
                self._add(xx, ee, xe, abs_sum, x.size)
                self.max_abs_error = max(self.max_abs_error, max_abs)
                self.lo, self.hi = min(self.lo, lo), max(self.hi, hi)
            return
        # without the C kernels: float32 products summed per batch, float64 across batches, 4x faster than
        # float64 arrays at ~1e-7 relative error. einsum, not `@`: BLAS dot products start their own
        # threads, which starve next to onnxruntime's workers.
        e = x - y
        xx = float(np.einsum("i,i->", x, x))
        ee = float(np.einsum("i,i->", e, e))
        xe = float(np.einsum("i,i->", x, e))
        np.abs(e, out=e)
        self._add(xx, ee, xe, float(e.sum(dtype=np.float64)), x.size)
        if e.size:
            self.max_abs_error = max(self.max_abs_error, float(e.max()))
            self.lo, self.hi = min(self.lo, float(x.min())), max(self.hi, float(x.max()))

    def _add(self, xx: float, ee: float, xe: float, abs_sum: float, count: int) -> None:
        self.signal += xx
        self.noise += ee
        self.quantized += xx - 2.0 * xe + ee   # y.y with y = x - e
        self.dot += xx - xe                    # x.y
        self.abs_error += abs_sum
        self.count += count

    def sqnr_db(self) -> float:
        return sqnr_from_sums(self.signal, self.noise)

    def cosine(self) -> float:
        denom = math.sqrt(self.signal * self.quantized)
        return float(self.dot / denom) if denom > 0 else 1.0

    def relative_mean_error(self) -> float:
        span = self.hi - self.lo
        return float(self.abs_error / self.count / span) if self.count and span > 0 else 0.0

    def to_dict(self) -> dict:
        return {"sqnr_db": round_db(self.sqnr_db()), "cosine": round(self.cosine(), 6),
                "max_abs_error": float(self.max_abs_error),
                "mean_abs_error_rel": round(self.relative_mean_error(), 6)}


SQNR_CAP_DB = 200.0  # an exact match has infinite SQNR; JSON has no infinity


def sqnr_from_sums(signal: float, noise: float) -> float:
    if noise <= 0:
        return SQNR_CAP_DB
    if signal <= 0:
        return -SQNR_CAP_DB
    return min(SQNR_CAP_DB, 10.0 * math.log10(signal / noise))


def sqnr_db(reference: np.ndarray, quantized: np.ndarray) -> float:
    sums = ErrorSums()
    sums.update(reference, quantized)
    return sums.sqnr_db()


def round_db(value: float) -> float:
    return round(float(value), 2)


# ---- exact binomial test and the drop's interval ----------------------------------------------

def binomial_test_above(successes: int, trials: int, rate: float) -> float:
    """One-sided exact binomial test: P(X >= successes) for X ~ Binomial(trials, rate), the p-value
    of "the success rate is above `rate`"; the upper tail is summed itself (in log space), so a
    p-value far below 1e-16 does not vanish into 1 - CDF."""
    if successes <= 0:
        return 1.0
    if successes > trials or rate <= 0:
        return 0.0
    if rate >= 1:
        return 1.0
    logs = [math.lgamma(trials + 1) - math.lgamma(i + 1) - math.lgamma(trials - i + 1)
            + i * math.log(rate) + (trials - i) * math.log1p(-rate) for i in range(successes, trials + 1)]
    top = max(logs)
    return min(1.0, math.exp(top) * sum(math.exp(v - top) for v in logs))


Z_95 = 1.959963984540054  # the 97.5 % point of the standard normal


def tango_score(b: int, c: int, n: int, delta: float) -> float:
    """Tango's (1998) score statistic for H0: p12 - p21 = delta, from n pairs of which b are
    (right, wrong) and c are (wrong, right):
        Z = (b - c - n delta) / sqrt(n (2 q21 + delta (1 - delta))),
    q21 the maximum-likelihood p21 under the constraint, the root of A q^2 + B q + C = 0 with
        A = 2n, B = -b - c + (2n - b + c) delta, C = -c delta (1 - delta)."""
    a_coef = 2.0 * n
    b_coef = -b - c + (2.0 * n - b + c) * delta
    c_coef = -c * delta * (1.0 - delta)
    q21 = max(0.0, (math.sqrt(max(b_coef * b_coef - 4.0 * a_coef * c_coef, 0.0)) - b_coef) / (2.0 * a_coef))
    variance = n * (2.0 * q21 + delta * (1.0 - delta))
    diff = b - c - n * delta
    if variance <= 0.0:
        return 0.0 if diff == 0 else math.copysign(math.inf, diff)
    return diff / math.sqrt(variance)


def tango_interval(b: int, c: int, n: int, z: float = Z_95) -> tuple[float, float]:
    """The 95 % score interval for p12 - p21 (Tango 1998): every delta with |Z(delta)| <= z. Z falls
    as delta grows, so each end is found by bisection on one side of the estimate (b - c) / n."""
    if n == 0:
        return -1.0, 1.0
    estimate = (b - c) / n

    def root(lo: float, hi: float, target: float) -> float:  # Z(lo) >= target >= Z(hi)
        for _ in range(100):
            mid = (lo + hi) / 2
            if tango_score(b, c, n, mid) > target:
                lo = mid
            else:
                hi = mid
        return (lo + hi) / 2

    lower = -1.0 if tango_score(b, c, n, -1.0) <= z else root(-1.0, estimate, z)
    upper = 1.0 if tango_score(b, c, n, 1.0) >= -z else root(estimate, 1.0, -z)
    return lower, upper


DROP_INTERVAL_METHOD = "Tango 1998 score interval for a difference of paired proportions"


def paired_drop(float_correct: np.ndarray, int8_correct: np.ndarray) -> dict:
    """Accuracy drop (pt) between paired predictions and its 95 % interval.

    b samples are "float right, int8 wrong", c the reverse; the drop is (b - c) / n. The interval is
    Tango's score interval: unlike one conditioned on the b + c discordant pairs, it does not
    collapse to [0, 0] when the models never disagree, and it covers about 95 % of the time also
    when one kind of disagreement is rare (tests/test_drop_interval.py simulates it).
    """
    f = np.asarray(float_correct, bool)
    q = np.asarray(int8_correct, bool)
    n = int(f.size)
    b = int(np.sum(f & ~q))
    c = int(np.sum(~f & q))
    drop = 100.0 * (b - c) / n if n else 0.0
    lower, upper = tango_interval(b, c, n)
    return {"drop_pt": drop, "drop_ci95_pt": [100.0 * lower, 100.0 * upper],
            "drop_interval": DROP_INTERVAL_METHOD,
            "discordant": {"float_only_correct": b, "int8_only_correct": c}, "samples": n}


class EndMetrics:
    """Accumulates end-metric inputs over batches: predictions, correctness, output error."""

    def __init__(self, kind: str, threshold: float | None = None):
        self.kind = kind  # "classification" | "score"
        self.threshold = threshold
        self.output = ErrorSums()
        self.float_top1: list[np.ndarray] = []
        self.int8_top1: list[np.ndarray] = []
        self.float_top5: list[np.ndarray] = []
        self.int8_top5: list[np.ndarray] = []
        self.labels: list[np.ndarray] = []
        self.float_decisions: list[np.ndarray] = []
        self.int8_decisions: list[np.ndarray] = []
        self.classes = 0
        self.samples = 0

    def update(self, float_out: np.ndarray, int8_out: np.ndarray, labels: np.ndarray | None,
               score_inputs: tuple[np.ndarray, np.ndarray] | None = None) -> None:
        self.output.update(float_out, int8_out)
        n = float_out.shape[0]
        self.samples += n
        if self.kind == "classification":
            f = float_out.reshape(n, -1)
            q = int8_out.reshape(n, -1)
            self.classes = f.shape[1]
            self.float_top1.append(np.argmax(f, axis=1))
            self.int8_top1.append(np.argmax(q, axis=1))
            if labels is not None:
                self.labels.append(np.asarray(labels))
                if self.classes > 5:
                    self.float_top5.append(_in_top5(f, labels))
                    self.int8_top5.append(_in_top5(q, labels))
        elif self.threshold is not None:
            fs, qs = score_inputs if score_inputs is not None else (float_out.reshape(n, -1).mean(1),
                                                                    int8_out.reshape(n, -1).mean(1))
            self.float_decisions.append(fs > self.threshold)
            self.int8_decisions.append(qs > self.threshold)

    def result(self) -> dict:
        out = {"output_sqnr_db": round_db(self.output.sqnr_db())}
        if self.kind == "classification":
            f = np.concatenate(self.float_top1) if self.float_top1 else np.zeros(0, int)
            q = np.concatenate(self.int8_top1) if self.int8_top1 else np.zeros(0, int)
            out["agreement_pct"] = float(100.0 * np.mean(f == q)) if f.size else 0.0
            if self.labels:
                y = np.concatenate(self.labels)
                fc, qc = f == y, q == y
                drop = paired_drop(fc, qc)
                out.update({"metric": "top1", "float": float(100 * fc.mean()), "int8": float(100 * qc.mean()),
                            **drop, **majority_figures(fc, y)})
                if self.float_top5:
                    f5, q5 = np.concatenate(self.float_top5), np.concatenate(self.int8_top5)
                    out["top5"] = {"float": float(100 * f5.mean()), "int8": float(100 * q5.mean()),
                                   **paired_drop(f5, q5)}
                out["predictions"] = {"float": f.tolist(), "int8": q.tolist(), "labels": y.tolist()}
            else:
                out.update({"metric": "agreement", "float": 100.0, "int8": out["agreement_pct"],
                            "drop_pt": 100.0 - out["agreement_pct"], "samples": int(f.size)})
        else:
            out.update({"metric": "output_sqnr", "samples": self.samples})
            if self.float_decisions:
                fd, qd = np.concatenate(self.float_decisions), np.concatenate(self.int8_decisions)
                out["decision_flips_pct"] = float(100.0 * np.mean(fd != qd))
                out["threshold"] = self.threshold
        return out


def majority_figures(float_correct: np.ndarray, labels: np.ndarray) -> dict:
    """The rate of always answering the most frequent class of these labels, and the p-value of the
    float top-1 being above it (one-sided exact binomial test)."""
    n = int(labels.size)
    if n == 0:
        return {"majority_class_pct": 0.0, "float_vs_majority_p": None}
    rate = float(np.bincount(labels.astype(np.int64)).max()) / n
    return {"majority_class_pct": 100.0 * rate,
            "float_vs_majority_p": binomial_test_above(int(np.sum(float_correct)), n, rate)}


def _in_top5(scores: np.ndarray, labels: np.ndarray) -> np.ndarray:
    top = np.argsort(-scores, axis=1, kind="stable")[:, :5]
    return np.any(top == np.asarray(labels)[:, None], axis=1)
