"""Op types that carry graph structure rather than computation: Constant (becomes an initializer),
Identity and Dropout (pass their input through at inference; the loader removes them), and the two
quantizer ops of a QDQ model."""
from __future__ import annotations

import numpy as np
from onnx import NodeProto, helper, numpy_helper

from qfit.ops.registry import float_op, register

# Quantizer op types: when reading a QDQ model these are stripped to recover the layer graph.
QDQ_OPS = ("QuantizeLinear", "DequantizeLinear")

_SCALAR_TYPES = {"value_float": np.float32, "value_int": np.int64, "value_floats": np.float32,
                 "value_ints": np.int64}


def _constant_value(node: NodeProto) -> np.ndarray | None:
    """The tensor a Constant node holds, or None for the forms qfit does not read (sparse, strings)."""
    if not node.attribute:
        return None
    a = node.attribute[0]
    if a.name == "value":
        return numpy_helper.to_array(a.t)
    if a.name in _SCALAR_TYPES:
        return np.array(helper.get_attribute_value(a), dtype=_SCALAR_TYPES[a.name])
    return None


register({
    "Constant": float_op(constant_value=_constant_value),
    "Identity": float_op(passthrough=True),
    "Dropout": float_op(passthrough=True),
})
