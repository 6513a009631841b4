"""The evaluation's batches are sized by bytes (qfit.measure.evaluate.EVALUATION_BATCH_BYTES) and the
integer path keeps int8 tensors as integers: neither may change a figure.

Data: the digits CNN (tests/models/README.md) on the 540 held-out images of scikit-learn's digits set
(tests/digits_folders.py). Each figure is compared between the default batches (16 samples: a digits
sample's tensors are a few KiB) and a one-byte cap (one sample per batch). Per-layer sums are float32
within a batch and float64 across batches, so the unrounded sums differ in their last bits; the
report's figures (SQNR to 0.01 dB, cosine to 6 decimals, counts) must not.
"""
from __future__ import annotations

import numpy as np
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

import digits_folders
from qfit import check as pipeline
from qfit.measure import evaluate as evaluation
from qfit.measure import integer


@pytest.fixture(scope="module")
def digits_quantized(tmp_path_factory):
    calib, heldout = digits_folders.write_folders(tmp_path_factory.mktemp("digits"))
    options = pipeline.CheckOptions(model_path=str(digits_folders.MODEL), calib_dir=calib, eval_dir=heldout,
                                    out_dir=str(tmp_path_factory.mktemp("out")), flash_limit_bytes=1 << 30,
                                    sram_limit_bytes=1 << 30, input_shapes=digits_folders.INPUT_SHAPES,
                                    progress=False)
    loaded = pipeline.load_stage(options)
    planned = pipeline.plan_stage(options, loaded)
    calibration = pipeline.calibration_stage(options, loaded, planned)
    data, _ = pipeline.open_evaluation(options, loaded.model)
    return pipeline.quantize_stage(options, loaded, planned, calibration, data), data


def _evaluated(quantized, data, batch_bytes: int) -> tuple[dict, list[dict]]:
    layers = evaluation.compared_layers(quantized.reference, quantized.plan)
    accuracy, sums = evaluation.evaluate(quantized.reference, quantized.model, layers, data, 16,
                                         progress=False, batch_bytes=batch_bytes)
    evaluation.fill_layer_rows(quantized.quantizer.loaded, quantized.plan, layers, sums)
    return accuracy, layers


def test_a_one_byte_batch_cap_gives_the_figures_of_the_default_batches(digits_quantized):
    quantized, data = digits_quantized
    layers = evaluation.compared_layers(quantized.reference, quantized.plan)
    tensors = [row["tensor"] for row in layers]
    # the two runs do differ in their batches: 16 samples by default, one under a one-byte cap
    assert evaluation.evaluation_batch(quantized.reference, tensors, 16) == 16
    assert evaluation.evaluation_batch(quantized.reference, tensors, 16, batch_bytes=1) == 1
    default_accuracy, default_layers = _evaluated(quantized, data, evaluation.EVALUATION_BATCH_BYTES)
    tiny_accuracy, tiny_layers = _evaluated(quantized, data, 1)
    assert default_accuracy["samples"] == tiny_accuracy["samples"] == 540
    assert default_accuracy["metric"] == "top1" and default_accuracy["float"] > 90.0   # a real model, not noise
    assert tiny_accuracy == default_accuracy   # top-1, drop, its interval, output SQNR, the arithmetic section
    assert len(default_layers) >= 5
    for default_row, tiny_row in zip(default_layers, tiny_layers):
        for key in ("sqnr_db", "cosine", "max_abs_error", "mean_abs_error_rel"):
            assert tiny_row[key] == default_row[key], (default_row["name"], key)


def test_the_integer_path_returns_int8_tensors_dequantized_as_the_onnx_spec_does(digits_quantized):
    # Source: the ONNX operator spec's DequantizeLinear, y = (x - zero_point) * scale, executed by
    # onnx.reference on the stored integers and the model's own scale and zero point.
    quantized, data = digits_quantized
    model = quantized.model.model
    dq_nodes = [n for n in model.graph.node if n.op_type == "DequantizeLinear"
                and n.output[0] in quantized.model.dequantized.values()
                and n.input[0] not in {i.name for i in model.graph.initializer}]
    names = [n.output[0] for n in dq_nodes]
    assert len(names) >= 3   # every activation between layers
    runner = integer.IntegerRunner(model, names, "double", 16)
    batch = next(iter(data.batches(16)))
    got = runner(batch.inputs)
    constants = {i.name: i for i in model.graph.initializer}
    for node in dq_nodes:
        stored, grid = got.stored[node.output[0]]
        assert grid is not None and stored.dtype in (np.int8, np.uint8)   # kept as int8 between layers
        scale, zero = (numpy_helper.to_array(constants[name]) for name in node.input[1:3])
        graph = helper.make_graph([helper.make_node("DequantizeLinear", ["q", "s", "z"], ["y"])], "dq",
                                  [helper.make_tensor_value_info("q", helper.np_dtype_to_tensor_dtype(stored.dtype),
                                                                 None)],
                                  [helper.make_tensor_value_info("y", TensorProto.FLOAT, None)],
                                  [numpy_helper.from_array(scale, "s"), numpy_helper.from_array(zero, "z")])
        (expected,) = ReferenceEvaluator(helper.make_model(graph)).run(None, {"q": stored})
        assert np.array_equal(got[node.output[0]], expected), node.name
