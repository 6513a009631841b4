"""Faults: interrupts mid-run, interrupted writes, repeatability, external data, streaming memory.

The signal tests start the real `qfit check` in a subprocess and send it a real SIGINT or SIGTERM. When
to send it is read from /proc (the handler qfit installs) and from a gate held at a named stage
(tests/stage_gate.py), never from the wall clock or CPU time, and no assertion is about time.
"""
from __future__ import annotations

import gc
import io
import json
import os
import signal
import subprocess
import sys
import time
import tracemalloc

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from PIL import Image

from qfit import files
from qfit.data import DataFolder
from qfit.errors import QfitError

SIZES = ["--flash", "1MiB", "--sram", "256KiB"]
ON_LINUX_PROC = os.path.exists(f"/proc/{os.getpid()}/status")


# ------------------------------------------------------------------------------ builders

def conv_stack(path, layers=6, channels=16, side=48, seed=0):
    """`layers` x (3x3 Conv + Relu) on a (1, 3, side, side) input, then GlobalAveragePool + Flatten."""
    rng = np.random.default_rng(seed)
    nodes, inits, prev, cin = [], [], "x", 3
    for i in range(layers):
        weight = (rng.standard_normal((channels, cin, 3, 3)) * np.sqrt(2 / (cin * 9))).astype(np.float32)
        inits += [numpy_helper.from_array(weight, f"w{i}"),
                  numpy_helper.from_array(rng.standard_normal(channels).astype(np.float32) * 0.1, f"b{i}")]
        nodes += [helper.make_node("Conv", [prev, f"w{i}", f"b{i}"], [f"conv{i}"], pads=[1, 1, 1, 1]),
                  helper.make_node("Relu", [f"conv{i}"], [f"relu{i}"])]
        prev, cin = f"relu{i}", channels
    nodes += [helper.make_node("GlobalAveragePool", [prev], ["pool"]),
              helper.make_node("Flatten", ["pool"], ["y"])]
    graph = helper.make_graph(nodes, "conv_stack",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, side, side])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, channels])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 9
    onnx.save(model, str(path))
    return str(path)


def npy_folder(folder, count, shape, seed=0):
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(count):
        np.save(os.path.join(folder, f"sample_{i:05d}.npy"), rng.standard_normal(shape).astype(np.float32))
    return str(folder)


def run_cli(*args):
    return subprocess.run([sys.executable, "-m", "qfit.cli", *map(str, args)], capture_output=True, text=True)


def assert_only_complete_files(out, before):
    """The folder holds what it held before, plus (at most) complete qfit outputs: no temp files, every
    .onnx passes the checker, every .json parses."""
    names = sorted(os.listdir(out))
    assert not [n for n in names if n.endswith(".partial")], names
    for name in names:
        path = os.path.join(out, name)
        with open(path, "rb") as f:
            content = f.read()
        if before.get(name) == content:
            continue
        if name.endswith(".onnx"):
            onnx.checker.check_model(onnx.load(path))
        elif name.endswith(".json"):
            json.loads(content)
        elif name.endswith(".md"):
            assert content.decode("utf-8").startswith("# qfit report")
        elif name.endswith(".html"):
            assert content.decode("utf-8").rstrip().endswith("</html>")
        else:
            raise AssertionError(f"{name} changed or appeared, and it is no qfit output")


# ------------------------------------------------------------------------------ signals mid-run

def _caught_signals(pid) -> int:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith("SigCgt:"):
                return int(line.split()[1], 16)
    return 0


def _wait_until(condition, what, process, give_up_s=120):
    """Poll `condition` while the process runs; fail (not hang) if the process ends or never gets there."""
    start = time.monotonic()
    while not condition():
        assert process.poll() is None, f"qfit ended (exit {process.returncode}) before {what}"
        assert time.monotonic() - start < give_up_s, f"qfit never reached {what}"
        time.sleep(0.01)


@pytest.fixture(scope="module")
def long_job(tmp_path_factory):
    """A model and 40 calibration samples (the calibration pass has more than one batch)."""
    root = tmp_path_factory.mktemp("long_job")
    model = conv_stack(root / "stack.onnx")
    calib = npy_folder(root / "calib", 40, (1, 3, 48, 48))
    return model, calib


STAGE_GATE = os.path.join(os.path.dirname(os.path.abspath(__file__)), "stage_gate.py")


