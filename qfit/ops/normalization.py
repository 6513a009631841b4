"""BatchNormalization: at inference a per-channel affine y = k x + shift (channels on axis 1), which
the loader folds into the weights of the layer before it (or writes as Mul + Add when there is none)."""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.registry import ConstantOf, attr, float_op, register


def _batchnorm_affine(node: NodeProto, constant_of: ConstantOf) -> tuple[np.ndarray, np.ndarray] | None:
    """(k, shift) with k = gamma / sqrt(var + epsilon), shift = beta - mean k (float64), or None when
    the statistics are not constants. Raises ValueError when var + epsilon is not positive."""
    values = [constant_of(name) for name in node.input[1:5]]
    if len(values) < 4 or any(v is None for v in values):
        return None
    gamma, beta, mean, var = (np.asarray(v).astype(np.float64) for v in values)
    eps = float(attr(node, "epsilon", 1e-5))
    if not (var + eps > 0).all():  # also catches NaN
        raise ValueError("has a variance + epsilon that is not positive")
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):  # the caller checks finiteness
        k = gamma / np.sqrt(var + eps)
        shift = beta - mean * k
    return k, shift


register({
    "BatchNormalization": float_op(folds_into_producer=_batchnorm_affine),
})
