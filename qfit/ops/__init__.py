"""The operator table: the one place that knows what each ONNX op type means to qfit.

For every supported op type it says
  * which inputs are weights (constant tensors stored in flash) and along which axis their
    per-channel scales run, and which input is a bias (stored as int32);
  * what its output gets: its own activation quantizer ("own"), the quantizer of its first input
    ("shared": the op moves or selects values without changing their scale, so an integer kernel can
    pass the bytes through), or "fused" (an activation such as ReLU that an int8 kernel applies as the
    clamp of the preceding layer's requantization, so the preceding tensor needs no quantizer);
  * whether its output may alias its input in memory ("view": same bytes, e.g. Reshape; "inplace":
    elementwise, may overwrite its only input);
  * how to count its cost: multiply-accumulates for Conv/Gemm/MatMul, element operations otherwise.

Quantization (qfit.plan, qfit.quantize), memory (qfit.budget) and reporting all read this table.
An op type that is not here stays float: its inputs are dequantized, its outputs stay float32, its
weights are counted at 4 bytes each. Adding an operator = one entry here + a test.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping, Sequence

import numpy as np
from onnx import NodeProto, helper

Shape = Sequence[int]
ShapeOf = Callable[[str], "tuple[int, ...] | None"]


def attr(node: NodeProto, name: str, default=None):
    """The value of attribute `name` of `node`, or `default`."""
    for a in node.attribute:
        if a.name == name:
            return helper.get_attribute_value(a)
    return default


def _numel(shape: Shape | None) -> int:
    return int(np.prod(shape)) if shape is not None else 0


# ---- cost functions: (node, shape_of) -> number of MACs or element operations ----------------

def _conv_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    w = shape_of(node.input[1])
    y = shape_of(node.output[0])
    if w is None or y is None:
        return 0
    # y: N, Cout, spatial...; w: Cout, Cin/groups, k...  -> each output element costs Cin/g * prod(k)
    return _numel(y) * int(np.prod(w[1:]))


def _conv_transpose_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    x = shape_of(node.input[0])
    w = shape_of(node.input[1])
    if w is None or x is None:
        return 0
    # w: Cin, Cout/groups, k...; every input element is scattered into Cout/g * prod(k) outputs
    return _numel(x) * int(np.prod(w[1:]))


def _gemm_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    a = shape_of(node.input[0])
    y = shape_of(node.output[0])
    if a is None or y is None:
        return 0
    k = a[0] if attr(node, "transA", 0) else a[-1]
    return _numel(y) * int(k)


def _matmul_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    a = shape_of(node.input[0])
    y = shape_of(node.output[0])
    if a is None or y is None:
        return 0
    return _numel(y) * int(a[-1])


def _elementwise_ops(node: NodeProto, shape_of: ShapeOf) -> int:
    return _numel(shape_of(node.output[0]))


def _window_ops(node: NodeProto, shape_of: ShapeOf) -> int:
    kernel = attr(node, "kernel_shape", [1])
    return _numel(shape_of(node.output[0])) * int(np.prod(kernel))


def _reduce_ops(node: NodeProto, shape_of: ShapeOf) -> int:
    return _numel(shape_of(node.input[0]))


def _no_cost(node: NodeProto, shape_of: ShapeOf) -> int:
    return 0


# ---- per-op weight axis rules: (node, weight_shape) -> axis of per-channel scales or None ------

def _axis0(node: NodeProto, shape: Shape) -> int | None:
    return 0


def _conv_transpose_axis(node: NodeProto, shape: Shape) -> int | None:
    # weight is (Cin, Cout/groups, k...); output channels run along axis 1 only when groups == 1
    return 1 if attr(node, "group", 1) == 1 else None


def _gemm_axis(node: NodeProto, shape: Shape) -> int | None:
    # B is (K, N), or (N, K) when transB: scales run along the output features N
    return 0 if attr(node, "transB", 0) else 1


def _matmul_axis(node: NodeProto, shape: Shape) -> int | None:
    return len(shape) - 1 if len(shape) >= 2 else None


def _matmul_first_operand_axis(node: NodeProto, shape: Shape) -> int | None:
    # a constant A in A @ x: output rows follow A's rows (axis -2)
    return len(shape) - 2 if len(shape) >= 2 else None


def _single_channel_axis(node: NodeProto, shape: Shape) -> int | None:
    # a broadcast constant (PRelu slope): per channel along its one axis longer than 1, if any
    long_axes = [i for i, d in enumerate(shape) if d > 1]
    return long_axes[0] if len(long_axes) == 1 else None


# ---- per-op output rules: node -> True when the output takes its input's quantizer ------------

def _resize_is_nearest(node: NodeProto) -> bool:
    # nearest-neighbour resizing copies input values, so the input's scale holds; linear and cubic
    # modes compute new values and need a range of their own
    mode = attr(node, "mode", b"nearest")
    return (mode.decode() if isinstance(mode, bytes) else str(mode)) == "nearest"


@dataclass(frozen=True)
class OpInfo:
    """What one op type means for quantization, memory and cost (see the module docstring)."""

    output: str = "own"                       # "own" | "shared" | "fused" | "float"
    weights: Mapping[int, Callable] = field(default_factory=dict)  # input index -> axis rule
    bias: int | None = None                   # input index of a bias (int32, scale = s_in * s_w)
    alias: str | None = None                  # None | "view" | "inplace"
    cost: Callable[[NodeProto, ShapeOf], int] = _no_cost
    cost_kind: str = "none"                   # "macs" | "elementwise" | "none"
    quantized_inputs: tuple[int, ...] | None = (0,)  # activation inputs that get an int8 input
    takes_fused_activation: bool = False      # a following ReLU/ReLU6 folds into this op's output
    shares_when: Callable[[NodeProto], bool] | None = None  # output "shared" for nodes where this holds
    inputs_share_output: bool = False         # inputs stored with the output's quantizer (Concat)
    constant_inputs: tuple[int, ...] = ()     # inputs an int8 kernel needs as constants, else float
    note: str = ""

    @property
    def is_quantized(self) -> bool:
        return self.output != "float"


_MAC = dict(cost_kind="macs", takes_fused_activation=True)
_ELT = dict(cost_kind="elementwise", cost=_elementwise_ops)
_ALL = None  # quantized_inputs=None: every non-constant input is quantized

OPS: dict[str, OpInfo] = {
    # layers with weights
    "Conv": OpInfo(weights={1: _axis0}, bias=2, cost=_conv_macs, **_MAC),
    "ConvTranspose": OpInfo(weights={1: _conv_transpose_axis}, bias=2, cost=_conv_transpose_macs, **_MAC),
    "Gemm": OpInfo(weights={1: _gemm_axis}, bias=2, cost=_gemm_macs, **_MAC),
    "MatMul": OpInfo(weights={0: _matmul_first_operand_axis, 1: _matmul_axis}, cost=_matmul_macs,
                     quantized_inputs=_ALL, **_MAC),
    # elementwise arithmetic between activations (or an activation and a constant)
    "Add": OpInfo(quantized_inputs=_ALL, alias="inplace", takes_fused_activation=True, **_ELT),
    "Sub": OpInfo(quantized_inputs=_ALL, alias="inplace", takes_fused_activation=True, **_ELT),
    "Mul": OpInfo(quantized_inputs=_ALL, alias="inplace", **_ELT),
    "Div": OpInfo(quantized_inputs=(0,), alias="inplace", constant_inputs=(1,),
                  note="by a constant only (a multiply by its reciprocal); by a tensor it stays float", **_ELT),
    # activations an int8 kernel folds into the previous layer's output clamp
    "Relu": OpInfo(output="fused", alias="inplace", **_ELT),
    "Clip": OpInfo(output="fused", alias="inplace", **_ELT),
    # activations with their own output range
    "LeakyRelu": OpInfo(alias="inplace", **_ELT),
    "PRelu": OpInfo(weights={1: _single_channel_axis}, alias="inplace", note="slope stored as int8", **_ELT),
    "Sigmoid": OpInfo(alias="inplace", **_ELT),
    "HardSigmoid": OpInfo(alias="inplace", **_ELT),
    "HardSwish": OpInfo(alias="inplace", **_ELT),
    "Tanh": OpInfo(alias="inplace", **_ELT),
    "Softmax": OpInfo(**_ELT),
    # pooling and reductions
    "MaxPool": OpInfo(output="shared", cost=_window_ops, cost_kind="elementwise"),
    "AveragePool": OpInfo(cost=_window_ops, cost_kind="elementwise"),
    "GlobalAveragePool": OpInfo(cost=_reduce_ops, cost_kind="elementwise"),
    "GlobalMaxPool": OpInfo(output="shared", cost=_reduce_ops, cost_kind="elementwise"),
    "ReduceMean": OpInfo(cost=_reduce_ops, cost_kind="elementwise"),
    # data movement: values unchanged, so the scale is the input's
    "Concat": OpInfo(quantized_inputs=_ALL, inputs_share_output=True,
                     note="inputs stored with the output's scale (a byte copy) when only the Concat reads "
                          "them; otherwise requantized to it"),
    "Split": OpInfo(output="shared"),
    "Slice": OpInfo(output="shared"),
    "Reshape": OpInfo(output="shared", alias="view"),
    "Flatten": OpInfo(output="shared", alias="view"),
    "Squeeze": OpInfo(output="shared", alias="view"),
    "Unsqueeze": OpInfo(output="shared", alias="view"),
    "Transpose": OpInfo(output="shared"),
    "Pad": OpInfo(output="shared", note="constant pad value must be representable (0 is)"),
    "Resize": OpInfo(quantized_inputs=(0,), shares_when=_resize_is_nearest,
                     note="nearest mode keeps the input's scale; linear and cubic modes requantize"),
}

# Op types removed or folded by qfit.load before anything else sees the graph.
REMOVED_BY_LOADER = ("Identity", "Dropout", "BatchNormalization", "Constant")

# Quantizer op types: when reading a QDQ model these are stripped to recover the layer graph.
QDQ_OPS = ("QuantizeLinear", "DequantizeLinear")

FLOAT_INFO = OpInfo(output="float", quantized_inputs=(), note="not supported in int8: kept float")


def info(op_type: str) -> OpInfo:
    """The table entry for `op_type`; unknown op types stay float."""
    return OPS.get(op_type, FLOAT_INFO)


def is_supported(op_type: str) -> bool:
    return op_type in OPS


def output_kind(node: NodeProto) -> str:
    """The table's output kind for this node: "own", "shared", "fused" or "float"."""
    entry = info(node.op_type)
    if entry.shares_when is not None and entry.shares_when(node):
        return "shared"
    return entry.output


