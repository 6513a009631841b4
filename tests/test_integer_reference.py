"""The integer path against the ONNX operator spec (`onnx.reference` running the same QDQ graph).

Single rounding (one rounding of acc x M0 x 2^(shift-31)) approximates the spec's float arithmetic
(dequantize, float op, QuantizeLinear's round half to even) to within one step: the fixed-point
multiplier carries 31 bits, so only values within ~2^-31 of a rounding tie, or at an exact tie
(away from zero vs to even), may land on the neighbouring integer. Each quantized tensor is judged
with onnx.reference fed the integer path's own integers ("forced", as tests/through_qfit.py explains:
no cascade of a single flip through later layers).
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx.reference import ReferenceEvaluator

import zoo
from through_qfit import _forced_copy, model_inputs, random_batch
from qfit.graph.load import prepare_model
from qfit.measure.integer import IntegerProgram
from qfit.quant.observe import TensorStats
from qfit.quant.plan import PlanOptions, make_plan
from qfit.quant.quantize import build_qdq, calibrated_ranges
from qfit.runtime.sessions import Runner


def quantized_model(model: onnx.ModelProto, samples: int = 8, seed: int = 0, low: float | None = None,
                    high: float | None = None) -> onnx.ModelProto:
    """qfit's QDQ model of `model`, min-max ranges from `samples` seeded normal inputs (uniform in
    [low, high] when both are given)."""
    loaded = prepare_model(model)
    plan = make_plan(loaded, PlanOptions())
    tensors = plan.calibrated_tensors()
    runner = Runner(loaded.model, tensors, batch_size=1)
    stats = {t: TensorStats(t) for t in tensors}
    batch = random_batch(model, samples, seed)
    if low is not None and high is not None:
        rng = np.random.default_rng(seed)
        batch = {k: rng.uniform(low, high, v.shape).astype(np.float32) for k, v in batch.items()}
    for i in range(samples):
        values = runner({k: v[i:i + 1] for k, v in batch.items()})
        for t in stats:
            stats[t].update(values[t])
    return build_qdq(loaded, plan, calibrated_ranges(plan, stats, "minmax", 99.99)).model


def integer_tensors(model: onnx.ModelProto, rounding: str, feeds: dict) -> tuple[IntegerProgram, dict]:
    """Every QuantizeLinear output of `model` as the integer path computes it."""
    program = IntegerProgram(model, rounding)
    names = [n.output[0] for n in model.graph.node if n.op_type == "QuantizeLinear"]
    return program, program.run(feeds, names)


def forced_reference(model: onnx.ModelProto, feeds: dict, integers: dict) -> dict:
    """onnx.reference's QuantizeLinear outputs when every integer tensor's readers get `integers`."""
    forced, replaced = _forced_copy(model)
    names = list(replaced)
    ref_feeds = dict(feeds)
    ref_feeds.update({replaced[name]: integers[name].astype(_dtype_of(forced, replaced[name])) for name in names})
    return dict(zip(names, ReferenceEvaluator(forced).run(names, ref_feeds)))


def _dtype_of(model: onnx.ModelProto, input_name: str):
    elem = next(i.type.tensor_type.elem_type for i in model.graph.input if i.name == input_name)
    return onnx.helper.tensor_dtype_to_np_dtype(elem)


@pytest.mark.parametrize("name", sorted(zoo.ZOO))
def test_single_rounding_within_one_step_of_onnx_reference_on_every_zoo_model(name):
    # Source: the ONNX operator spec, executed by onnx.reference on the same QDQ graph.
    model = quantized_model(zoo.ZOO[name]().model)
    total = within = 0
    for seed in (1, 2):
        feeds = {k: v for k, v in random_batch(model, 1, seed).items()}
        program, ours = integer_tensors(model, "single", feeds)
        theirs = forced_reference(model, feeds, ours)
        for tensor, expected in theirs.items():
            diff = np.abs(ours[tensor].astype(np.int64) - expected.astype(np.int64))
            total += diff.size
            within += int(np.sum(diff <= 1))
    assert total > 0
    assert within / total >= 0.999, (name, within, total)
    # the integer path runs every quantized node in integers (the zoo's float nodes are unsupported ops)
    assert program.integer_nodes


def quantized_with_int16(model: onnx.ModelProto, every: int = 3, samples: int = 8) -> tuple[onnx.ModelProto, list]:
    """qfit's QDQ model with every `every`-th calibrated tensor at 16-bit activations (as a repair sets)."""
    loaded = prepare_model(model)
    first = make_plan(loaded, PlanOptions())
    wide = {t: 16 for t in first.calibrated_tensors()[1::every]}
    plan = make_plan(loaded, PlanOptions(activation_bits=wide))
    tensors = plan.calibrated_tensors()
    runner = Runner(loaded.model, tensors, batch_size=1)
    stats = {t: TensorStats(t) for t in tensors}
    batch = random_batch(model, samples, 0)
    for i in range(samples):
        values = runner({k: v[i:i + 1] for k, v in batch.items()})
        for t in stats:
            stats[t].update(values[t])
    return build_qdq(loaded, plan, calibrated_ranges(plan, stats, "minmax", 99.99)).model, sorted(wide)


@pytest.mark.parametrize("name", ["resnet_small", "mobilenet_v2_small", "concat_branches"])
def test_single_rounding_with_int16_activations_within_one_step_of_onnx_reference(name):
    # Source: the ONNX operator spec (onnx.reference). 16-bit activations take the wide paths: exact
    # sums split into digits when they exceed float32's 2^24, Add's left shift 15, 65536-entry tables.
    model, wide = quantized_with_int16(zoo.ZOO[name]().model)
    assert wide
    feeds = random_batch(model, 1, 1)
    program, ours = integer_tensors(model, "single", feeds)
    theirs = forced_reference(model, feeds, ours)
    diffs = [np.abs(ours[t].astype(np.int64) - v.astype(np.int64)) for t, v in theirs.items()]
    total, within = sum(d.size for d in diffs), sum(int(np.sum(d <= 1)) for d in diffs)
    assert within / total >= 0.999
    assert program.float_nodes == []
    sixteen = [t for t, grid in program.quantizers.items() if grid.high == 32767]
    assert sixteen
