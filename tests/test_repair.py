"""The repair search: reaches --max-drop within --flash/--sram, or says precisely why not.

The damaged model: the digits CNN (trained on scikit-learn's bundled UCI digits set) with one
weight of its heavy middle conv multiplied by 40, quantized per tensor. Float accuracy stays at
98.9 %, int8 loses 4.6 points: the outlier stretches the layer's one weight scale.
"""
from __future__ import annotations

import json

import numpy as np
import onnx
import onnxruntime as ort
import pytest
from onnx import TensorProto, numpy_helper

from digits_folders import HEAVY_LAYER, INPUT_SHAPES, MODEL, digits_split, with_weight_outlier, write_folders
from qfit import cli
from qfit import check as pipeline
from qfit.measure.evaluate import compared_layers
from qfit.quant.quantize import Quantizer
from through_qfit import check_with_report
from qfit.search import repair
from qfit.graph.load import load_model
from qfit.quant.plan import PlanOptions, make_plan

TARGET_PT = 0.5


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    root = tmp_path_factory.mktemp("repair")
    calib, evaluation = write_folders(root / "data")
    damaged = with_weight_outlier(root / "outlier.onnx")
    return {"root": root, "calib": calib, "eval": evaluation, "model": damaged}


def _check(setup, out_name, **extra):
    fields = dict(flash_limit_bytes=1 << 20, sram_limit_bytes=256 << 10)
    fields.update(extra)
    options = pipeline.CheckOptions(model_path=setup["model"], calib_dir=setup["calib"], eval_dir=setup["eval"],
                                    out_dir=str(setup["root"] / out_name), input_shapes=INPUT_SHAPES, progress=False,
                                    per_channel=False, isolated_samples=32, **fields)
    return check_with_report(options)


@pytest.fixture(scope="module")
def plain(setup):
    return _check(setup, "plain")


def _faithful_accuracy(model: onnx.ModelProto, images: np.ndarray, labels: np.ndarray) -> float:
    so = ort.SessionOptions()
    so.add_session_config_entry("session.disable_quant_qdq", "1")  # int8 values dequantized exactly
    session = ort.InferenceSession(model.SerializeToString(), so, providers=["CPUExecutionProvider"])
    name = session.get_inputs()[0].name
    predicted = np.array([session.run(None, {name: x[None]})[0].argmax() for x in images])
    return 100.0 * float(np.mean(predicted == labels))


def test_the_damaged_model_loses_more_than_the_target(plain):
    accuracy = plain.report["accuracy"]
    assert accuracy["drop_pt"] > 2 * TARGET_PT
    assert plain.report["repair"]["reason"].startswith("no --max-drop given")


def test_repair_brings_the_drop_under_the_target_and_the_model_still_fits(setup, plain):
    result = _check(setup, "repaired", max_drop_pt=TARGET_PT)
    report = result.report
    section = report["repair"]
    assert section["reached"] and section["steps"]
    assert section["final_drop_pt"] <= TARGET_PT < section["drop_before_pt"]
    assert report["verdict"]["fits_flash"] and report["verdict"]["fits_sram"] and report["verdict"]["accuracy_ok"]
    for step in section["steps"]:
        assert step["drop_after_pt"] < step["drop_before_pt"]
        assert step["flash_total_bytes"] <= 1 << 20 and step["sram_peak_bytes"] <= 256 << 10
    assert any(step["layer"] == HEAVY_LAYER for step in section["steps"])

    # Independent of qfit's evaluation: the written int8 file and the float file, run by onnxruntime
    # on scikit-learn's held-out images and labels, give the reported final drop.
    _, x_test, _, y_test = digits_split()
    float_model = onnx.load(setup["model"])
    float_model.graph.input[0].type.tensor_type.shape.dim[0].dim_value = 1
    float_accuracy = _faithful_accuracy(float_model, x_test, y_test)
    int8_accuracy = _faithful_accuracy(result.quantized.model, x_test, y_test)
    assert float_accuracy - int8_accuracy == pytest.approx(section["final_drop_pt"], abs=1e-9)
    # and its stored constants (int8/int32/float32 initializers, as written) are within --flash
    stored = sum(numpy_helper.to_array(i).nbytes for i in result.quantized.model.graph.initializer)
    assert stored <= 1 << 20


