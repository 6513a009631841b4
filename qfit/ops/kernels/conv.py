"""Conv (standard, depthwise, grouped, 1-D/2-D/3-D): int8 x int8 products summed in int32, plus the
int32 bias, requantized per output channel (Jacob et al., CVPR 2018, section 2.2-2.3).

acc[c] = sum (x - z_x)(w[c] - z_w[c]) + b[c];  y = clamp(z_y + M0[c] * 2^(shift[c] - 31) * acc[c])
with M0[c], shift[c] from s_x s_w[c] / s_y.

The sums run through a float32 convolution of the centred integers. That is exact when every partial
sum stays below 2^24 in magnitude, which holds when max|x - z_x| * max_c sum|w[c] - z_w[c]| < 2^24
(checked per layer before any run); a wider layer splits x - z_x into base-2^b digits whose sums each
satisfy the bound and recombines them in int64.
"""
from __future__ import annotations

import numpy as np
from onnx import NodeProto, helper

from qfit.ops.kernels.common import (FLOAT32_EXACT, INT32_LIMIT, Arithmetic, Operand, Prepared, centred_float,
                              channel_shape, requantization_record, saturate_accumulator)


def exact_sums(run_float, centred: np.ndarray, max_abs: int, weight_abs_sum: int) -> np.ndarray:
    """int64 sums of products of the integer array `centred` (|values| <= max_abs) with integer
    weights (max over outputs of sum |w| = weight_abs_sum), computed by the float32 `run_float`."""
    if max_abs * weight_abs_sum < FLOAT32_EXACT:
        return run_float(centred.astype(np.float32)).astype(np.int64)
    bits = int(np.floor(np.log2((FLOAT32_EXACT - 1) / max(weight_abs_sum, 1))))
    if bits < 1:
        raise ValueError("a layer's weights alone exceed exact float32 sums (sum |w| >= 2^23)")
    as_int = centred.astype(np.int64)
    low = as_int & ((1 << bits) - 1)
    high = as_int >> bits
    return (run_float(low.astype(np.float32)).astype(np.int64)
            + (exact_sums(run_float, high, -(-max_abs >> bits), weight_abs_sum) << bits))


def integer_bias(bias: Operand, accumulator_scale: np.ndarray, channels: int) -> np.ndarray:
    """int64 bias on the accumulator's grid s_x * s_w[c]: an int32 bias stored at that scale adds
    as is (qfit writes it so); another scale or a float bias is rounded onto it."""
    if bias.kind == "absent":
        return np.zeros(channels, np.int64)
    if bias.kind == "integer_constant":
        centred = bias.value.astype(np.int64) - bias.grid.zero_point.astype(np.int64)
        scale = np.broadcast_to(bias.grid.scale, (channels,))
        if np.allclose(scale, accumulator_scale, rtol=1e-6, atol=0):
            return centred.reshape(channels)
        real = centred.astype(np.float64) * scale
    else:
        real = np.asarray(bias.value, np.float64).reshape(channels)
    return np.clip(np.round(real / accumulator_scale), -INT32_LIMIT, INT32_LIMIT - 1).astype(np.int64)


def build_conv(node: NodeProto, operands: list[Operand], outputs, arithmetic: Arithmetic) -> Prepared | None:
    x, w = operands[0], operands[1]
    bias = operands[2] if len(operands) > 2 else Operand("absent")
    out = outputs[0]
    if (x.kind != "activation" or not x.grid.per_tensor or w.kind != "integer_constant"
            or not out.per_tensor or bias.kind == "activation"):
        return None
    channels = w.value.shape[0]
    w_zero = w.grid.zero_point.astype(np.int64)
    w_scale = w.grid.scale.astype(np.float64)
    if not w.grid.per_tensor:
        if w.grid.axis not in (0, -w.value.ndim):
            return None
        w_zero = w_zero.reshape(channel_shape(w.value.ndim, 0, channels))
    centred_w = w.value.astype(np.int64) - w_zero
    w_scale = np.broadcast_to(w_scale.reshape(-1), (channels,))
    acc_scale = x.grid.s * w_scale
    b = integer_bias(bias, acc_scale, channels)
    weight_abs_sum = int(np.abs(centred_w).reshape(channels, -1).sum(axis=1).max()) if centred_w.size else 0
    max_abs = x.grid.max_abs_centred()
    acc_bound = max_abs * weight_abs_sum + int(np.abs(b).max(initial=0))
    may_overflow = acc_bound >= INT32_LIMIT
    m0, shift = arithmetic.multipliers(acc_scale / out.s)
    spatial = w.value.ndim - 2
    per_channel = channel_shape(2 + spatial, 1, channels)
    bias_b = b.reshape(per_channel)
    # without a possible overflow the bias folds into the requantizer's constants (one pass less)
    requantize = arithmetic.requantizer(m0.reshape(per_channel), shift.reshape(per_channel), out.z,
                                        out.low, out.high, bias=None if may_overflow else bias_b,
                                        acc_bound=None if may_overflow else acc_bound)
    sums_node = helper.make_node("Conv", [node.input[0], node.input[1]], [node.output[0]], name=node.name)
    sums_node.attribute.extend(node.attribute)
    run_float = arithmetic.compile(sums_node, {1: centred_w.astype(np.float32)})
    z_x = x.grid.z
    single_pass = max_abs * weight_abs_sum < FLOAT32_EXACT

    def run(values):
        centred = centred_float(values[0], z_x)
        if single_pass and not may_overflow:
            return [requantize(run_float([centred])[0])]  # float32 sums hold exact integers
        acc = exact_sums(lambda v: run_float([v])[0], centred, max_abs, weight_abs_sum)
        if may_overflow:
            acc += bias_b
            saturate_accumulator(acc, node, arithmetic)
        return [requantize(acc)]

    return Prepared(run, requantization_record(m0, shift))
