"""Every zoo model (tests/zoo.py) end to end through `qfit check`: quantize, evaluate, budget.

Calibration data is synthetic (seeded standard normal) and written as real .npy files; the run goes
through the CLI entry point `qfit.cli.main`, and the checks read what a user gets: the exit code,
report.json and the int8 .onnx file.
"""
from __future__ import annotations

import functools
import math
import pathlib
import sys

import numpy as np
import onnx
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))
import through_qfit as tq  # noqa: E402
import zoo  # noqa: E402

from qfit.memory import budget  # noqa: E402
from qfit.graph.load import prepare_model  # noqa: E402
from qfit.quant.plan import make_plan  # noqa: E402

MODELS = sorted(zoo.ZOO)
CALIBRATION_SAMPLES = 16
EVALUATION_SAMPLES = 4


@functools.lru_cache(maxsize=None)
def _built(name: str) -> zoo.ZooModel:
    return zoo.ZOO[name]()


@pytest.fixture(scope="module")
def zoo_run(tmp_path_factory):
    """One `qfit check` per zoo model, shared by the tests below."""
    cache: dict[str, tq.Checked] = {}

    def get(name: str) -> tq.Checked:
        if name not in cache:
            # --eval-limit keeps the per-layer sensitivity sweep of the check short; the agreement
            # tests below evaluate the written model on their own data
            cache[name] = tq.check(_built(name).model, tmp_path_factory.mktemp(name), name=name,
                                   samples=CALIBRATION_SAMPLES, via_cli=True,
                                   extra_args=["--eval-limit", str(EVALUATION_SAMPLES)])
        return cache[name]
    return get


@pytest.mark.parametrize("name", MODELS)
def test_zoo_check_writes_a_valid_int8_model_that_onnxruntime_runs(name, zoo_run):
    run, zm = zoo_run(name), _built(name)
    assert run.exit_code == 0  # unlimited flash and SRAM: everything fits
    onnx.checker.check_model(run.int8_model, full_check=True)
    ops = tq.op_types(run.int8_model)
    assert "QuantizeLinear" in ops and "DequantizeLinear" in ops
    int8_weights = [i for i in run.int8_model.graph.initializer if i.data_type == onnx.TensorProto.INT8]
    assert int8_weights
    # As a user would run it: a plain onnxruntime session with its default (QDQ-fusing) optimizations.
    (out,) = tq.ort_default_outputs(run.int8_model, tq.random_batch(run.int8_model, 1, seed=3))
    assert out.shape == zm.output_shape and np.isfinite(out).all()
    # The evaluate stage ran: per-layer rows and an end metric.
    assert run.report["layers"] and run.report["accuracy"]


@pytest.mark.parametrize("name", MODELS)
def test_zoo_int8_model_agrees_with_onnx_reference_at_every_quantizer(name, zoo_run):
    run = zoo_run(name)
    samples = tq.single_samples(run.int8_model, 2, seed=11)
    # ONNX operator spec via onnx.reference on the same QDQ graph, both runtimes given the same
    # integers at every quantizer (see through_qfit's docstring for why): every quantized tensor
    # within one integer level and every output within one output quantization step, >= 99.9 %.
    agreement = tq.forced_agreement(run.int8_model, samples)
    assert agreement.integer_fraction >= 0.999, agreement
    assert agreement.output_fraction >= 0.999, agreement
    assert agreement.max_integer_diff <= 1, agreement


# mobilenet_v2_small is left out of the free-running comparison on purpose: with random weights a
# single rounding tie resolved differently in block 3 was measured to cascade into 2-4 output steps on
# ~1.5 % of outputs (both runtimes correct); the per-quantizer comparison above covers its layers.
FREE_RUNNING = [n for n in MODELS if n != "mobilenet_v2_small"]


@pytest.mark.parametrize("name", FREE_RUNNING)
def test_zoo_int8_outputs_agree_with_onnx_reference_end_to_end(name, zoo_run):
    run = zoo_run(name)
    # ONNX operator spec via onnx.reference: each runtime on its own intermediate values.
    agreement = tq.free_running_agreement(run.int8_model, tq.random_batch(run.int8_model, 24, seed=12))
    assert agreement.output_fraction >= 0.999, agreement


@pytest.mark.parametrize("name", MODELS)
def test_zoo_params_and_macs_in_the_report_equal_the_zoo_figures(name, zoo_run):
    run, zm = zoo_run(name), _built(name)
    # tests/zoo.py computes both from the layer shapes as each layer is added (its docstring has the
    # convention, which docs/operators.md adopts: MACs of Conv/ConvTranspose/Gemm/MatMul only).
    assert run.report["model"]["params"] == zm.params
    assert run.report["model"]["macs"] == zm.macs == run.report["macs"]["total"]
    assert sum(r["macs"] for r in run.report["macs"]["layers"]) == zm.macs


