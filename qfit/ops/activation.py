"""Activations. ReLU-family clamps (Relu, Clip with a lower bound >= 0) are folded by an int8 kernel
into the previous layer's requantization; the others get an output range of their own."""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.elementwise import POINTWISE, elementwise_ops
from qfit.ops.kernels import elementwise as elementwise_kernels
from qfit.ops.registry import ConstantOf, Op, attr, register


def _relu_bounds(node: NodeProto, constant_of: ConstantOf) -> tuple:
    return 0.0, None


def _clip_bounds(node: NodeProto, constant_of: ConstantOf) -> tuple | None:
    """(low, high) of a Clip, None for an open side; None when a bound is not a constant scalar."""
    bounds = []
    for index, name in ((1, "min"), (2, "max")):
        if len(node.input) > index and node.input[index]:
            value = constant_of(node.input[index])
            if value is None:
                return None
        else:
            value = attr(node, name, None)   # opsets before 11 give the bounds as attributes
            if value is None:
                bounds.append(None)
                continue
        # a 1-element array is as good as a scalar (the opset converter may turn one into the other)
        value = np.asarray(value)
        if value.size != 1:
            return None
        bounds.append(float(value.reshape(-1)[0]))
    return tuple(bounds)


def _slope_axis(node: NodeProto, shape) -> int | None:
    # a broadcast constant (PRelu slope): per channel along its one axis longer than 1, if any
    long_axes = [i for i, d in enumerate(shape) if d > 1]
    return long_axes[0] if len(long_axes) == 1 else None


register({
    "Relu": Op(integer_kernel=elementwise_kernels.build_lookup,
               output="fused", clamp_bounds=_relu_bounds, export_kind="CLAMP", **POINTWISE),
    "Clip": Op(integer_kernel=elementwise_kernels.build_lookup,
               output="fused", clamp_bounds=_clip_bounds, export_kind="CLAMP", **POINTWISE),
    "LeakyRelu": Op(integer_kernel=elementwise_kernels.build_lookup, **POINTWISE),
    "PRelu": Op(weights={1: _slope_axis}, note="slope stored as int8", **POINTWISE),
    "Sigmoid": Op(integer_kernel=elementwise_kernels.build_lookup, **POINTWISE),
    "HardSigmoid": Op(integer_kernel=elementwise_kernels.build_lookup, **POINTWISE),
    "HardSwish": Op(integer_kernel=elementwise_kernels.build_lookup, **POINTWISE),
    "Tanh": Op(integer_kernel=elementwise_kernels.build_lookup, **POINTWISE),
    "Softmax": Op(cost_kind="elementwise", cost=elementwise_ops),
})
