"""The operator registry: the one place that knows what each ONNX op type means to qfit.

One file per op family registers its op types (conv, gemm, elementwise, activation, pool, movement,
normalization, shape, structural); registry.py holds the `Op` record and the lookup. For every op
type the record says
  * which inputs are weights (constants stored in flash) and along which axis their per-channel
    scales run, and which input is a bias (stored as int32);
  * what its output gets: its own activation quantizer ("own"), the quantizer of its first input
    ("shared": the op moves or selects values without changing their scale, so an integer kernel can
    pass the bytes through), or "fused" (a ReLU-family clamp that an int8 kernel applies as the clamp
    of the preceding layer's requantization, so the preceding tensor needs no quantizer);
  * whether its output may alias its input in memory ("view": same bytes, e.g. Reshape; "inplace":
    elementwise, may overwrite its only input);
  * how to count its cost: multiply-accumulates for Conv/Gemm/MatMul, element operations otherwise;
  * its window (kernel, stride, dilation, padding) and whether patch-based tiling can run it, its
    scratch bytes, the shape rules it needs at another input size;
  * what the loader does with it (fold a batch norm into it, drop it, make it an initializer,
    evaluate it on constants), how equalization rescales it, the layer kind the C export writes,
    and its integer kernel (qfit/ops/kernels/, one file per family).
windows.py holds the sliding-window geometry that convolutions and pools share.

Quantization (quant/), memory (memory/) and the loader (graph/) ask these questions through the
functions below; none of them compares op type names. An op type that is not registered stays float:
its inputs are dequantized, its outputs stay float32, its weights are counted at 4 bytes each.
Adding an operator = one entry in a family file (or a new family file imported below) + a test.
"""
from __future__ import annotations

from onnx import NodeProto

from qfit.ops import activation, conv, elementwise, gemm, movement, normalization, pool, shape, structural  # noqa: F401  (registers)
from qfit.ops.registry import (FLOAT_OP, OPS, ConstantOf, Equalization, IsConstant, Op, ShapeOf,  # noqa: F401
                               Window, attr, attr_text, lookup)
from qfit.ops.structural import QDQ_OPS  # noqa: F401


def of(node: NodeProto) -> Op:
    """The registry entry for `node`'s op type."""
    return lookup(node.op_type)


def is_supported(node: NodeProto) -> bool:
    """The node's op type can be quantized (it has an int8 meaning in the registry)."""
    return of(node).is_quantized


def is_qdq(node: NodeProto) -> bool:
    """A QuantizeLinear or DequantizeLinear node."""
    return node.op_type in QDQ_OPS


def output_kind(node: NodeProto) -> str:
    """The registry's output kind for this node: "own", "shared", "fused" or "float"."""
    entry = of(node)
    if entry.shares_when is not None and entry.shares_when(node):
        return "shared"
    return entry.output


def float_reason(node: NodeProto, is_constant: IsConstant) -> str | None:
    """Why `node` stays float (its op type is unknown, or an input that must be a constant is not),
    or None when it can be quantized."""
    entry = of(node)
    if not entry.is_quantized:
        return "not supported in int8"
    for i in entry.constant_inputs:
        if i < len(node.input) and node.input[i] and not is_constant(node.input[i]):
            return f"input {i} of {node.op_type} is not a constant"
    return None


def cost(node: NodeProto, shape_of: ShapeOf) -> tuple[int, int]:
    """(MACs, element operations) of one node."""
    entry = of(node)
    n = int(entry.cost(node, shape_of))
    return (n, 0) if entry.cost_kind == "macs" else (0, n if entry.cost_kind == "elementwise" else 0)


def clamp_bounds(node: NodeProto, constant_of: ConstantOf) -> tuple | None:
    """(low, high) of a clamp node (None for an open side), or None when the node is no clamp with
    constant bounds."""
    entry = of(node)
    return entry.clamp_bounds(node, constant_of) if entry.clamp_bounds is not None else None


def is_fusable_clamp(node: NodeProto, constant_of: ConstantOf) -> bool:
    """A ReLU-family clamp (lower bound >= 0: Relu, ReLU6, Clip(0, c)) that an int8 kernel folds into
    the previous layer's requantization. The one rule for plan, qdq_read and equalization."""
    bounds = clamp_bounds(node, constant_of)
    return bounds is not None and bounds[0] is not None and bounds[0] >= 0.0


def weight_and_bias_inputs(node: NodeProto) -> set[int]:
    """Input indices that are the node's weights or bias."""
    entry = of(node)
    roles = set(entry.weights)
    if entry.bias is not None:
        roles.add(entry.bias)
    return roles


def bias_add_inputs(node: NodeProto, producer_of, is_constant: IsConstant) -> set[int]:
    """Inputs of `node` that are the bias of the layer before it: a layer without a bias input
    (MatMul) followed by an Add of a constant, as exporters write a Linear layer."""
    if len(node.input) != 2 or not of(node).adds_bias:
        return set()
    found = set()
    for i, name in enumerate(node.input):
        prev = producer_of(node.input[1 - i])
        if (is_constant(name) and prev is not None and of(prev).bias_from_following_add
                and any(is_constant(n) for n in prev.input)):
            found.add(i)
    return found


def bias_scale(node: NodeProto) -> float:
    """The factor the node multiplies its bias by (Gemm's beta; 1 for other layers)."""
    name = of(node).bias_scale_attr
    return float(attr(node, name, 1.0)) if name else 1.0


def product_scale(node: NodeProto) -> float:
    """The factor the node multiplies its weight product by (Gemm's alpha; 1 for other layers)."""
    name = of(node).product_scale_attr
    return float(attr(node, name, 1.0)) if name else 1.0