@pytest.mark.parametrize("name", MODELS)
def test_zoo_budget_is_consistent(name, zoo_run):
    run = zoo_run(name)
    flash, sram, arena = run.report["flash"], run.report["sram"], run.report["arena"]
    # flash: the int8 total is the sum of the per-layer rows, and each row the sum of its parts
    assert flash["int8_bytes"] == sum(r["total_bytes"] for r in flash["layers"])
    for row in flash["layers"]:
        assert row["total_bytes"] == (row["weight_bytes"] + row["bias_bytes"] + row["scale_bytes"]
                                      + row["float_bytes"] + row["other_bytes"])
    # the written int8 file itself: every int8 initializer read by a DequantizeLinear is a weight
    # (1 B per element), every int32 one a bias (4 B) -- the flash rows must count exactly those
    inits = {i.name: onnx.numpy_helper.to_array(i) for i in run.int8_model.graph.initializer}
    dequantized = [inits[n.input[0]] for n in run.int8_model.graph.node
                   if n.op_type == "DequantizeLinear" and n.input[0] in inits]
    assert sum(a.size for a in dequantized if a.dtype == np.int8) == sum(r["weight_bytes"] for r in flash["layers"])
    assert sum(4 * a.size for a in dequantized if a.dtype == np.int32) == sum(r["bias_bytes"] for r in flash["layers"])
    # SRAM: every tensor stored as int8 must be live at some step, so the peak holds the largest one
    shapes = onnx.shape_inference.infer_shapes(run.int8_model)
    int8_sizes = {vi.name: math.prod(d.dim_value for d in vi.type.tensor_type.shape.dim)
                  for vi in shapes.graph.value_info if vi.type.tensor_type.elem_type == onnx.TensorProto.INT8}
    assert int8_sizes and sram["peak_bytes"] >= max(int8_sizes.values())
    # the arena places every live tensor without overlap, so it cannot be smaller than the peak
    assert arena["bytes"] >= sram["peak_bytes"]
    assert sram["required_bytes"] == arena["bytes"]


@pytest.mark.parametrize("name", ["ds_cnn_kws", "conv1d_sensor", "dense_autoencoder", "mobilenet_v2_small"])
def test_zoo_default_order_peak_equals_the_hand_computed_figure(name, zoo_run):
    run, zm = zoo_run(name), _built(name)
    # Worked out by hand in tests/zoo.py (1 B per int8 element, fused ReLU/ReLU6 in place).
    expected = zm.int8_chain_peak_bytes or zm.int8_layer_order_peak_bytes
    assert run.report["order"]["default_peak_bytes"] == expected


def test_zoo_unsupported_lstm_stays_float_counted_at_four_bytes(zoo_run):
    run, zm = zoo_run("unsupported_middle"), _built("unsupported_middle")
    model = run.report["model"]
    assert "lstm" in model["float_nodes"]
    assert any("LSTM" in note and "float" in note for note in model["notes"])
    (row,) = [r for r in run.report["flash"]["layers"] if r["name"] == "lstm"]
    # ONNX LSTM spec: W, R and B are float32 initializers, 4 bytes per element, not quantized
    assert row["precision"] == "float" and row["weight_bytes"] == 0
    assert row["float_bytes"] == 4 * zm.extra["lstm_params"]
    (layer,) = [r for r in run.report["layers"] if r["name"] == "lstm"]
    assert layer["precision"] == "float"
    assert "LSTM" in tq.op_types(run.int8_model)


def test_zoo_concat_branches_inputs_share_the_concat_scale(zoo_run):
    run = zoo_run("concat_branches")
    model = run.int8_model
    inits = {i.name: onnx.numpy_helper.to_array(i) for i in model.graph.initializer}
    producer = {o: n for n in model.graph.node for o in n.output}
    (concat,) = [n for n in model.graph.node if n.op_type == "Concat"]
    scales = {float(inits[producer[i].input[1]]) for i in concat.input}  # each input's DequantizeLinear
    assert len(scales) == 1  # common practice: int8 concat kernels copy bytes, so scales must match


@pytest.mark.parametrize("name, published_macs, tolerance", [
    ("mobilenet_v2", 300e6, 0.01),   # Sandler et al. 2018: 300 M multiply-adds at 224x224 (from memory)
    ("resnet18", 1.8e9, 0.02),       # He et al. 2016, Table 1: 1.8 G at 224x224 (from memory)
])
def test_zoo_full_size_macs_and_params_through_qfit_match_published_figures(name, published_macs, tolerance):
    zm = getattr(zoo, name)()
    loaded = prepare_model(zm.model)
    plan = make_plan(loaded)
    result = budget.analyze(loaded, plan, budget.BudgetOptions(order_search=False))
    assert abs(result.model["macs"] - published_macs) / published_macs < tolerance
    assert result.model["macs"] == zm.macs and result.model["params"] == zm.params
