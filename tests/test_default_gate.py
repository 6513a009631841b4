"""The accuracy verdict end to end through `qfit check` (qfit.cli.main) on real models.

Models and data: the demo (calib_demo/, with the preprocessing README.md gives) and the digits CNN on
scikit-learn's bundled optical-digits set (tests/digits_folders.py; float 533 / 540 held out, from
tests/models/README.md). Default limit: 2.0 pt (Krishnamoorthi, arXiv 1806.08342, 2018).
"""
from __future__ import annotations

import json
import pathlib
import sys

import numpy as np
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))
import digits_folders  # noqa: E402

from qfit.cli.main import main  # noqa: E402

DEMO = pathlib.Path(__file__).resolve().parent.parent / "calib_demo"
FAST = ["--quiet", "--isolated-samples", "0"]


def _demo(out: pathlib.Path, *extra: str, preprocess: bool = True) -> tuple[int, dict]:
    args = ["check", str(DEMO / "model.onnx"), "--calib", str(DEMO / "calib"), "--eval", str(DEMO / "eval"),
            "--flash", "1MiB", "--sram", "256KiB", "--out", str(out), "--limit", "64", "--eval-limit", "240", *FAST,
            *extra]
    if preprocess:
        args += ["--preprocess", str(DEMO / "preprocess.json")]
    code = main(args)
    return code, json.loads((out / "report.json").read_text())


@pytest.fixture(scope="module")
def digits(tmp_path_factory):
    return digits_folders.write_folders(tmp_path_factory.mktemp("digits_gate"))


def _digits(out: pathlib.Path, folders, *extra: str, eval_dir: str | None = None) -> tuple[int, dict]:
    calib, evaluation = folders
    code = main(["check", str(digits_folders.MODEL), "--calib", calib, "--eval", eval_dir or evaluation,
                 "--input-shape", "image=1x1x8x8", "--flash", "256KiB", "--sram", "64KiB", "--out", str(out),
                 *FAST, *extra])
    report = json.loads((out / "report.json").read_text()) if (out / "report.json").exists() else None
    return code, report


def test_a_hard_clipped_demo_run_fails_without_max_drop(tmp_path):
    # percentile 95 clips 5 % of every activation: the demo's top-1 falls by tens of points
    code, report = _demo(tmp_path / "clipped", "--percentile", "95")
    gate = report["verdict"]["accuracy_gate"]
    assert report["accuracy"]["drop_pt"] > 10.0
    assert code == 1 and report["verdict"]["failed"] == ["accuracy"]
    assert gate["source"] == "default" and gate["max_drop_pt"] == 2.0 and gate["passed"] is False
    # the explicit off switch: the same run then judges flash and SRAM only
    code, report = _demo(tmp_path / "off", "--percentile", "95", "--no-accuracy-gate")
    assert code == 0 and report["verdict"]["accuracy_gate"]["source"] == "off"


def test_demo_without_its_preprocessing_fails_the_expected_float_accuracy(tmp_path):
    # calib_demo/README.md: 93 % float top-1 on the evaluation images with preprocess.json; without it
    # the model sees raw pixels and scores far less
    code, report = _demo(tmp_path / "raw", "--expect-float", "93", preprocess=False)
    check = report["verdict"]["float_check"]
    assert report["accuracy"]["float"] < 50.0
    assert code == 1 and "float_accuracy" in report["verdict"]["failed"] and check["passed"] is False
    assert "preprocessing or labels differ from training" in check["message"]


def test_digits_pass_the_default_gate_and_the_expected_float(tmp_path, digits):
    code, report = _digits(tmp_path / "out", digits, "--expect-float", "98.7")
    assert report["accuracy"]["float"] == pytest.approx(100 * 533 / 540, abs=0.01)
    assert code == 0 and report["verdict"]["accuracy_gate"]["passed"] is True
    assert report["verdict"]["float_check"]["passed"] is True and report["verdict"]["warnings"] == []


