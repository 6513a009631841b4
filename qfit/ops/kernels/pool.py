"""Pooling: average pools as an exact integer window sum whose division by the window size is folded
into the fixed-point multiplier, max pools on the integers themselves.

AveragePool / GlobalAveragePool / ReduceMean of x (s_x, z_x) into y (s_y, z_y), n values per window:
  acc = sum (x - z_x),  y = clamp(z_y + acc * M(s_x / (s_y n)))
so the division rounds once (single) or as the two-step multiply (double), like the requantization of
a layer (Jacob et al., CVPR 2018, section 2.2, with the 1/n folded into the real factor). Where padded
positions are not counted, n varies per output position and so does the multiplier.
Max pools commute with the monotonic quantizer: the max of the integers is the integer of the max, and
the output grid is the input's (a shared quantizer) or is reached by one requantization.
"""
from __future__ import annotations

import numpy as np
from onnx import NodeProto, helper

from qfit.ops.registry import attr
from qfit.ops.kernels.common import (Arithmetic, Operand, Prepared, centred_float, one_activation_in,
                                    requantization_record)
from qfit.ops.kernels.movement import build_movement


def _window_count(node: NodeProto, arithmetic: Arithmetic, spatial_shape: tuple[int, ...]) -> np.ndarray:
    """Values per window at each output position (an all-ones image through the same window sum)."""
    ones_sum = _window_sum_runner(node, arithmetic, 1)
    return ones_sum([np.ones((1, 1) + tuple(spatial_shape), np.float32)])[0][0, 0].astype(np.int64)


def _window_sum_runner(node: NodeProto, arithmetic: Arithmetic, channels: int):
    """A depthwise all-ones Conv with the pool's window, strides, pads and dilations: exact window sums."""
    kernel = list(attr(node, "kernel_shape"))
    conv = helper.make_node("Conv", [node.input[0], node.input[0] + "_ones"], [node.output[0]], group=channels,
                            kernel_shape=kernel)
    for name in ("strides", "pads", "dilations", "auto_pad"):
        value = attr(node, name)
        if value is not None:
            conv.attribute.append(helper.make_attribute(name, value))
    compiled = arithmetic.compile(conv, {1: np.ones([channels, 1] + kernel, np.float32)})
    return lambda inputs: compiled(inputs)


def build_average_pool(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    x, out = operands[0], outputs[0]
    if not one_activation_in(operands, outputs) or attr(node, "ceil_mode", 0):
        return None
    include_pad = bool(attr(node, "count_include_pad", 0))
    window = int(np.prod(attr(node, "kernel_shape")))
    cache: dict[tuple, tuple] = {}

    def prepared_for(shape):
        if shape not in cache:
            sums = _window_sum_runner(node, arithmetic, shape[1])
            counts = np.full((1,), window) if include_pad else _window_count(node, arithmetic, shape[2:])
            m0, shift = arithmetic.multipliers(x.grid.s / (out.s * counts.astype(np.float64)))
            cache[shape] = (sums, arithmetic.requantizer(m0, shift, out.z, out.low, out.high), m0, shift)
        return cache[shape]

    def run(values):
        sums, requantize, _, _ = prepared_for(values[0].shape)
        acc = sums([centred_float(values[0], x.grid.z)])[0].astype(np.int64)
        return [requantize(acc)]

    if x.shape is not None and not include_pad:
        m0, shift = prepared_for(tuple(x.shape))[2:]  # one multiplier per output position
    else:
        m0, shift = arithmetic.multipliers(x.grid.s / (out.s * window))
    return Prepared(run, requantization_record(m0, shift, window=window))


def _mean_axes(node: NodeProto, operands: list[Operand], ndim: int) -> tuple[int, ...] | None:
    if node.op_type == "GlobalAveragePool":
        return tuple(range(2, ndim))
    axes = attr(node, "axes")
    if axes is None and len(operands) > 1 and operands[1].kind == "constant":
        axes = [int(a) for a in np.ravel(operands[1].value)]
    if axes is None or len(axes) == 0:
        return None if attr(node, "noop_with_empty_axes", 0) else tuple(range(ndim))
    return tuple(sorted(int(a) % ndim for a in axes))


def build_mean(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    """GlobalAveragePool and ReduceMean: integer sum over the axes, 1/n folded into the multiplier."""
    x, out = operands[0], outputs[0]
    if not one_activation_in(operands, outputs):
        return None
    keepdims = node.op_type == "GlobalAveragePool" or bool(attr(node, "keepdims", 1))
    cache: dict[tuple, tuple] = {}

    def prepared_for(shape):
        if shape not in cache:
            axes = _mean_axes(node, operands, len(shape))
            count = int(np.prod([shape[a] for a in axes])) if axes else 1
            m0, shift = arithmetic.multipliers(x.grid.s / (out.s * count))
            cache[shape] = (axes, arithmetic.requantizer(m0, shift, out.z, out.low, out.high), m0, shift)
        return cache[shape]

    def run(values):
        axes, requantize, _, _ = prepared_for(values[0].shape)
        if axes is None:  # ReduceMean with empty axes and noop_with_empty_axes: values pass through
            return [requantize(values[0].astype(np.int64) - x.grid.z)]
        acc = np.sum(values[0], axis=axes, dtype=np.int64, keepdims=keepdims)
        count = int(np.prod([values[0].shape[a] for a in axes]))
        acc -= count * x.grid.z
        return [requantize(acc)]

    record = {"multiplier_from": "s_x / (s_y n), n = values averaged"}
    if x.shape is not None:
        _, _, m0, shift = prepared_for(tuple(x.shape))
        record = requantization_record(m0, shift, **record)
    return Prepared(run, record)


def build_max_pool(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    if len(node.output) > 1 and node.output[1]:
        return None  # the Indices output is not an activation
    return build_movement(node, operands, outputs[:1], arithmetic)
