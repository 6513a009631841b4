"""gate: the accuracy part of the verdict — the drop gate, the expected float accuracy, and warnings.

Without --max-drop a drop above DEFAULT_MAX_DROP_PT fails: per-channel 8-bit post-training
quantization keeps top-1 within about 2 % of float on the networks measured by Krishnamoorthi
(arXiv 1806.08342, 2018), so a larger drop on the user's data says something went wrong. Without
labels the same number bounds the argmax disagreement: where int8 and float pick the same class they
are both right or both wrong, so |top-1 drop| <= disagreement whatever the labels would have been.
Score outputs have no drop; with --threshold the same bound holds for the decision flips.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from qfit.errors import QfitError

DEFAULT_MAX_DROP_PT = 2.0
DEFAULT_FLOAT_TOLERANCE_PT = 3.0  # "a few points": about three standard errors of a top-1 on 600 samples
MAJORITY_ALPHA = 0.05             # level of the one-sided exact binomial test against the majority rate


@dataclass(frozen=True)
class GateOptions:
    max_drop_pt: float | None = None          # None: DEFAULT_MAX_DROP_PT
    enabled: bool = True                      # False: no accuracy gate at all (--no-accuracy-gate)
    on_upper_bound: bool = False              # gate the upper end of the drop's 95 % interval
    expect_float_pt: float | None = None      # float top-1 measured in training (--expect-float)
    float_tolerance_pt: float = DEFAULT_FLOAT_TOLERANCE_PT


def check_gate_options(gate: GateOptions) -> None:
    """One-line errors for the gate settings (before any work)."""
    if gate.max_drop_pt is not None and not math.isfinite(gate.max_drop_pt):
        # a negative target is allowed: it asks int8 to beat float by that many points
        raise QfitError(f"--max-drop: must be a finite number of points, got {gate.max_drop_pt}")
    if not gate.enabled and (gate.max_drop_pt is not None or gate.on_upper_bound):
        # contradictory: a limit (or its upper-bound reading) that would never be applied
        given = "--max-drop" if gate.max_drop_pt is not None else "--gate-upper-bound"
        raise QfitError(f"--no-accuracy-gate: cannot be combined with {given}, which sets the gate it turns off")
    if gate.expect_float_pt is not None and not 0.0 <= gate.expect_float_pt <= 100.0:
        raise QfitError(f"--expect-float: must be a top-1 accuracy in percent (0 to 100), got {gate.expect_float_pt}")
    if not (math.isfinite(gate.float_tolerance_pt) and gate.float_tolerance_pt >= 0):
        raise QfitError(f"--expect-float-tolerance: must be a number of points >= 0, got {gate.float_tolerance_pt}")


def target_drop_pt(gate: GateOptions) -> float | None:
    """The largest drop the verdict allows (the repair search aims at it), None with the gate off."""
    if not gate.enabled:
        return None
    return DEFAULT_MAX_DROP_PT if gate.max_drop_pt is None else gate.max_drop_pt


def gated_figure(accuracy: dict) -> tuple[str, float | None, float | None]:
    """(what is gated, its value in points, the upper end of its 95 % interval when there is one)."""
    metric = accuracy.get("metric")
    if metric == "top1":
        return "top-1 drop", accuracy["drop_pt"], accuracy["drop_ci95_pt"][1]
    if metric == "agreement":
        return "argmax disagreement", accuracy["drop_pt"], None
    if "decision_flips_pct" in accuracy:
        return "decision flips", accuracy["decision_flips_pct"], None
    return "none", None, None


def accuracy_gate(accuracy: dict, gate: GateOptions) -> dict:
    """The report's verdict.accuracy_gate: what was compared with which limit, and the outcome."""
    target = target_drop_pt(gate)
    what, value, upper = gated_figure(accuracy)
    source = "off" if not gate.enabled else ("default" if gate.max_drop_pt is None else "given")
    section = {"gated": what, "max_drop_pt": target, "source": source,
               "compares": "upper bound" if gate.on_upper_bound and upper is not None else "estimate",
               "value_pt": value, "upper_bound_pt": upper,
               "upper_within_gate": None if upper is None or target is None else upper <= target,
               "passed": None}
    if target is None:
        section["reason"] = "accuracy gate switched off (--no-accuracy-gate)"
    elif value is None:
        section["reason"] = ("the output is a score, not classes: no drop to gate (give --threshold to gate "
                             "the decision flips)")
    else:
        compared = upper if section["compares"] == "upper bound" else value
        section["passed"] = compared <= target
        limit = f"{'default ' if source == 'default' else ''}limit {target:g} pt"
        label = f"upper end of the {what}'s 95 % interval" if section["compares"] == "upper bound" else what
        section["reason"] = f"{label} {compared:.2f} pt {'<=' if section['passed'] else '>'} {limit}"
        if section["compares"] == "estimate" and upper is not None:
            section["reason"] += (f"; the upper end of its 95 % interval, {upper:.2f} pt, is "
                                  f"{'inside' if section['upper_within_gate'] else 'outside'} the limit")
    return section


