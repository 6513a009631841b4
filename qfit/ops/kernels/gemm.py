"""Gemm and MatMul: int8 x int8 products summed in int32 (+ int32 bias), requantized per output
feature (Jacob et al., CVPR 2018, section 2.2-2.3), as for Conv.

The sums are a float32 matrix product of the centred integers when the bound of conv.py holds, else
a float64 one (exact below 2^53: any int8/int16 layer).
"""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.registry import attr
from qfit.ops.kernels.common import (FLOAT32_EXACT, FLOAT64_EXACT, INT32_LIMIT, Arithmetic, Operand, Prepared,
                              requantization_record, saturate_accumulator)
from qfit.ops.kernels.conv import integer_bias


def _centred(operand: Operand) -> tuple[np.ndarray | None, np.ndarray]:
    """(centred integer values or None for an activation, scale vector) of one matmul operand."""
    if operand.kind == "integer_constant":
        zero = operand.grid.zero_point.astype(np.int64)
        if not operand.grid.per_tensor:
            shape = [1] * operand.value.ndim
            shape[operand.grid.axis % operand.value.ndim] = -1
            zero = zero.reshape(shape)
        return operand.value.astype(np.int64) - zero, operand.grid.scale.astype(np.float64)
    return None, operand.grid.scale.astype(np.float64)


def _product_dtype(bound: int):
    if bound < FLOAT32_EXACT:
        return np.float32
    if bound < FLOAT64_EXACT:
        return np.float64
    raise ValueError("a matrix product too wide for exact float64 sums")


def _matmul(node: NodeProto, a: Operand, b: Operand, bias: Operand, out, arithmetic: Arithmetic,
            trans_a: bool = False) -> Prepared | None:
    """A @ B (+ bias) with per-tensor activations and per-tensor or per-output-channel constants."""
    if not out.per_tensor or not (a.is_integer and b.is_integer) or bias.kind == "activation":
        return None
    if a.kind == "activation" and not a.grid.per_tensor or b.kind == "activation" and not b.grid.per_tensor:
        return None
    a_const, a_scale = _centred(a)
    b_const, b_scale = _centred(b)
    if b_const is not None and b_scale.size > 1 and b.grid.axis % b_const.ndim != b_const.ndim - 1:
        return None
    if a_const is not None and a_scale.size > 1 and a.grid.axis % a_const.ndim != a_const.ndim - 2:
        return None
    if a_scale.size > 1 and b_scale.size > 1:
        return None
    # the output's per-channel vector runs along its last axis (B's columns) or rows (A's rows)
    rows = a_scale.size > 1
    acc_scale = a_scale.reshape(-1) * b_scale.reshape(-1) if not rows else a_scale * b_scale.reshape(-1)[0]
    channels = acc_scale.size
    # static bound on |partial sums|: max over outputs of sum |a||b| (a constant side gives exact sums)
    if b_const is not None:
        bound = a.grid.max_abs_centred() * int(np.abs(b_const).reshape(-1, b_const.shape[-1]).sum(axis=0).max(initial=0)
                                              if b_const.ndim >= 2 else np.abs(b_const).sum())
    elif a_const is not None:
        bound = b.grid.max_abs_centred() * int(np.abs(a_const).sum(axis=-1).max(initial=0))
    else:
        bound = None  # two activations: the depth is known at run time
    bias_int = integer_bias(bias, acc_scale, channels) if bias.kind != "absent" else None
    bias_abs = int(np.abs(bias_int).max(initial=0)) if bias_int is not None else 0
    m0, shift = arithmetic.multipliers(acc_scale / out.s)
    shape = (-1, 1) if rows else (-1,)
    requantize = arithmetic.requantizer(m0.reshape(shape), shift.reshape(shape), out.z, out.low, out.high)
    dtype = _product_dtype(bound) if bound is not None else None
    a_fixed = a_const.astype(dtype) if a_const is not None else None
    b_fixed = b_const.astype(dtype) if b_const is not None else None
    activation_bound = a.grid.max_abs_centred() * b.grid.max_abs_centred() if bound is None else 0
    bias_shape = bias_int.reshape(shape) if bias_int is not None else None
    za = a.grid.z if a_const is None else 0
    zb = b.grid.z if b_const is None else 0

    def run(values):
        if bound is None:
            depth = values[0].shape[-2 if trans_a else -1]
            run_bound, run_dtype = activation_bound * depth, _product_dtype(activation_bound * depth)
        else:
            run_bound, run_dtype = bound, dtype
        left = a_fixed if a_fixed is not None else values[0].astype(run_dtype) - run_dtype(za)
        if trans_a:
            left = np.swapaxes(left, -1, -2)
        right = b_fixed if b_fixed is not None else values[1].astype(run_dtype) - run_dtype(zb)
        acc = np.matmul(left, right).astype(np.int64)
        if bias_shape is not None:
            acc += bias_shape
        if run_bound + bias_abs >= INT32_LIMIT:
            saturate_accumulator(acc, node, arithmetic)
        return [requantize(acc)]

    return Prepared(run, requantization_record(m0, shift))


def build_gemm(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    if float(attr(node, "alpha", 1.0)) != 1.0 or float(attr(node, "beta", 1.0)) != 1.0:
        return None
    a, b = operands[0], operands[1]
    bias = operands[2] if len(operands) > 2 else Operand("absent")
    if a.kind != "activation" or b.kind != "integer_constant" or b.value.ndim != 2:
        return None
    if attr(node, "transB", 0):
        grid = b.grid
        axis = None if grid.axis is None else 1 - grid.axis % 2
        b = Operand("integer_constant", type(grid)(grid.scale, grid.zero_point, grid.low, grid.high, axis),
                    b.value.T)
    if bias.kind != "absent" and np.size(bias.value) not in (1, b.value.shape[1]):
        return None
    if bias.kind != "absent" and np.size(bias.value) == 1 and b.value.shape[1] != 1:
        bias = Operand(bias.kind, bias.grid, np.broadcast_to(bias.value.reshape(-1), (b.value.shape[1],)))
    if bias.kind != "absent" and b.grid.per_tensor and b.value.shape[1] > 1:
        # one accumulator scale for all outputs: broadcast the scale so the bias vector lines up
        grid = b.grid
        b = Operand("integer_constant", type(grid)(np.broadcast_to(grid.scale.reshape(-1), (b.value.shape[1],)),
                                                   np.broadcast_to(grid.zero_point.reshape(-1), (b.value.shape[1],)),
                                                   grid.low, grid.high, 1), b.value)
    return _matmul(node, a, b, bias, outputs[0], arithmetic, trans_a=bool(attr(node, "transA", 0)))


def build_matmul(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    a, b = operands[0], operands[1]
    if a.kind != "activation" and b.kind != "activation":
        return None
    return _matmul(node, a, b, Operand("absent"), outputs[0], arithmetic)
