"""Matrix products: Gemm (y = alpha A B + beta C) and MatMul (no bias input)."""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.kernels import gemm as gemm_kernels
from qfit.ops.registry import Equalization, Op, ShapeOf, attr, register
from qfit.sizes import element_count


def _gemm_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    a = shape_of(node.input[0])
    y = shape_of(node.output[0])
    if a is None or y is None:
        return 0
    k = a[0] if attr(node, "transA", 0) else a[-1]
    return element_count(y) * int(k)


def _matmul_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    a = shape_of(node.input[0])
    y = shape_of(node.output[0])
    if a is None or y is None:
        return 0
    return element_count(y) * int(a[-1])


def _gemm_axis(node: NodeProto, shape) -> int | None:
    # B is (K, N), or (N, K) when transB: scales run along the output features N
    return 0 if attr(node, "transB", 0) else 1


def _matmul_axis(node: NodeProto, shape) -> int | None:
    return len(shape) - 1 if len(shape) >= 2 else None


def _matmul_first_operand_axis(node: NodeProto, shape) -> int | None:
    # a constant A in A @ x: output rows follow A's rows (axis -2)
    return len(shape) - 2 if len(shape) >= 2 else None


def _gemm_shapes_consistent(node: NodeProto, inputs: list, output) -> bool:
    if len(inputs) > 1 and inputs[0] and inputs[1]:
        k_a = inputs[0][0] if attr(node, "transA", 0) else inputs[0][-1]
        k_b = inputs[1][-1] if attr(node, "transB", 0) else inputs[1][0]
        return k_a == k_b
    return True


def _matmul_shapes_consistent(node: NodeProto, inputs: list, output) -> bool:
    if len(inputs) > 1 and inputs[0] and inputs[1] and len(inputs[1]) >= 2:
        return inputs[0][-1] == inputs[1][-2]
    return True


def _gemm_to_out_in(node: NodeProto, w: np.ndarray) -> np.ndarray:
    # B is (K, N) unless transB: bring it to (N, K), output features first
    return w.T.copy() if not attr(node, "transB", 0) else w.copy()


def _gemm_from_out_in(node: NodeProto, w: np.ndarray) -> np.ndarray:
    return w.T.copy() if not attr(node, "transB", 0) else w


def _gemm_rescalable(node: NodeProto, w: np.ndarray) -> bool:
    return not attr(node, "transA", 0) and w.ndim == 2


def _gemm_mean_shift(node: NodeProto, mean_input: np.ndarray, error: np.ndarray, evaluate) -> np.ndarray:
    """alpha (E[A] @ (B' - B)) / beta: the output shift as it lands in C's units."""
    alpha = float(attr(node, "alpha", 1.0))
    beta = float(attr(node, "beta", 1.0))
    b_matrix = error.T if attr(node, "transB", 0) else error   # (K, N)
    return alpha * (mean_input.reshape(-1) @ b_matrix) / beta


_GEMM_EQUALIZATION = Equalization(
    to_out_in=_gemm_to_out_in, from_out_in=_gemm_from_out_in, groups=lambda node: 1,
    rescalable=_gemm_rescalable, unpadded=lambda node: True, mean_shift=_gemm_mean_shift)

register({
    "Gemm": Op(integer_kernel=gemm_kernels.build_gemm,
               weights={1: _gemm_axis}, bias=2, cost=_gemm_macs, cost_kind="macs", takes_fused_activation=True,
               bias_scale_attr="beta", product_scale_attr="alpha", absorbs_channel_affine=True,
               shapes_consistent=_gemm_shapes_consistent, equalization=_GEMM_EQUALIZATION,
               export_kind="FULLY_CONNECTED"),
    "MatMul": Op(integer_kernel=gemm_kernels.build_matmul,
                 weights={0: _matmul_first_operand_axis, 1: _matmul_axis}, cost=_matmul_macs, cost_kind="macs",
                 takes_fused_activation=True, quantized_inputs=None, bias_from_following_add=True,
                 shapes_consistent=_matmul_shapes_consistent, export_kind="FULLY_CONNECTED"),
})
