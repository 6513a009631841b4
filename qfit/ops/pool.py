"""Pooling and reductions: MaxPool, AveragePool, their global forms, ReduceMean (and ReduceProd,
which the loader only evaluates on constants)."""
from __future__ import annotations

from onnx import NodeProto

from qfit.ops.kernels import pool as pool_kernels
from qfit.ops.registry import Op, ShapeOf, attr, float_op, register
from qfit.ops.windows import pool_window, tileable_by
from qfit.sizes import element_count


def _window_ops(node: NodeProto, shape_of: ShapeOf) -> int:
    kernel = attr(node, "kernel_shape", [1])
    return element_count(shape_of(node.output[0])) * element_count(kernel)


def _reduce_ops(node: NodeProto, shape_of: ShapeOf) -> int:
    return element_count(shape_of(node.input[0]))


_WINDOWED = dict(cost=_window_ops, cost_kind="elementwise", window=pool_window, tileable=tileable_by(pool_window))
_REDUCE = dict(cost=_reduce_ops, cost_kind="elementwise")

register({
    # the maximum of int8 values is one of them: the input's scale holds
    "MaxPool": Op(integer_kernel=pool_kernels.build_max_pool, output="shared", export_kind="MAX_POOL", **_WINDOWED),
    "AveragePool": Op(integer_kernel=pool_kernels.build_average_pool, export_kind="AVERAGE_POOL", **_WINDOWED),
    "GlobalAveragePool": Op(integer_kernel=pool_kernels.build_mean, export_kind="GLOBAL_AVERAGE_POOL", **_REDUCE),
    "GlobalMaxPool": Op(integer_kernel=pool_kernels.build_max_pool,
                        output="shared", export_kind="GLOBAL_MAX_POOL", **_REDUCE),
    "ReduceMean": Op(integer_kernel=pool_kernels.build_mean, **_REDUCE),
    "ReduceProd": float_op(constant_foldable=True),
})
