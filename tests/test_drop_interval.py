"""The 95 % interval of the accuracy drop: Tango's score interval for a difference of paired
proportions (Tango, Statistics in Medicine, 1998), checked against an implementation written here
from the model alone, against a value derived by hand, and for coverage by simulation.

Model: each evaluation sample is one of four kinds: both right, float right and int8 wrong (b, p12),
float wrong and int8 right (c, p21), both wrong. The drop is p12 - p21, estimated by (b - c) / n.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from qfit.measure.compare import Z_95, paired_drop, tango_interval


def _log_likelihood(b: int, c: int, n: int, delta: float, q21: float) -> float:
    """Multinomial log-likelihood of (b, c, rest) at p12 = q21 + delta, p21 = q21."""
    cells = ((b, q21 + delta), (c, q21), (n - b - c, 1.0 - 2.0 * q21 - delta))
    total = 0.0
    for count, p in cells:
        if count:
            if p <= 0:
                return -math.inf
            total += count * math.log(p)
    return total


def _constrained_mle(b: int, c: int, n: int, delta: float) -> float:
    """p21 maximising the likelihood under p12 - p21 = delta, by golden-section search over the
    feasible p21 (the log-likelihood is concave in p21): independent of Tango's closed form."""
    lo, hi = max(0.0, -delta), (1.0 - delta) / 2.0
    ratio = (math.sqrt(5) - 1) / 2
    for _ in range(200):
        x1, x2 = hi - ratio * (hi - lo), lo + ratio * (hi - lo)
        if _log_likelihood(b, c, n, delta, x1) < _log_likelihood(b, c, n, delta, x2):
            lo = x1
        else:
            hi = x2
    return (lo + hi) / 2


def _score(b: int, c: int, n: int, delta: float) -> float:
    """(b - c - n delta) over its standard error under H0, n (p12 + p21 - delta^2) with the
    constrained maximum-likelihood p21 (the score test of the multinomial model)."""
    q21 = _constrained_mle(b, c, n, delta)
    variance = n * (2 * q21 + delta - delta * delta)
    return (b - c - n * delta) / math.sqrt(variance) if variance > 0 else math.copysign(math.inf, b - c - n * delta)


def independent_interval(b: int, c: int, n: int) -> tuple[float, float]:
    """{delta : |score| <= z}: scan a grid of 1001 deltas, then refine each end by bisection."""
    grid = np.linspace(-1 + 1e-9, 1 - 1e-9, 1001)
    inside = [d for d in grid if abs(_score(b, c, n, d)) <= Z_95]
    step = grid[1] - grid[0]

    def refine(outside: float, inner: float) -> float:
        for _ in range(60):
            mid = (outside + inner) / 2
            if abs(_score(b, c, n, mid)) <= Z_95:
                inner = mid
            else:
                outside = mid
        return inner

    lower = inside[0] if inside[0] <= grid[0] else refine(inside[0] - step, inside[0])
    upper = inside[-1] if inside[-1] >= grid[-1] else refine(inside[-1] + step, inside[-1])
    return lower, upper


@pytest.mark.parametrize("b, c, n", [(0, 0, 600), (5, 1, 600), (12, 0, 600), (30, 9, 600), (3, 7, 540),
                                     (433, 4, 600), (1, 0, 20)])
def test_tango_interval_equals_an_independent_score_interval(b, c, n):
    assert tango_interval(b, c, n) == pytest.approx(independent_interval(b, c, n), abs=2e-6)


def test_no_disagreement_gives_the_interval_derived_by_hand():
    # b = c = 0: the constrained MLE of p21 is 0 for delta > 0, so Z = -sqrt(n delta / (1 - delta)),
    # and |Z| = z at delta = z^2 / (n + z^2) (derived by hand from the score statistic): for n = 600
    # that is 0.636 pt on either side, where the conditional interval collapsed to [0, 0].
    bound = Z_95 ** 2 / (600 + Z_95 ** 2)
    assert tango_interval(0, 0, 600) == pytest.approx((-bound, bound), rel=1e-9)
    both_right = np.ones(600, bool)
    result = paired_drop(both_right, both_right)
    assert result["drop_pt"] == 0 and result["drop_ci95_pt"] == pytest.approx([-100 * bound, 100 * bound])


# Regimes of a good int8 model on n = 600 samples: disagreements are few and mostly one way.
REGIMES = [(0.005, 0.001), (0.02, 0.003), (0.05, 0.01)]


@pytest.mark.parametrize("p12, p21", REGIMES)
def test_interval_covers_the_true_drop_at_least_93_percent_of_the_time(p12, p21):
    n, replicates = 600, 4000
    rng = np.random.default_rng(1998)
    counts = rng.multinomial(n, [p12, p21, 1 - p12 - p21], size=replicates)[:, :2]
    pairs, how_often = np.unique(counts, axis=0, return_counts=True)
    covered = 0
    for (b, c), times in zip(pairs, how_often):
        lower, upper = tango_interval(int(b), int(c), n)
        covered += times * (lower <= p12 - p21 <= upper)
    coverage = covered / replicates
    # Monte-Carlo standard error about 0.0035 at 0.95: 0.93 is six of them below the nominal level
    assert coverage >= 0.93, coverage