@pytest.mark.parametrize("memory", ["flash", "sram"])
def test_repair_never_accepts_a_step_that_breaks_a_limit_and_says_which(setup, plain, memory):
    # Leave (almost) no room: keeping the damaged layer float needs ~14 KiB more flash and ~15 KiB
    # more SRAM, so it must be refused, and the report must name the limit and the bytes.
    flash = plain.report["flash"]["total_bytes"] + (64 if memory == "flash" else 1 << 20)
    sram = plain.report["sram"]["peak_bytes"] + (0 if memory == "sram" else 256 << 10)
    result = _check(setup, f"tight_{memory}", max_drop_pt=TARGET_PT, flash_limit_bytes=flash, sram_limit_bytes=sram)
    section, verdict = result.report["repair"], result.report["verdict"]
    for step in section["steps"]:
        assert step["flash_total_bytes"] <= flash and step["sram_peak_bytes"] <= sram
    assert verdict["fits_flash"] and verdict["fits_sram"]
    assert not section["reached"] and "accuracy" in verdict["failed"]
    word = "flash" if memory == "flash" else "SRAM"
    assert f"would need {word}" in section["reason"] and "limit" in section["reason"]
    refused = section["refused"][0]
    assert refused["layer"] == HEAVY_LAYER and refused["action"] == repair.KEEP_FLOAT
    assert refused["breaks"][0]["memory"] == word
    assert refused["breaks"][0]["bytes"] > refused["breaks"][0]["limit_bytes"]


def test_no_repair_flag_keeps_the_int8_model_and_reports_why(setup):
    result = _check(setup, "off", max_drop_pt=TARGET_PT, repair=False)
    section = result.report["repair"]
    assert section["reason"] == "repair switched off (--no-repair)" and not section["steps"]
    assert result.exit_code == 1 and "accuracy" in result.report["verdict"]["failed"]


# ---- the choices reach the written model -----------------------------------------------------------

@pytest.fixture(scope="module")
def builder(setup):
    loaded = load_model(str(MODEL), INPUT_SHAPES)
    options = pipeline.CheckOptions(model_path=str(MODEL), calib_dir=setup["calib"], out_dir="unused",
                                    flash_limit_bytes=1, sram_limit_bytes=1, progress=False)
    calib = pipeline.open_data(setup["calib"], loaded, options, "calibration")
    stats = pipeline.calibrate(loaded, make_plan(loaded, PlanOptions()), calib, 16, False)
    return Quantizer(loaded, stats, "percentile", 99.99, calib, 16)


def _row(builder, name):
    plan = builder.plan(PlanOptions())
    return next(r for r in compared_layers(builder.loaded, plan) if r["name"] == name), plan


def test_keep_float_writes_the_layer_and_its_fused_relu_in_float(builder):
    row, plan = _row(builder, HEAVY_LAYER)
    candidate = next(c for c in repair.candidates_for(builder.loaded, plan, row, "percentile")
                     if c.action == repair.KEEP_FLOAT)
    assert candidate.nodes == (HEAVY_LAYER, "/features/features.5/Relu")
    _, quantized = builder.build(candidate.apply(PlanOptions()))
    graph = quantized.model.graph
    producers = {o: n for n in graph.node for o in n.output}
    conv = next(n for n in graph.node if n.name == HEAVY_LAYER)
    # ONNX QDQ convention: a weight is int8 exactly when it is read through a DequantizeLinear
    initializers = {i.name: i for i in graph.initializer}
    assert conv.input[1] not in producers and initializers[conv.input[1]].data_type == TensorProto.FLOAT
    others = [n for n in graph.node if n.op_type == "Conv" and n.name != HEAVY_LAYER]
    assert all(producers[n.input[1]].op_type == "DequantizeLinear" for n in others)