def float_check(accuracy: dict, gate: GateOptions) -> dict | None:
    """verdict.float_check: the measured float top-1 against the one measured in training."""
    if gate.expect_float_pt is None:
        return None
    check_expectation_has_labels(gate, accuracy.get("metric") == "top1")
    measured, expected = accuracy["float"], gate.expect_float_pt
    passed = abs(measured - expected) <= gate.float_tolerance_pt
    section = {"expected_pt": expected, "measured_pt": measured, "tolerance_pt": gate.float_tolerance_pt,
               "passed": passed, "message": None}
    if not passed:
        section["message"] = (f"float top-1 measured here {measured:.2f} % is {abs(measured - expected):.2f} pt "
                              f"from the {expected:.2f} % expected from training (tolerance "
                              f"{gate.float_tolerance_pt:g} pt): preprocessing or labels differ from training")
    return section


def check_expectation_has_labels(gate: GateOptions, labelled: bool) -> None:
    """--expect-float needs labels; checked as soon as the evaluation folder is open."""
    if gate.expect_float_pt is not None and not labelled:
        raise QfitError("--expect-float: needs labelled evaluation data (class subfolders or --labels); "
                        "this run has no labels to measure the float top-1 on")


def accuracy_warnings(accuracy: dict) -> list[str]:
    """Warnings every view shows: a float top-1 not significantly above always guessing the most
    frequent class means the labels, their order or the preprocessing do not match the model."""
    warnings = []
    p_value = accuracy.get("float_vs_majority_p")
    if accuracy.get("metric") == "top1" and p_value is not None and p_value >= MAJORITY_ALPHA:
        warnings.append(f"float top-1 {accuracy['float']:.2f} % is not significantly above the majority-class rate "
                        f"{accuracy['majority_class_pct']:.2f} % (one-sided exact binomial test, p = {p_value:.3g}): "
                        f"the labels, their class order or the preprocessing may not match the model")
    return warnings


CLIPPING_METHODS = ("percentile", "mse", "entropy")  # calibration methods that may clip ranges


def judge(accuracy: dict, gate: GateOptions, method: str | None = None) -> dict:
    """The accuracy part of the verdict: {"accuracy_ok", "failed", "accuracy_gate", "float_check",
    "warnings"}; "failed" lists "accuracy", "float_accuracy" and/or "float_at_chance". `method`: the calibration method,
    named in the reason when the gate fails and the method clips ranges."""
    section = accuracy_gate(accuracy, gate)
    if section["passed"] is False and method in CLIPPING_METHODS:
        section["reason"] += (f"; --method {method} clips ranges: compare with --method minmax "
                              f"(every method reads the same calibration statistics)")
    expected = float_check(accuracy, gate)
    failed = []
    if section["passed"] is False:
        failed.append("accuracy")
    if expected is not None and not expected["passed"]:
        failed.append("float_accuracy")
    warnings = accuracy_warnings(accuracy)
    if warnings and gate.enabled:
        # a float model at chance on these labels means the measurement itself is broken (labels, their
        # order or the preprocessing): no drop measured on it can pass; --no-accuracy-gate relaxes it
        failed.append("float_at_chance")
    return {"accuracy_ok": section["passed"] is not False, "failed": failed, "accuracy_gate": section,
            "float_check": expected, "warnings": warnings}
