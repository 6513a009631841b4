"""The accuracy part of the verdict (qfit.measure.gate) and the figures it reads (qfit.measure.compare).

Sources: the default limit of 2.0 pt is the "within 2 %" of per-channel 8-bit post-training
quantization reported by Krishnamoorthi (arXiv 1806.08342, 2018); the majority-class test is the
one-sided exact binomial test, whose tail is summed here with `fractions` (exact arithmetic).
"""
from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from qfit.errors import QfitError
from qfit.measure.compare import EndMetrics, binomial_test_above
from qfit.measure.gate import DEFAULT_MAX_DROP_PT, GateOptions, check_gate_options, judge


def _exact_upper_tail(k: int, n: int, p: Fraction) -> Fraction:
    return sum(Fraction(math.comb(n, i)) * p ** i * (1 - p) ** (n - i) for i in range(k, n + 1))


@pytest.mark.parametrize("k, n, p", [(55, 100, Fraction(1, 2)), (30, 60, Fraction(1, 3)), (120, 600, Fraction(1, 6)),
                                     (0, 10, Fraction(1, 2)), (10, 10, Fraction(9, 10))])
def test_binomial_test_equals_the_exact_tail(k, n, p):
    assert binomial_test_above(k, n, float(p)) == pytest.approx(float(_exact_upper_tail(k, n, p)), rel=1e-9, abs=1e-15)


def _accuracy(float_correct: int, int8_correct: int, n: int = 600, classes: int = 6, both: int | None = None) -> dict:
    """End metrics of a classification run with balanced labels, built through EndMetrics."""
    labels = np.arange(n) % classes
    f_right = np.arange(n) < float_correct
    q_right = np.arange(n) < int8_correct if both is None else np.arange(n) < both
    metrics = EndMetrics("classification")
    eye = np.eye(classes, dtype=np.float32)
    metrics.update(eye[np.where(f_right, labels, (labels + 1) % classes)],
                   eye[np.where(q_right, labels, (labels + 1) % classes)], labels)
    out = metrics.result()
    out.pop("predictions")
    return out


def test_without_max_drop_the_default_gate_fails_a_drop_over_two_points():
    accuracy = _accuracy(558, 540)  # 93 % -> 90 %: a 3 pt drop
    judged = judge(accuracy, GateOptions())
    assert judged["accuracy_gate"]["source"] == "default"
    assert judged["accuracy_gate"]["max_drop_pt"] == DEFAULT_MAX_DROP_PT == 2.0
    assert judged["failed"] == ["accuracy"] and not judged["accuracy_ok"]
    assert "default limit 2 pt" in judged["accuracy_gate"]["reason"]
    assert "compare with --method minmax" in judge(accuracy, GateOptions(), "entropy")["accuracy_gate"]["reason"]
    assert "--method" not in judge(accuracy, GateOptions(), "minmax")["accuracy_gate"]["reason"]
    assert judge(_accuracy(558, 552), GateOptions())["accuracy_ok"]            # 1 pt: passes
    off = judge(accuracy, GateOptions(enabled=False))
    assert off["accuracy_ok"] and off["failed"] == [] and off["accuracy_gate"]["source"] == "off"


def test_gating_on_the_upper_bound_fails_a_small_drop_with_a_wide_interval():
    accuracy = _accuracy(558, 549)  # 1.5 pt on 600 samples: the estimate passes 2 pt, its interval does not
    assert accuracy["drop_ci95_pt"][1] > 2.0
    estimate = judge(accuracy, GateOptions())
    upper = judge(accuracy, GateOptions(on_upper_bound=True))
    assert estimate["accuracy_ok"] and estimate["accuracy_gate"]["upper_within_gate"] is False
    assert not upper["accuracy_ok"] and upper["accuracy_gate"]["compares"] == "upper bound"


def test_unlabeled_runs_gate_the_argmax_disagreement():
    metrics = EndMetrics("classification")
    scores = np.eye(4, dtype=np.float32)[np.arange(100) % 4]
    flipped = scores.copy()
    flipped[:3] = np.roll(flipped[:3], 1, axis=1)  # 3 of 100 samples change class
    metrics.update(scores, flipped, None)
    judged = judge(metrics.result(), GateOptions())
    assert judged["accuracy_gate"]["gated"] == "argmax disagreement"
    assert judged["accuracy_gate"]["value_pt"] == pytest.approx(3.0) and not judged["accuracy_ok"]


def test_expected_float_accuracy_far_from_the_measured_one_fails():
    accuracy = _accuracy(146, 140)  # float 24.33 %, as the demo without its preprocessing
    judged = judge(accuracy, GateOptions(expect_float_pt=93.0))
    assert "float_accuracy" in judged["failed"]
    assert "preprocessing or labels differ from training" in judged["float_check"]["message"]
    assert judge(_accuracy(550, 548), GateOptions(expect_float_pt=93.0))["float_check"]["passed"]  # 91.67 %


def test_float_accuracy_near_the_majority_rate_is_a_warning():
    # 6 balanced classes: always guessing one class scores 16.67 %; 110 / 600 = 18.33 % is not
    # significantly above it (exact one-sided binomial p ~ 0.15), 150 / 600 = 25 % is.
    near_chance = judge(_accuracy(110, 110), GateOptions())
    assert near_chance["warnings"] and "majority-class rate 16.67 %" in near_chance["warnings"][0]
    assert judge(_accuracy(150, 150), GateOptions())["warnings"] == []


def test_bad_gate_options_are_refused():
    for gate, flag in ((GateOptions(max_drop_pt=math.inf), "--max-drop"),
                       (GateOptions(expect_float_pt=130), "--expect-float"),
                       (GateOptions(float_tolerance_pt=-1), "--expect-float-tolerance")):
        with pytest.raises(QfitError, match=flag):
            check_gate_options(gate)
    metrics = EndMetrics("classification")
    metrics.update(np.eye(3, dtype=np.float32), np.eye(3, dtype=np.float32), None)
    with pytest.raises(QfitError, match="--expect-float: needs labelled evaluation data"):
        judge(metrics.result(), GateOptions(expect_float_pt=90.0))
