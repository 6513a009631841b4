"""The operator registry (qfit/ops/) as the one place that knows operators.

* An op type registered with one entry is quantized, counted and tiled with no other change to qfit,
  and its int8 model agrees with the operator's definition (ONNX operator spec, Softsign:
  y = x / (1 + |x|)) within the quantization steps, run by onnx.reference.
* One clamp rule: a Clip or Relu folds into the previous layer's requantization exactly when its
  lower bound is >= 0 (common practice: ReLU and ReLU6 fold into an int8 kernel's output clamp), and
  the plan, the QDQ reader and equalization read the same bounds, including bounds stored as
  one-element arrays (as onnx's opset converter writes them).
"""
from __future__ import annotations

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

import zoo
from qfit import ops
from qfit.graph.load import prepare_model
from qfit.memory import budget
from qfit.ops.elementwise import POINTWISE
from qfit.ops.registry import OPS, Op
from qfit.quant import equalize, qdq_read
from qfit.quant.plan import make_plan
from qfit.quant.quantize import activation_params, build_qdq

NO_WHAT_IF = dict(what_if=False, order_search=False)


def _model(nodes, inits, x_shape=(1, 4, 6, 6), opset=17):
    graph = helper.make_graph(nodes, "case", [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(x_shape))],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, None)],
                              [numpy_helper.from_array(np.asarray(v), k) for k, v in inits.items()])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)], ir_version=9)
    inferred = onnx.shape_inference.infer_shapes(model, strict_mode=True)
    del model.graph.output[:]
    model.graph.output.extend(inferred.graph.output)
    return model


def _conv_then(op, extra_inputs=(), inits=None):
    rng = np.random.default_rng(0)
    all_inits = {"w": (rng.standard_normal((4, 4, 3, 3)) * 0.3).astype(np.float32), **(inits or {})}
    return _model([helper.make_node("Conv", ["x", "w"], ["c"], name="conv", kernel_shape=[3, 3], pads=[1] * 4),
                   helper.make_node(op, ["c", *extra_inputs], ["y"], name="act")], all_inits)


def test_an_op_registered_with_one_entry_is_quantized_counted_and_agrees_with_its_definition(monkeypatch):
    loaded_unknown = prepare_model(_model([helper.make_node("Softsign", ["x"], ["y"], name="op")], {}))
    assert make_plan(loaded_unknown).float_nodes == {"op"}          # not registered: stays float

    monkeypatch.setitem(OPS, "Softsign", Op(**POINTWISE))            # the one entry
    loaded = prepare_model(_model([helper.make_node("Softsign", ["x"], ["y"], name="op")], {}))
    plan = make_plan(loaded)
    assert plan.float_nodes == set() and set(plan.activations) == {"x", "y"}
    figures = budget.analyze(loaded, plan, budget.BudgetOptions(**NO_WHAT_IF))
    assert figures.macs["elementwise_ops"] == 4 * 6 * 6              # one operation per output element
    # int8 input and output, both live: a graph input is never overwritten in place (docs/memory.md)
    assert figures.sram["peak_bytes"] == 2 * 4 * 6 * 6

    ranges = {"x": (-4.0, 4.0), "y": (-0.8, 0.8)}
    int8 = build_qdq(loaded, plan, ranges).model
    x = np.random.default_rng(1).uniform(-4, 4, (1, 4, 6, 6)).astype(np.float32)
    y = ReferenceEvaluator(int8).run(None, {"x": x})[0]
    s_in = activation_params(*ranges["x"], 8, False)[0]
    s_out = activation_params(*ranges["y"], 8, False)[0]
    # |d softsign / dx| <= 1, so an input rounding of s_in / 2 moves y by at most s_in / 2
    assert np.max(np.abs(y - x / (1 + np.abs(x)))) <= s_in / 2 + s_out / 2 + 1e-6


@pytest.mark.parametrize("low, high, fused", [
    (0.0, 6.0, True),                 # ReLU6
    (0.5, 6.0, True),                 # lower bound above 0: still a clamp of the int8 range
    (-1.0, 1.0, False),               # negative lower bound: not a ReLU-family clamp
    ([0.0], [6.0], True),             # bounds as one-element arrays
])
def test_one_clamp_rule_for_plan_and_qdq_reader(low, high, fused):
    loaded = prepare_model(_conv_then("Clip", ("lo", "hi"), {"lo": np.float32(low) if np.ndim(low) == 0 else
                                                          np.asarray(low, np.float32),
                                                          "hi": np.asarray(high, np.float32)}))
    act = next(n for n in loaded.graph.node if n.name == "act")
    assert ops.is_fusable_clamp(act, loaded.constant) is fused
    plan = make_plan(loaded)
    assert (plan.fused == {"c": "y"}) is fused
    written = build_qdq(loaded, plan, {t: (-1.0, 1.0) for t in plan.calibrated_tensors()}).model
    _, plan_back = qdq_read.read_qdq(written)
    assert plan_back.fused == plan.fused


def test_qdq_reader_does_not_fuse_a_clip_with_a_negative_lower_bound():
    # A QDQ model with no quantizer between Conv and Clip(-1, 1): the Conv's output is stored as it
    # is (float32), as the plan would have it, not counted as folded into the Clip.
    rng = np.random.default_rng(0)
    w_q = rng.integers(-127, 128, (4, 4, 3, 3)).astype(np.int8)
    nodes = [
        helper.make_node("QuantizeLinear", ["x", "s", "z"], ["xq"], name="qx"),
        helper.make_node("DequantizeLinear", ["xq", "s", "z"], ["xd"], name="dqx"),
        helper.make_node("DequantizeLinear", ["wq", "sw"], ["w"], name="dqw"),
        helper.make_node("Conv", ["xd", "w"], ["c"], name="conv", kernel_shape=[3, 3], pads=[1] * 4),
        helper.make_node("Clip", ["c", "lo", "hi"], ["y0"], name="act"),
        helper.make_node("QuantizeLinear", ["y0", "s", "z"], ["yq"], name="qy"),
        helper.make_node("DequantizeLinear", ["yq", "s", "z"], ["y"], name="dqy"),
    ]
    inits = {"s": np.float32(0.05), "z": np.int8(0), "wq": w_q, "sw": np.float32(0.01),
             "lo": np.float32(-1.0), "hi": np.float32(1.0)}
    loaded, plan = qdq_read.read_qdq(_model(nodes, inits, opset=21))
    assert plan.fused == {}
    assert budget.stored_tensor(loaded, plan, loaded.shapes, "c") == (4 * 6 * 6 * 4, "float32")


def test_equalization_reads_relu6_bounds_written_as_one_element_arrays():
    # the zoo's MobileNetV2 at opset 17 is converted to opset 21, whose Clip bounds arrive as
    # one-element arrays; every ReLU6 pair is found with its cap of 6
    loaded = prepare_model(zoo.mobilenet_v2_small().model)
    clips = [n for n in loaded.graph.node if n.op_type == "Clip"]
    assert clips and any(np.asarray(loaded.constant(n.input[1])).ndim == 1 for n in clips)
    pairs = equalize.find_pairs(loaded)
    relu6 = [p for p in pairs if p.activation == "relu6"]
    assert relu6 and all(p.cap == 6.0 for p in relu6)
