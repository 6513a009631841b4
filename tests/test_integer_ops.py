"""The integer path on every operator case of tests/test_ops.py, against the ONNX operator spec
(`onnx.reference` running the same QDQ graph, fed the integer path's own integers at every quantizer,
as tests/test_integer_reference.py explains): single rounding within one step on >= 99.9 % of every
quantized tensor's elements, double rounding within one step per requantization too; and every op
with an integer kernel in the registry runs in integers (the rest in float between DQ and Q).
"""
from __future__ import annotations

import numpy as np
import pytest

from qfit import ops
from qfit.measure.integer import IntegerProgram
from test_integer_reference import forced_reference, quantized_model
from test_ops import CASES

# handled without an integer kernel on purpose: float ops, and linear Resize (computes new values)
FLOAT_CASES = {"softmax", "lstm", "gru", "unknown_op", "resize_linear", "prelu", "gemm_plain"}


@pytest.mark.parametrize("case_id", sorted(CASES))
@pytest.mark.parametrize("rounding", ["single", "double"])
def test_op_case_in_integers_agrees_with_onnx_reference(case_id, rounding):
    case = CASES[case_id]
    model = quantized_model(case.build(), samples=6, low=case.low, high=case.high)
    program = IntegerProgram(model, rounding)
    q_names = [n.output[0] for n in model.graph.node if n.op_type == "QuantizeLinear"]
    rng = np.random.default_rng(7)
    for _ in range(3):
        feeds = {i.name: (rng.uniform(case.low, case.high, [d.dim_value for d in i.type.tensor_type.shape.dim])
                          if case.low is not None else
                          rng.standard_normal([d.dim_value for d in i.type.tensor_type.shape.dim])).astype(np.float32)
                 for i in model.graph.input}
        ours = program.run(feeds, q_names)
        theirs = forced_reference(model, feeds, ours)
        for name, expected in theirs.items():
            diff = np.abs(ours[name].astype(np.int64) - expected.astype(np.int64))
            assert diff.max(initial=0) <= 1, (case_id, name)
            assert np.mean(diff <= (0 if rounding == "single" else 1)) >= (0.999 if rounding == "single" else 1.0)
    names = {n.name: n for n in model.graph.node}
    if case.node in names and ops.lookup(names[case.node].op_type).integer_kernel is not None \
            and case_id not in FLOAT_CASES and case.handling not in ("removed", "folded"):
        assert case.node in program.integer_nodes or case.handling == "fused", (case_id, program.float_nodes)