# "start": the signal lands as soon as qfit has installed its handler, while arguments are parsed and
# the libraries import. "calibration" / "evaluation": the run is held (tests/stage_gate.py) after the
# first batch of that data pass, so the signal lands inside the named stage on a machine of any speed.
@pytest.mark.skipif(not ON_LINUX_PROC, reason="reads the child's state from /proc")
@pytest.mark.parametrize("signum, stage", [
    (signal.SIGINT, "start"), (signal.SIGTERM, "start"), (signal.SIGINT, "calibration"),
    (signal.SIGTERM, "calibration"), (signal.SIGINT, "evaluation"), (signal.SIGTERM, "evaluation")],
    ids=["sigint-start", "sigterm-start", "sigint-calibration", "sigterm-calibration", "sigint-evaluation",
         "sigterm-evaluation"])
def test_signal_mid_run_leaves_only_complete_files_and_says_so(long_job, tmp_path, signum, stage):
    model, calib = long_job
    out = tmp_path / "out"
    out.mkdir()
    (out / "notes.txt").write_text("written by the user before the run\n")
    (out / "report.json").write_text('{"from": "an earlier run"}\n')
    before = {name: (out / name).read_bytes() for name in os.listdir(out)}
    marker = tmp_path / "stage_reached"
    qfit_args = ["check", model, "--calib", calib, *SIZES, "--out", str(out), "--quiet", "--threads", "1"]
    command = ([sys.executable, "-m", "qfit.cli", *qfit_args] if stage == "start" else
               [sys.executable, STAGE_GATE, stage, str(marker), "--", *qfit_args])
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        sigterm_bit = 1 << (signal.SIGTERM - 1)
        _wait_until(lambda: _caught_signals(process.pid) & sigterm_bit, "installing its SIGTERM handler", process)
        if stage != "start":
            _wait_until(marker.exists, f"the {stage} stage", process)
        assert process.poll() is None, "the run ended before the signal"
        process.send_signal(signum)
        stdout, stderr = process.communicate(timeout=120)
    finally:
        if process.poll() is None:
            process.kill()
            process.wait()

    assert process.returncode == 130, (process.returncode, stderr)
    assert "Traceback" not in stderr
    assert stderr.splitlines() == ["qfit: interrupted; no partial output was left"], stderr
    assert_only_complete_files(out, before)
    assert (out / "notes.txt").read_bytes() == before["notes.txt"]


# ------------------------------------------------------------------------------ interrupted writes

class _InterruptOn:
    """Wrap a function so that its n-th call raises KeyboardInterrupt, as a signal at that moment would."""

    def __init__(self, real, n):
        self.real, self.n, self.calls = real, n, 0

    def __call__(self, *args, **kwargs):
        self.calls += 1
        if self.calls == self.n:
            raise KeyboardInterrupt
        return self.real(*args, **kwargs)


def _three_outputs(folder):
    return {os.path.join(folder, "m_int8.onnx"): b"model bytes", os.path.join(folder, "report.md"): b"# qfit report\n",
            os.path.join(folder, "report.json"): b"{}\n"}


def test_interrupt_while_staging_the_third_file_changes_nothing(tmp_path, monkeypatch):
    (tmp_path / "report.json").write_text('{"from": "an earlier run"}\n')
    monkeypatch.setattr(os, "fsync", _InterruptOn(os.fsync, 3))
    with pytest.raises(KeyboardInterrupt):
        files.write_files(_three_outputs(tmp_path))
    assert sorted(os.listdir(tmp_path)) == ["report.json"]
    assert (tmp_path / "report.json").read_text() == '{"from": "an earlier run"}\n'


def test_interrupt_between_renames_leaves_complete_files_and_no_temp(tmp_path, monkeypatch):
    monkeypatch.setattr(os, "replace", _InterruptOn(os.replace, 2))
    with pytest.raises(KeyboardInterrupt):
        files.write_files(_three_outputs(tmp_path))
    assert sorted(os.listdir(tmp_path)) == ["m_int8.onnx"]
    assert (tmp_path / "m_int8.onnx").read_bytes() == b"model bytes"


def test_failed_write_is_a_one_line_error_and_leaves_no_temp(tmp_path, monkeypatch):
    def disk_full(fd):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(os, "fsync", disk_full)
    with pytest.raises(QfitError, match="output: cannot write .*report.json .No space left on device"):
        files.write_json(str(tmp_path / "report.json"), {"a": 1})
    assert os.listdir(tmp_path) == []


def test_written_files_get_the_usual_permissions_not_private_temp_ones(tmp_path):
    old_mask = os.umask(0o022)
    try:
        files.write_bytes(str(tmp_path / "a.bin"), b"x")
    finally:
        os.umask(old_mask)
    assert (tmp_path / "a.bin").stat().st_mode & 0o777 == 0o644


