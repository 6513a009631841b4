"""Elementwise arithmetic between activations, or an activation and a constant: Add, Sub, Mul, Div;
and the elementwise ops the loader only evaluates on constants (Neg, Sqrt, Pow, Min, Max, ...)."""
from __future__ import annotations

from onnx import NodeProto

from qfit.ops.kernels import elementwise as elementwise_kernels
from qfit.ops.registry import Op, ShapeOf, float_op, register
from qfit.sizes import element_count


def elementwise_ops(node: NodeProto, shape_of: ShapeOf) -> int:
    return element_count(shape_of(node.output[0]))


def tileable_pointwise(node: NodeProto, shape_of: ShapeOf, is_constant) -> bool:
    """Output element (r, c) reads input element (r, c) only: activation inputs have the output's
    shape, constants do not vary along the two spatial axes."""
    out = shape_of(node.output[0]) if node.output else None
    if out is None or len(out) != 4:
        return False
    for name in node.input:
        if not name:
            continue
        shape = shape_of(name)
        if is_constant(name):
            if shape and len(shape) >= 2 and any(d != 1 for d in shape[-2:]):
                return False   # a spatially varying constant would need slicing too
        elif shape != out:
            return False
    return True


# Elementwise with a cost of one operation per output element, running in place and tileable.
POINTWISE = dict(cost_kind="elementwise", cost=elementwise_ops, alias="inplace", tileable=tileable_pointwise)
_ALL = None  # quantized_inputs=None: every non-constant input is quantized

register({
    "Add": Op(integer_kernel=elementwise_kernels.build_add,
              quantized_inputs=_ALL, takes_fused_activation=True, constant_foldable=True, adds_bias=True,
              export_kind="ADD", **POINTWISE),
    "Sub": Op(integer_kernel=elementwise_kernels.build_sub,
              quantized_inputs=_ALL, takes_fused_activation=True, constant_foldable=True, **POINTWISE),
    "Mul": Op(integer_kernel=elementwise_kernels.build_mul,
              quantized_inputs=_ALL, constant_foldable=True, export_kind="MUL", **POINTWISE),
    "Div": Op(integer_kernel=elementwise_kernels.build_div,
              quantized_inputs=(0,), constant_inputs=(1,), constant_foldable=True,
              note="by a constant only (a multiply by its reciprocal); by a tensor it stays float", **POINTWISE),
    **{op_type: float_op(constant_foldable=True)
       for op_type in ("Neg", "Sqrt", "Pow", "Min", "Max", "Floor", "Equal", "Not", "Where")},
})