def test_gating_on_the_upper_bound_fails_where_the_estimate_passes(tmp_path, digits):
    # a 0.5 pt limit: the digits drop is within it, the upper end of its 95 % interval on 540 samples is not
    code, report = _digits(tmp_path / "estimate", digits, "--max-drop", "0.5")
    assert code == 0 and report["verdict"]["accuracy_gate"]["upper_within_gate"] is False
    code, report = _digits(tmp_path / "upper", digits, "--max-drop", "0.5", "--gate-upper-bound")
    assert code == 1 and report["verdict"]["accuracy_gate"]["compares"] == "upper bound"


def test_a_wrong_class_order_gives_the_majority_warning(tmp_path, digits):
    # Labels by class names in a CSV, with an order that is not the model's (alphabetical): the float
    # top-1 falls to chance level and every view carries the warning (report.json's verdict.warnings).
    _, evaluation = digits
    names = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]
    rows = ["file,label"] + [f"{p.relative_to(evaluation)},{names[int(p.parent.name)]}"
                             for p in sorted(pathlib.Path(evaluation).rglob("*.npy"))]
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("\n".join(rows) + "\n")
    code, _ = _digits(tmp_path / "refused", digits, "--labels", str(csv_path))
    assert code == 2  # names without an order: refused
    code, report = _digits(tmp_path / "wrong", digits, "--labels", str(csv_path),
                           "--class-order", ",".join(sorted(names)))
    assert report["accuracy"]["float"] < 30.0
    assert report["verdict"]["warnings"] and "majority-class rate" in report["verdict"]["warnings"][0]
    code, report = _digits(tmp_path / "right", digits, "--labels", str(csv_path), "--class-order", ",".join(names))
    assert report["accuracy"]["float"] == pytest.approx(100 * 533 / 540, abs=0.01) and code == 0


def test_unlabeled_digits_are_gated_on_argmax_disagreement(tmp_path, digits):
    calib, evaluation = digits
    flat = tmp_path / "flat"
    flat.mkdir()
    for i, path in enumerate(sorted(pathlib.Path(evaluation).rglob("*.npy"))):
        np.save(flat / f"x_{i:04d}.npy", np.load(path))
    code, report = _digits(tmp_path / "unlabeled", digits, eval_dir=str(flat))
    gate = report["verdict"]["accuracy_gate"]
    assert report["accuracy"]["metric"] == "agreement" and gate["gated"] == "argmax disagreement"
    assert code == 0 and gate["passed"] is True and gate["value_pt"] <= 2.0
    code, report = _digits(tmp_path / "clipped", digits, "--percentile", "80", eval_dir=str(flat))
    assert report["accuracy"]["drop_pt"] > 2.0 and code == 1
    assert report["verdict"]["failed"] == ["accuracy"]


def test_preprocessing_options_with_array_data_exit_2(tmp_path, digits, capfd):
    code, report = _digits(tmp_path / "out", digits, "--mean", "0.5", "--std", "0.25")
    err = capfd.readouterr().err
    assert code == 2 and report is None and not (tmp_path / "out").exists()
    assert len(err.strip().splitlines()) == 1 and "apply to images only" in err


def test_expect_float_without_labels_exits_2_before_any_pass(tmp_path, digits, capfd):
    calib, _ = digits
    code, report = _digits(tmp_path / "out", digits, "--expect-float", "98.7", eval_dir=calib)
    err = capfd.readouterr().err
    assert code == 2 and report is None and not (tmp_path / "out").exists()
    assert "--expect-float: needs labelled evaluation data" in err and len(err.strip().splitlines()) == 1


def test_labels_in_the_wrong_class_order_fail_the_run_by_default(tmp_path, digits):
    # The digits CNN scores 533 / 540 on its held-out split (tests/digits_folders.py). With the class
    # order rotated by one, every label names the wrong output: the float model falls to chance, and no
    # drop measured against such labels may pass (exact binomial test against the majority class).
    rotated = ",".join(str((k + 1) % 10) for k in range(10))
    code, report = _digits(tmp_path / "rotated", digits, "--class-order", rotated)
    assert report["accuracy"]["float"] < 20.0
    assert code == 1 and "float_at_chance" in report["verdict"]["failed"]
    assert "majority-class rate" in report["verdict"]["warnings"][0]
    # the explicit off switch relaxes it; the warning stays
    code, report = _digits(tmp_path / "rotated_off", digits, "--class-order", rotated, "--no-accuracy-gate")
    assert code == 0 and report["verdict"]["warnings"]