# ------------------------------------------------------------------------------ repeatability

def test_same_command_twice_gives_identical_model_and_report(tmp_path):
    model = conv_stack(tmp_path / "net.onnx", layers=3, channels=8, side=16)
    calib = tmp_path / "calib"
    calib.mkdir()
    rng = np.random.default_rng(1)
    for i in range(40):
        Image.fromarray(rng.integers(0, 256, (16, 16, 3), dtype=np.uint8)).save(calib / f"img_{i:02d}.png")
    evaluation = npy_folder(tmp_path / "eval", 20, (1, 3, 16, 16), seed=2)
    out = tmp_path / "out"
    # --limit exercises the seeded sample; the default thread count exercises onnxruntime's pool.
    command = ["check", model, "--calib", calib, "--eval", evaluation, *SIZES, "--out", out, "--quiet",
               "--limit", "25", "--method", "entropy"]

    first = run_cli(*command)
    assert first.returncode == 0, first.stderr
    first_model = (out / "net_int8.onnx").read_bytes()
    first_report = (out / "report.json").read_bytes()
    second = run_cli(*command)
    assert second.returncode == 0, second.stderr

    assert (out / "net_int8.onnx").read_bytes() == first_model
    assert (out / "report.json").read_bytes() == first_report
    assert second.stdout == first.stdout
    assert json.loads(first_report)["calibration"]["samples"] == 25


# ------------------------------------------------------------------------------ large inputs

def test_model_with_external_data_loads_and_gives_the_same_int8_model(tmp_path):
    (tmp_path / "inline").mkdir()
    (tmp_path / "external").mkdir()
    inline = conv_stack(tmp_path / "inline" / "net.onnx", layers=2, channels=8, side=16)
    external = str(tmp_path / "external" / "net.onnx")
    onnx.save(onnx.load(inline), external, save_as_external_data=True, all_tensors_to_one_file=True,
              location="net.weights", size_threshold=0)
    with open(external, "rb") as f:
        on_disk = onnx.ModelProto.FromString(f.read())
    assert all(t.data_location == TensorProto.EXTERNAL for t in on_disk.graph.initializer)
    assert os.path.getsize(tmp_path / "external" / "net.weights") > 0
    calib = npy_folder(tmp_path / "calib", 8, (1, 3, 16, 16))

    int8 = {}
    for name, path in (("inline", inline), ("external", external)):
        out = tmp_path / f"out_{name}"
        result = run_cli("check", path, "--calib", calib, *SIZES, "--out", out, "--quiet")
        assert result.returncode == 0, result.stderr
        int8[name] = (out / "net_int8.onnx").read_bytes()
    assert int8["external"] == int8["inline"]
    written = onnx.ModelProto.FromString(int8["external"])
    assert not [t.name for t in written.graph.initializer if t.data_location == TensorProto.EXTERNAL]


def _iteration_peak_bytes(folder) -> int:
    """Peak memory allocated while every batch of `folder` streams, above what the DataFolder holds.

    Reading a .npy header leaves small reference cycles (numpy parses it with `ast.literal_eval`);
    they are garbage, not memory kept per file, but they wait for a collection whose timing depends
    on the Python release. Collecting after each batch (cheap: everything older is frozen) leaves
    only what the stream really holds."""
    data = DataFolder(folder, {"x": (1, 4)})
    gc.collect()
    gc.freeze()
    tracemalloc.start()
    try:
        baseline = tracemalloc.get_traced_memory()[0]
        tracemalloc.reset_peak()
        seen = 0
        for batch in data.batches(16):
            seen += len(batch.files)
            gc.collect()
        peak = tracemalloc.get_traced_memory()[1] - baseline
    finally:
        tracemalloc.stop()
        gc.unfreeze()
    assert seen == len(data)
    return peak


def test_ten_thousand_file_folder_streams_in_constant_memory(tmp_path):
    encoded = io.BytesIO()
    np.save(encoded, np.zeros((1, 4), np.float32))
    for count in (1_000, 10_000):
        folder = tmp_path / f"files_{count}"
        folder.mkdir()
        for i in range(count):
            (folder / f"s_{i:05d}.npy").write_bytes(encoded.getvalue())
    _iteration_peak_bytes(str(tmp_path / "files_1000"))  # warm-up: first-use caches are not per file
    small = _iteration_peak_bytes(str(tmp_path / "files_1000"))
    large = _iteration_peak_bytes(str(tmp_path / "files_10000"))
    # Ten times the files, the same batches: anything kept per file would show as a ratio near 10.
    assert large / small < 1.5, (small, large)
