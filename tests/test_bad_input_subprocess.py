"""Bad input in a real process (tests/cli_harness.py): what only a subprocess shows. Each case
records the exit status, whether a traceback was printed, the SHA-256 of every input before and after
the run, and of every output; docs/bad-input.md ("Round two") lists each case with its message.

These runs take a few seconds each (a fresh interpreter imports onnx and onnxruntime), so only the
cases that need a process are here; the rest run in process in tests/test_bad_input_round2.py.
"""
from __future__ import annotations

import json
import os
import shutil

import pytest

from cli_harness import run_case
from test_bad_input import SIZES, calib, conv_model, model  # noqa: F401  (fixtures)

pytestmark = pytest.mark.slow


def assert_one_line_refusal(run, *fragments):
    assert run.exit_code == 2, run.summary()
    assert not run.traceback, run.summary()
    lines = run.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("qfit: error: "), run.summary()
    for fragment in fragments:
        assert fragment in lines[0], run.summary()
    assert run.inputs_unchanged, run.summary()


def test_bad_input_process_budget_json_over_the_model_leaves_it_intact(tmp_path, model):
    run = run_case(["budget", model, *SIZES, "--json", model], inputs=[model], outputs=[model])
    assert_one_line_refusal(run, "--json:", "would destroy the input")


def test_bad_input_process_check_out_over_a_fifo_report(tmp_path, model, calib):
    out = tmp_path / "out"
    out.mkdir()
    os.mkfifo(out / "report.json")
    run = run_case(["check", model, "--calib", calib, *SIZES, "--out", out, "--quiet"],
                   inputs=[model, calib], outputs=[out], timeout_s=120)
    assert_one_line_refusal(run, f"{out / 'report.json'} exists and is not a regular file")
    assert run.outputs_after[str(out)] == {".": "dir", "report.json": "fifo"}  # nothing written beside it


def test_bad_input_process_stdout_closed_early_keeps_the_verdict(tmp_path, model, calib):
    """`qfit ... | head -1`: the reader goes away after one line. No traceback, no complaint, and
    the exit status is the verdict's (the files were written before the summary)."""
    out = tmp_path / "out"
    run = run_case(["check", model, "--calib", calib, *SIZES, "--out", out, "--quiet"],
                   inputs=[model, calib], outputs=[out], shell_tail="| head -1")
    assert run.exit_code in (0, 1) and not run.traceback and run.stderr == "", run.summary()
    report = json.loads((out / "report.json").read_text())
    assert run.exit_code == report["verdict"]["exit_code"]
    assert sorted(run.outputs_after[str(out)]) == [".", "net_int8.onnx", "report.html", "report.json", "report.md"]
    assert run.inputs_unchanged
    budget = run_case(["budget", model, *SIZES], inputs=[model], shell_tail="| head -1")
    assert budget.exit_code == 0 and not budget.traceback and budget.stderr == "", budget.summary()
    assert budget.stdout.count("\n") == 1


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="needs /dev/full (a device that is always full)")
def test_bad_input_process_stdout_full(tmp_path, model):
    run = run_case(["budget", model, *SIZES], inputs=[model], shell_tail="> /dev/full")
    assert_one_line_refusal(run, "standard output: cannot write the summary (No space left on device)")


def test_bad_input_process_fifo_in_the_calibration_folder_is_skipped_and_counted(tmp_path, model, calib):
    os.mkfifo(os.path.join(calib, "stream.npy"))  # no writer: reading it would block forever
    out = tmp_path / "out"
    run = run_case(["check", model, "--calib", calib, *SIZES, "--out", out, "--quiet"],
                   inputs=[model, calib], outputs=[out], timeout_s=120)
    assert run.exit_code in (0, 1) and not run.traceback, run.summary()
    assert run.inputs_unchanged and run.inputs_after[calib]["stream.npy"] == "fifo"
    calibration = json.loads((out / "report.json").read_text())["calibration"]
    assert calibration["samples"] == 4 and calibration["skipped"] == 1
    assert calibration["skipped_files"][0]["file"] == "stream.npy"
    assert "not a regular file" in calibration["skipped_files"][0]["reason"]
    # the summary says why files were skipped without crediting --skip-bad, which was not given
    assert "Note: skipped 1 calibration and 1 evaluation files: unreadable (--skip-bad) or not regular files" \
        in run.stdout


@pytest.mark.parametrize("flag", ["--labels", "--preprocess"])
def test_bad_input_process_small_input_is_a_fifo(tmp_path, model, calib, flag):
    fifo = tmp_path / "stream"
    os.mkfifo(fifo)
    extra = [flag, fifo] + (["--eval", calib] if flag == "--labels" else [])
    run = run_case(["check", model, "--calib", calib, *SIZES, "--out", tmp_path / "out", "--quiet", *extra],
                   inputs=[model, calib, fifo], outputs=[tmp_path / "out"], timeout_s=120)
    assert_one_line_refusal(run, f"{fifo}: not a regular file")
    assert run.outputs_after[str(tmp_path / "out")] is None


def test_bad_input_process_thread_count_capped(tmp_path, model, calib):
    run = run_case(["check", model, "--calib", calib, *SIZES, "--out", tmp_path / "out", "--threads", "5000"],
                   inputs=[model, calib], outputs=[tmp_path / "out"], timeout_s=120)
    assert_one_line_refusal(run, "--threads: must be between 0 (onnxruntime's default) and 256, got 5000")


def test_bad_input_process_model_in_a_folder_named_with_a_non_utf8_byte(tmp_path, calib):
    folder = os.path.join(os.fsencode(str(tmp_path)), b"parts\xff")
    os.mkdir(folder)
    model = os.fsdecode(os.path.join(folder, b"net.onnx"))
    shutil.copy(conv_model(folder=tmp_path), model)
    run = run_case(["budget", model, *SIZES, "--json", tmp_path / "b.json"], inputs=[model],
                   outputs=[tmp_path / "b.json"], env={"LC_ALL": "C.UTF-8"})
    assert run.exit_code == 0 and not run.traceback, run.summary()
    assert "parts\\xff" in run.stdout
    assert "parts\\xff" in json.loads((tmp_path / "b.json").read_text())["model_file"]
