"""Data movement (Reshape, Flatten, Squeeze, Unsqueeze, Transpose, Slice, Split, Pad, Resize nearest,
max pools) and Concat: the integers move, their values do not change.

The op runs on the centred integers q - z_x held in float32 (exact), by its own float definition, so
every attribute and opset variant means what the ONNX spec says. Padding by the real value 0 pads
with z_x, as an integer kernel does. An output whose grid equals the input's (a shared quantizer)
gets z_x back; another grid is reached by one requantization M(s_x / s_y). Concat requantizes each
input whose grid differs from the output's (Jacob et al., CVPR 2018: a rescale per input) and copies
the others.
"""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.registry import attr
from qfit.ops.kernels.common import (Arithmetic, Grid, Operand, Prepared, centred_float, one_activation_in,
                                    requantization_record, storage_dtype)


def _to_grid(source: Grid, target: Grid, arithmetic: Arithmetic):
    """centred integers on `source` -> integers on `target` (identity + zero point when equal)."""
    if source.same_as(target):
        dtype = storage_dtype(target.low, target.high)
        return lambda centred: np.clip(centred + target.z, target.low, target.high).astype(dtype), None
    m0, shift = arithmetic.multipliers(source.s / target.s)
    requantize = arithmetic.requantizer(m0, shift, target.z, target.low, target.high)
    return requantize, requantization_record(m0, shift)


def build_movement(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    x = operands[0]
    if not one_activation_in(operands, outputs):
        return None
    constants = {i: np.asarray(op.value) for i, op in enumerate(operands) if op.kind == "constant"}
    if node.op_type == "Resize" and (attr(node, "mode", b"nearest") not in (b"nearest", "nearest")):
        return None
    if node.op_type == "Pad":
        mode = attr(node, "mode", b"constant")
        if mode in (b"constant", "constant"):
            value = float(np.ravel(constants[2])[0]) if 2 in constants and np.size(constants[2]) else 0.0
            pad = value / x.grid.s
            if abs(pad - round(pad)) > 1e-6:
                return None  # the pad value is not on the input's grid
            constants[2] = np.asarray(round(pad), dtype=np.float32).reshape(np.shape(constants.get(2, 0.0)))
    moved = arithmetic.compile(node, constants)
    converters = [_to_grid(x.grid, g, arithmetic) for g in outputs]
    z_x = x.grid.z

    def run(values):
        results = moved([centred_float(values[0], z_x)])
        return [convert(np.rint(r).astype(np.int64)) for (convert, _), r in zip(converters, results)]

    records = [rec for _, rec in converters if rec is not None]
    return Prepared(run, records[0] if records else None)


def build_concat(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    out = outputs[0]
    if not out.per_tensor or any(op.kind not in ("activation", "integer_constant") or not op.grid.per_tensor
                                 for op in operands):
        return None
    converters = [_to_grid(op.grid, out, arithmetic) for op in operands]
    axis = int(attr(node, "axis", 0))
    statics = [convert(op.value.astype(np.int64) - op.grid.z) if op.kind == "integer_constant" else None
               for op, (convert, _) in zip(operands, converters)]

    def run(values):
        parts = [fixed if fixed is not None else convert(value.astype(np.int64) - op.grid.z)
                 for op, (convert, _), fixed, value in zip(operands, converters, statics, values)]
        return [np.concatenate(parts, axis=axis)]

    per_input = [rec for _, rec in converters]
    if not any(per_input):
        return Prepared(run, None)
    return Prepared(run, {"inputs": [rec or "copied" for rec in per_input]})
