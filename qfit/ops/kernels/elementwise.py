"""Elementwise kernels: Add/Sub with input rescaling, Mul, Div by a constant, and table lookups for
activations with their own output range.

Add/Sub of a (scale s_a) and b (s_b) into y (s_y) (Jacob et al., CVPR 2018, section 2.4 and its
reference code, from memory): both inputs are brought onto a common finer grid before the sum,
  s_c = 2 max(s_a, s_b) / 2^L,  a' = ((a - z_a) << L) * M(s_a / (2 max)),  b' likewise,
  y = clamp(z_y + (a' +- b') * M(2 max / (2^L s_y)))
with L = 20 for 8-bit inputs (15 for 16-bit, so (a - z_a) << L stays inside int32) and every M a
fixed-point multiplier applied in the selected rounding. A float constant operand c enters as the
integer round(c / s_c).
Mul: acc = (a - z_a)(b - z_b), y = clamp(z_y + acc * M(s_a s_b / s_y)); by a float constant c, one
multiplier per element of c: M(s_a |c| / s_y) applied to sign(c)(a - z_a). Div by c multiplies by 1/c.
Unary activations (ReLU, LeakyReLU, sigmoid, tanh, hard sigmoid/swish, Clip) are a lookup table over
every input integer, built from the op's float definition and the output quantizer (common practice
for int8 activation kernels); the table equals the float preview exactly, value by value.
"""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.kernels.common import (INT32_LIMIT, Arithmetic, Operand, Prepared, one_activation_in, storage_dtype,
                                    requantization_record)


def _left_shift(*grids) -> int:
    return 20 if all(g.high - g.low <= 255 for g in grids) else 15


def _integer_term(operand: Operand):
    """(static centred integers or None for an activation, zero point) of an integer operand."""
    if operand.kind == "integer_constant":
        return operand.value.astype(np.int64) - operand.grid.zero_point.astype(np.int64), 0
    return None, operand.grid.z


def build_add(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic,
              sign: int = 1) -> Prepared | None:
    out = outputs[0]
    if len(operands) != 2 or not out.per_tensor:
        return None
    integer = [op for op in operands if op.is_integer]
    if not integer or any(not op.grid.per_tensor for op in integer) or any(
            op.kind not in ("activation", "integer_constant", "constant") for op in operands):
        return None
    left = _left_shift(*(op.grid for op in integer))
    twice_max = 2.0 * max(op.grid.s for op in integer)
    common = twice_max / (1 << left)
    terms, records = [], {}
    for i, op in enumerate(operands):
        factor = sign if i == 1 else 1
        if op.kind == "constant":
            term = np.round(factor * np.asarray(op.value, np.float64) / common)
            if np.any(np.abs(term) >= INT32_LIMIT):
                return None
            terms.append((term.astype(np.int64), None, None, 1))
            continue
        m0, shift = arithmetic.multipliers(op.grid.s / twice_max)
        # (x - z) << L times a factor <= 1/2 stays inside int32: the rescale cannot saturate
        rescale = arithmetic.requantizer(m0, shift, 0, -INT32_LIMIT, INT32_LIMIT - 1,
                                         acc_bound=op.grid.max_abs_centred() << left)
        fixed, zero = _integer_term(op)
        if fixed is not None:
            fixed = factor * rescale(fixed << left).astype(np.int64)
        terms.append((fixed, rescale, zero, factor))
        records[f"input{i}_multiplier"], records[f"input{i}_shift"] = int(m0), int(shift)
    m0, shift = arithmetic.multipliers(common / out.s)
    # each rescaled input is at most max|x - z| 2^L / 2 (its factor is <= 1/2); a constant as it is
    acc_bound = sum(int(np.abs(t[0]).max(initial=0)) if t[1] is None else
                    (operands[i].grid.max_abs_centred() << left) // 2 + 1 for i, t in enumerate(terms))
    requantize = arithmetic.requantizer(m0, shift, out.z, out.low, out.high, acc_bound=acc_bound)

    def run(values):
        acc = None
        for (fixed, rescale, zero, factor), value in zip(terms, values):
            if fixed is not None:
                part = fixed
            else:
                centred = np.subtract(value, zero, dtype=np.int64)
                centred <<= left
                part = rescale(centred).astype(np.int64)
                if factor != 1:
                    np.negative(part, out=part)
            acc = part if acc is None else np.add(acc, part, out=part if fixed is None else None)
        return [requantize(acc)]

    return Prepared(run, requantization_record(m0, shift, left_shift=left, **records))


def build_sub(node, operands, outputs, arithmetic):
    return build_add(node, operands, outputs, arithmetic, sign=-1)


def build_mul(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic,
              divide: bool = False) -> Prepared | None:
    out = outputs[0]
    if len(operands) != 2 or not out.per_tensor or not operands[0].is_integer or not operands[0].grid.per_tensor:
        return None
    a, b = operands
    if divide and b.kind != "constant":
        return None
    if b.kind == "constant":
        c = np.asarray(b.value, np.float64)
        if divide:
            if np.any(c == 0):
                return None
            c = 1.0 / c
        m0, shift = arithmetic.multipliers(a.grid.s * np.abs(c) / out.s)
        sign = np.where(c < 0, -1, 1).astype(np.int64)
        fixed, zero = _integer_term(a)

        def run_constant(values):
            centred = fixed if fixed is not None else values[0].astype(np.int64) - zero
            scaled = arithmetic.multiply(centred * sign, m0, shift) + out.z
            return [np.clip(scaled, out.low, out.high).astype(storage_dtype(out.low, out.high))]

        return Prepared(run_constant, requantization_record(m0, shift))
    if not b.is_integer or not b.grid.per_tensor:
        return None
    m0, shift = arithmetic.multipliers(a.grid.s * b.grid.s / out.s)
    requantize = arithmetic.requantizer(m0, shift, out.z, out.low, out.high)
    terms = [_integer_term(a), _integer_term(b)]

    def run(values):
        a_c, b_c = (fixed if fixed is not None else value.astype(np.int64) - zero
                    for (fixed, zero), value in zip(terms, values))
        return [requantize(a_c * b_c)]

    return Prepared(run, requantization_record(m0, shift))


def build_div(node, operands, outputs, arithmetic):
    return build_mul(node, operands, outputs, arithmetic, divide=True)


def build_lookup(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    """Unary activation as a table over every integer of the input grid."""
    x, out = operands[0], outputs[0]
    if not one_activation_in(operands, outputs):
        return None
    every = np.arange(x.grid.low, x.grid.high + 1, dtype=np.int64)
    # DequantizeLinear's float32 arithmetic, the op in float32, QuantizeLinear's rounding: as the preview
    real = (every - x.grid.z).astype(np.float32) * np.float32(x.grid.s)
    constants = {i: np.asarray(op.value) for i, op in enumerate(operands) if op.kind == "constant"}
    activated = arithmetic.compile(node, constants)([real])[0]
    table = np.clip(np.rint(activated / np.float32(out.s)) + out.z, out.low, out.high).astype(
        storage_dtype(out.low, out.high))
    low = x.grid.low

    def run(values):
        return [table[values[0].astype(np.int64) - low]]

    return Prepared(run, {"lookup_table_entries": int(table.size)})
