"""bench/run.py at tiny sizes, so the benchmark cannot rot: it must exit 0 and print a row for every
figure issue 7 asks for, each with a target and a met? verdict. No time is asserted (timings belong
to the benchmark's printed ratios, not to tests)."""
from __future__ import annotations

import os
import subprocess
import sys

import pytest

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# Row labels (start of the "figure" column) the table must contain.
EXPECTED_ROWS = [
    # issue 15: the whole check against a bare float pass, and whether the ranking informs
    "demo qfit check / bare float pass",
    "demo qfit check, layer sweep off / bare float pass",
    "peak RSS of the demo check",
    "ranking rank correlation, two halves of the demo eval folder",
    "MobileNetV2 0.35 32, check with the sweep off / bare float pass",
    "MobileNetV2 0.35 32, peak RSS of the check",
    *(f"calibration / float pass, {method} ({model})"
      for model in ("mobilenet", "resnet") for method in ("min-max", "percentile", "mse", "entropy")),
    "accumulated comparison / float pass (mobilenet)",
    "accumulated comparison / float pass (resnet)",
    "quantize + export time",
    "peak RSS, ",
    "budget time, ",
    "order search time, ",
    "order search, 200-node branched graph",
    "qfit budget, ResNet-50 shape",
    "arena bytes / peak live bytes, test zoo",
]


@pytest.mark.slow
def test_bench_smoke_run_exits_0_and_prints_every_figure():
    done = subprocess.run([sys.executable, os.path.join(REPO, "bench", "run.py"), "--smoke"],
                          capture_output=True, text=True, timeout=600, cwd=REPO)
    assert done.returncode == 0, done.stderr[-3000:]
    lines = done.stdout.splitlines()
    for label in EXPECTED_ROWS:
        rows = [line for line in lines if line.startswith(label)]
        assert len(rows) == 1, f"no single row for {label!r} in:\n{done.stdout}"
        cells = rows[0].split("  ")
        assert any(cell.strip() in ("yes", "no", "-") for cell in cells), rows[0]
    assert "smoke run on" in done.stdout and "onnxruntime" in done.stdout and "SIMD: " in done.stdout