def test_int16_activations_write_an_int16_quantizer(builder):
    row, plan = _row(builder, HEAVY_LAYER)
    candidate = next(c for c in repair.candidates_for(builder.loaded, plan, row, "percentile")
                     if c.action == repair.INT16)
    _, quantized = builder.build(candidate.apply(PlanOptions()))
    graph = quantized.model.graph
    inits = {i.name: i for i in graph.initializer}
    q = next(n for n in graph.node if n.op_type == "QuantizeLinear" and n.input[0] == row["tensor"])
    # ONNX spec (QuantizeLinear, opset 21): the output type is the zero point's type
    assert inits[q.input[2]].data_type == TensorProto.INT16
    onnx.checker.check_model(quantized.model)


def test_fallback_cost_of_keeping_the_classifier_float_matches_a_hand_count(builder):
    # docs/memory.md conventions: int8 weight 1 B + per-channel scale 4 B and zero point 1 B, int32
    # bias 4 B; float32 weight and bias 4 B each; every activation quantizer stores a scale (4 B) and
    # a zero point (1 B). The classifier is Gemm 32 -> 10: int8 320 + 10 x 5 + 10 x 4 = 410 B, float
    # 320 x 4 + 10 x 4 = 1,320 B; as float its output (a graph output read by no int8 layer) loses
    # its quantizer: -5 B. SRAM: the 10 logits grow by 30 B, far below the 3 KiB conv peak.
    counter = repair.ByteCounter(builder.loaded, __import__("qfit.memory.budget", fromlist=["x"]).BudgetOptions())
    plan = builder.plan(PlanOptions())
    costs = repair.fallback_costs(builder, PlanOptions(), compared_layers(builder.loaded, plan), counter)
    gemm = costs["/classifier/Gemm"]
    assert gemm["float"] == {"flash": 1320 - 410 - 5, "sram": 0}
    # int16 output: the zero point grows by one byte; SRAM unchanged below the peak
    assert gemm["int16"] == {"flash": 1, "sram": 0}


def test_cli_flags_reach_the_report_and_a_bad_value_is_one_line(setup, tmp_path, capsys):
    out = tmp_path / "cli"
    code = cli.main(["check", setup["model"], "--calib", setup["calib"], "--eval", setup["eval"], "--out", str(out),
                     "--input-shape", "image=1x1x8x8", "--flash", "1MiB", "--sram", "256KiB", "--per-tensor",
                     "--max-drop", str(TARGET_PT), "--isolated-samples", "16", "--repair-layers", "3", "--quiet"])
    report = json.loads((out / "report.json").read_text())
    assert code == 0 and report["repair"]["reached"]
    assert report["sensitivity"]["samples_used"] == 16 and report["repair"]["search"]["layers_tried"] == 3
    printed = capsys.readouterr().out
    assert "Where the accuracy goes" in printed and "Repair" in printed
    assert "Where the accuracy goes" in (out / "report.md").read_text()
    code = cli.main(["check", setup["model"], "--calib", setup["calib"], "--out", str(tmp_path / "bad"),
                     "--input-shape", "image=1x1x8x8", "--flash", "1MiB", "--sram", "256KiB",
                     "--isolated-samples", "-1", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "--isolated-samples" in err


def test_a_score_output_has_no_drop_to_repair_and_the_report_says_so(tmp_path):
    # A 4-D output is a score map, not classes (qfit.measure.evaluate.output_kind): --max-drop cannot apply.
    import through_qfit
    from onnx import helper
    rng = np.random.default_rng(0)
    graph = helper.make_graph(
        [helper.make_node("Conv", ["x", "w"], ["y"], pads=[1, 1, 1, 1], name="conv")], "score",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 2, 6, 6])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3, 6, 6])],
        [numpy_helper.from_array(rng.normal(0, 0.3, (3, 2, 3, 3)).astype(np.float32), "w")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)], ir_version=9)
    checked = through_qfit.check(model, tmp_path, via_cli=False, max_drop_pt=0.5, isolated_samples=8)
    section = checked.report["repair"]
    assert section["target_drop_pt"] == 0.5 and not section["steps"] and section["reached"] is None
    assert "score" in section["reason"]
    assert checked.report["sensitivity"]["metric"] == "output_sqnr_db"
    assert checked.report["layers"][0]["output_sqnr_if_float_db"] is not None
