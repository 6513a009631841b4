"""Shape arithmetic the loader evaluates when its inputs are constants (or, for Shape, when the
input's shape is static): Shape, Cast, Gather, Range, ConstantOfShape, Expand. None is quantized."""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.registry import ShapeOf, attr, float_op, register


def _shape_value(node: NodeProto, shape_of: ShapeOf) -> list[np.ndarray] | None:
    shape = shape_of(node.input[0])
    if shape is None:
        return None
    start, end = attr(node, "start", 0), attr(node, "end", None)
    return [np.array(shape[start:end], dtype=np.int64)]


register({
    "Shape": float_op(constant_foldable=True, fold_from_shape=_shape_value),
    **{op_type: float_op(constant_foldable=True) for op_type in ("Cast", "Gather", "Range", "ConstantOfShape", "Expand")},
})
