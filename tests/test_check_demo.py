"""The whole job on the committed demo, through the real CLI, as the README runs it."""
import json
import os
import subprocess
import sys

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from PIL import Image

from qfit.cli import main

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "calib_demo")
MIB = 1024 * 1024


def _demo_args(out, *extra):
    return ["check", os.path.join(DEMO, "model.onnx"), "--calib", os.path.join(DEMO, "calib"),
            "--eval", os.path.join(DEMO, "eval"), "--preprocess", os.path.join(DEMO, "preprocess.json"),
            "--flash", "1MiB", "--sram", "256KiB", "--out", str(out), "--quiet", *extra]


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_out")
    code = main(_demo_args(out))
    with open(out / "report.json") as f:
        report = json.load(f)
    return code, out, report


def test_demo_check_passes_and_writes_model_and_reports(demo_run):
    code, out, report = demo_run
    assert code == 0
    assert {"model_int8.onnx", "report.json", "report.md"} <= {p.name for p in out.iterdir()}
    assert not [p for p in out.iterdir() if p.name.endswith(".partial")]


def test_demo_int8_model_passes_the_checker_and_runs_on_a_demo_sample(demo_run):
    _, out, report = demo_run
    path = out / report["outputs"]["model"]
    onnx.checker.check_model(onnx.load(str(path)))
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    inp = session.get_inputs()[0]
    cls = sorted(os.listdir(os.path.join(DEMO, "eval")))[0]
    first = sorted(os.listdir(os.path.join(DEMO, "eval", cls)))[0]
    pre = json.load(open(os.path.join(DEMO, "preprocess.json")))
    pixels = np.asarray(Image.open(os.path.join(DEMO, "eval", cls, first)).convert("RGB"), np.float32)
    x = (pixels * pre["scale"] - np.array(pre["mean"], np.float32)) / np.array(pre["std"], np.float32)
    x = x.transpose(2, 0, 1)[None].astype(np.float32)
    (logits,) = session.run(None, {inp.name: x})
    assert logits.shape[0] == 1 and np.all(np.isfinite(logits))


def test_demo_report_has_the_documented_keys_and_sizes(demo_run):
    _, _, report = demo_run
    for key in ("path", "params", "macs"):
        assert key in report["model"]
    for key in ("float_bytes", "int8_bytes", "reserve_bytes", "total_bytes", "limit_bytes", "fits", "shrink_ratio"):
        assert key in report["flash"]
    for key in ("peak_bytes", "peak_node", "limit_bytes", "fits"):
        assert key in report["sram"]
    for key in ("metric", "float", "int8", "drop_pt", "samples"):
        assert key in report["accuracy"]
    assert report["accuracy"]["samples"] > 0
    # the figures come from the integer path by default, and the report names its rounding
    assert report["evaluation_path"].startswith("integer") and "double rounding" in report["evaluation_path"]
    assert report["arithmetic"]["arithmetic"] == "integer" and report["arithmetic"]["rounding"] == "double"
    assert report["tool_version"]
    assert report["layers"] and all({"name", "op_type", "weight_bytes_int8", "sqnr_db"} <= set(r) for r in report["layers"])
    # The demo is sized so that float32 weights do not fit 1 MiB and int8 weights do.
    assert report["flash"]["float_bytes"] > MIB
    assert report["flash"]["int8_bytes"] < MIB
    # Rule of thumb of the trade (common practice): int8 storage is about 1/4 of float32; biases
    # and per-channel scales make the ratio slightly less than 4.
    assert 3.5 <= report["flash"]["shrink_ratio"] <= 4.0
    # ... and its peak is near, not far under, 256 KiB.
    assert 0.6 * 256 * 1024 <= report["sram"]["peak_bytes"] <= 256 * 1024


def test_demo_with_64kib_flash_exits_1_and_says_flash(tmp_path, capsys):
    code = main(_demo_args(tmp_path, "--flash", "64KiB"))
    assert code == 1
    assert "flash" in capsys.readouterr().out.lower().split("result:")[-1]


def _run_cli(*args):
    return subprocess.run([sys.executable, "-m", "qfit.cli", *args], capture_output=True, text=True)


def test_missing_calibration_folder_exits_2_with_one_line(tmp_path):
    r = _run_cli(*_demo_args(tmp_path)[:2], "--calib", str(tmp_path / "nope"), "--flash", "1MiB",
                 "--sram", "256KiB", "--out", str(tmp_path / "o"))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "nope" in r.stderr


def test_non_onnx_file_exits_2_with_one_line(tmp_path):
    fake = tmp_path / "photo.onnx"
    Image.new("RGB", (4, 4)).save(fake, format="PNG")
    r = _run_cli("check", str(fake), "--calib", os.path.join(DEMO, "calib"), "--flash", "1MiB",
                 "--sram", "256KiB", "--out", str(tmp_path / "o"))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "photo.onnx" in r.stderr


def test_undeclared_dynamic_input_exits_2_and_names_the_input(tmp_path):
    model = onnx.load(os.path.join(DEMO, "model.onnx"))
    model.graph.input[0].type.tensor_type.shape.dim[0].dim_param = "batch"
    path = tmp_path / "dynamic.onnx"
    onnx.save(model, str(path))
    r = _run_cli("check", str(path), "--calib", os.path.join(DEMO, "calib"), "--flash", "1MiB",
                 "--sram", "256KiB", "--out", str(tmp_path / "o"))
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert model.graph.input[0].name in r.stderr and "--input-shape" in r.stderr
