"""`qfit check --arithmetic / --rounding` on a model trained on open data: the digits CNN
(tests/models/README.md; the UCI optical digits bundled with scikit-learn, split as it was trained).

What each option does to the figures: the integer path's single rounding reproduces the float
preview's predictions; double rounding moves outputs one step away from zero where its two roundings
compound; the report names the arithmetic, and each quantized layer's multipliers and shifts
represent s_in * s_w / s_out (checked with exact rational arithmetic, Python's `fractions`, against
the scales read from the written QDQ model).
"""
from __future__ import annotations

import json
from fractions import Fraction

import numpy as np
import onnx
import pytest
from onnx import numpy_helper

from digits_folders import MODEL, write_folders
from qfit import cli


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    root = tmp_path_factory.mktemp("digits_integer")
    calib, evaluation = write_folders(root)
    results = {}
    for name, extra in (("double", []), ("single", ["--rounding", "single"]), ("float", ["--arithmetic", "float"])):
        out = root / f"out_{name}"
        code = cli.main(["check", str(MODEL), "--calib", calib, "--eval", evaluation, "--out", str(out),
                         "--flash", "1MiB", "--sram", "1MiB", "--quiet", "--isolated-samples", "0",
                         "--no-accuracy-gate", "--input-shape", "image=1x1x8x8", *extra])
        report = json.loads((out / "report.json").read_text())
        model = onnx.load(str(out / report["outputs"]["model"]))
        results[name] = (code, report, model)
    return results


def test_each_arithmetic_is_named_and_exits_0(runs):
    for name, (code, report, _) in runs.items():
        assert code == 0, name
        assert report["accuracy"]["samples"] == 540
    assert runs["double"][1]["arithmetic"]["rounding"] == "double"
    assert "double rounding" in runs["double"][1]["evaluation_path"]
    assert "single rounding" in runs["single"][1]["evaluation_path"]
    assert runs["float"][1]["arithmetic"]["arithmetic"] == "float"
    assert "disable_quant_qdq" in runs["float"][1]["evaluation_path"]
    for name in ("double", "single"):
        section = runs[name][1]["arithmetic"]
        assert section["float_nodes"] == [] and section["integer_nodes"] > 0
        assert section["accumulator_overflows"] == {}
        assert section["float_preview"]["samples"] == 540


def test_single_rounding_reproduces_the_float_previews_predictions(runs):
    single, preview = runs["single"][1], runs["float"][1]
    changes = single["arithmetic"]["float_preview"]["prediction_changes"]
    # the integer figure differs from the preview's by at most the samples whose prediction changed
    assert abs(single["accuracy"]["int8"] - preview["accuracy"]["int8"]) <= 100.0 * changes / 540 + 1e-9
    assert changes <= 1
    # one requantization step at most per layer: the output stays within a few output steps
    double = runs["double"][1]["arithmetic"]["float_preview"]
    assert double["max_abs_output_difference"] > 0   # the two-step rounding moved some logits
    assert single["arithmetic"]["float_preview"]["max_abs_output_difference"] <= \
        double["max_abs_output_difference"]


def test_the_rounding_option_changes_the_per_layer_figures(runs):
    double = {row["name"]: row["sqnr_db"] for row in runs["double"][1]["layers"]}
    single = {row["name"]: row["sqnr_db"] for row in runs["single"][1]["layers"]}
    assert double.keys() == single.keys()
    assert any(abs(double[k] - single[k]) > 0.01 for k in double)


def _scales(model: onnx.ModelProto):
    inits = {i.name: numpy_helper.to_array(i) for i in model.graph.initializer}
    producer = {o: n for n in model.graph.node for o in n.output}
    consumers = {}
    for n in model.graph.node:
        for i in n.input:
            consumers.setdefault(i, []).append(n)
    return inits, producer, consumers


def test_each_conv_and_gemm_lists_multipliers_that_represent_its_scales(runs):
    # Source: Jacob et al., CVPR 2018, section 2.2: M = s_in s_w / s_out = M0 * 2^(shift - 31), M0 in
    # [2^30, 2^31), so |M0 * 2^(shift-31) - M| <= 2^(shift-32).
    _, report, model = runs["double"]
    inits, producer, consumers = _scales(model)
    nodes = {n.name: n for n in model.graph.node}
    checked = 0
    for row in report["layers"]:
        node = nodes.get(row["name"])
        if node is None or row["op_type"] not in ("Conv", "Gemm"):
            continue
        record = row["requantization"]
        s_in = float(inits[producer[node.input[0]].input[1]])
        s_w = inits[producer[node.input[1]].input[1]].astype(np.float64).reshape(-1)
        after = consumers[node.output[0]][0]
        if after.op_type != "QuantizeLinear":   # a fused ReLU between the layer and its quantizer
            after = consumers[after.output[0]][0]
        s_out = float(inits[after.input[1]])
        assert len(record["multiplier"]) == len(record["shift"]) == s_w.size
        for m0, shift, sw in zip(record["multiplier"], record["shift"], s_w):
            real = Fraction(s_in) * Fraction(float(sw)) / Fraction(s_out)
            assert (1 << 30) <= m0 < (1 << 31)
            assert abs(Fraction(m0) * Fraction(2) ** (shift - 31) - real) <= Fraction(2) ** (shift - 32)
        checked += 1
    assert checked >= 3


def test_unknown_arithmetic_or_rounding_is_refused_in_one_line(tmp_path, capsys):
    from qfit.check import CheckOptions, check
    from qfit.errors import QfitError

    for field, value, flag in (("arithmetic", "fixed", "--arithmetic"), ("rounding", "triple", "--rounding")):
        options = CheckOptions(model_path=str(MODEL), calib_dir=str(tmp_path), out_dir=str(tmp_path / "out"),
                               flash_limit_bytes=1 << 20, sram_limit_bytes=1 << 20, **{field: value})
        with pytest.raises(QfitError) as refused:
            check(options)
        assert str(refused.value).startswith(flag) and value in str(refused.value)
        assert "\n" not in str(refused.value)
    assert not (tmp_path / "out").exists()
    # the command line refuses the value before any work: one line, exit 2, nothing written
    capsys.readouterr()
    code = cli.main(["check", str(MODEL), "--calib", str(tmp_path), "--out", str(tmp_path / "out"), "--flash", "1MiB",
                     "--sram", "1MiB", "--rounding", "triple"])
    assert code == 2
    err = capsys.readouterr().err.strip()
    assert "--rounding" in err and "triple" in err and "\n" not in err
    assert not (tmp_path / "out").exists()