def float_reason(node: NodeProto, is_constant: Callable[[str], bool]) -> str | None:
    """Why `node` stays float (its op type is unknown, or an input that must be a constant is not),
    or None when it can be quantized."""
    entry = info(node.op_type)
    if not entry.is_quantized:
        return "not supported in int8"
    for i in entry.constant_inputs:
        if i < len(node.input) and node.input[i] and not is_constant(node.input[i]):
            return f"input {i} of {node.op_type} is not a constant"
    return None


def weight_inputs(node: NodeProto) -> dict[int, Callable]:
    """Input index -> axis rule, for the inputs of `node` that are weights."""
    return dict(info(node.op_type).weights)


def cost(node: NodeProto, shape_of: ShapeOf) -> tuple[int, int]:
    """(MACs, element operations) of one node."""
    entry = info(node.op_type)
    n = int(entry.cost(node, shape_of))
    return (n, 0) if entry.cost_kind == "macs" else (0, n if entry.cost_kind == "elementwise" else 0)


def is_relu6_clip(node: NodeProto, constant_value: Callable[[str], "np.ndarray | None"]) -> bool:
    """Clip with bounds [0, x]: a ReLU-family clamp that a kernel folds into requantization."""
    lo = constant_value(node.input[1]) if len(node.input) > 1 and node.input[1] else None
    if lo is None:
        lo = attr(node, "min", None)
    # a 1-element array is as good as a scalar (the opset converter may turn one into the other)
    return lo is not None and np.asarray(lo).size == 1 and float(np.asarray(lo).reshape(-1)[0]) >= 0.0
