"""The operator registry: one `Op` record per ONNX op type, and the lookup every other module uses.

An `Op` holds every fact qfit needs about an op type, as plain fields or small hooks (functions of
the node and, where needed, of tensor shapes or constant values). The family files next to this one
(conv.py, gemm.py, elementwise.py, ...) each register the op types they know. An op type that is not
registered stays float: its inputs are dequantized, its outputs stay float32, its constants are
counted at 4 bytes each, and the report says so.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Callable, Mapping, Sequence

import numpy as np
from onnx import NodeProto, helper

Shape = Sequence[int]
ShapeOf = Callable[[str], "tuple[int, ...] | None"]          # tensor name -> static shape or None
ConstantOf = Callable[[str], "np.ndarray | None"]            # tensor name -> constant value or None
IsConstant = Callable[[str], bool]
AxisRule = Callable[[NodeProto, Shape], "int | None"]        # (node, weight shape) -> per-channel axis
Window = tuple[int, int, int, int]                            # kernel, stride, dilation, pad at the start


def attr(node: NodeProto, name: str, default=None):
    """The value of attribute `name` of `node`, or `default`."""
    for a in node.attribute:
        if a.name == name:
            return helper.get_attribute_value(a)
    return default


def attr_text(node: NodeProto, name: str, default: str) -> str:
    """A string attribute as text (onnx hands strings back as bytes)."""
    value = attr(node, name, default)
    return value.decode() if isinstance(value, bytes) else str(value)


def no_cost(node: NodeProto, shape_of: ShapeOf) -> int:
    return 0


@dataclass(frozen=True)
class Equalization:
    """How cross-layer equalization and bias correction (quant/equalize.py) handle a layer with a
    weight at input 1: its weight seen as (out channels, in channels per group, kernel...)."""

    to_out_in: Callable[[NodeProto, np.ndarray], np.ndarray]
    from_out_in: Callable[[NodeProto, np.ndarray], np.ndarray]
    groups: Callable[[NodeProto], int]
    rescalable: Callable[[NodeProto, np.ndarray], bool]   # (node, weight) -> weights can be rescaled
    unpadded: Callable[[NodeProto], bool]                 # no zero padding: a constant input moves through
    # (node, mean input without batch axis, weight error, evaluate) -> mean output shift per channel;
    # `evaluate(model, feeds)` runs a one-node ONNX model (the caller owns the runtime)
    mean_shift: Callable[..., np.ndarray]


@dataclass(frozen=True)
class Op:
    """What one op type means for quantization, memory, cost and the loader's rewrites."""

    # -- quantization --
    output: str = "own"                       # "own" | "shared" | "fused" | "float"
    weights: Mapping[int, AxisRule] = field(default_factory=dict)  # input index -> per-channel axis rule
    bias: int | None = None                   # input index of a bias (int32, scale = s_in * s_w)
    quantized_inputs: tuple[int, ...] | None = (0,)  # activation inputs read as integers; None = all
    constant_inputs: tuple[int, ...] = ()     # inputs an int8 kernel needs as constants, else float
    takes_fused_activation: bool = False      # a following ReLU-family clamp folds into this output
    clamp_bounds: Callable[[NodeProto, ConstantOf], tuple] | None = None  # a clamp: (low, high), None = open
    shares_when: Callable[[NodeProto], bool] | None = None  # output "shared" for nodes where this holds
    inputs_share_output: bool = False         # inputs stored with the output's quantizer (Concat)
    bias_scale_attr: str | None = None        # attribute multiplying the bias (Gemm's beta)
    product_scale_attr: str | None = None     # attribute multiplying the product (Gemm's alpha)
    bias_from_following_add: bool = False     # no bias input: an Add of a constant after it is the bias
    adds_bias: bool = False                   # adding a constant: may be the bias of the layer before
    equalization: Equalization | None = None
    integer_kernel: Callable | None = None    # reserved: the integer-only kernel (qfit/ops/kernels/)
    export_kind: str | None = None            # layer kind in the C export (report/export), None = not exported
    # -- memory and cost --
    alias: str | None = None                  # None | "view" | "inplace"
    cost: Callable[[NodeProto, ShapeOf], int] = no_cost
    cost_kind: str = "none"                   # "macs" | "elementwise" | "none"
    scratch_bytes: Callable[[NodeProto, ShapeOf, int], int] | None = None  # (node, shapes, element bytes)
    window: Callable[[NodeProto, ShapeOf], "list[Window] | None"] | None = None  # per spatial dim
    tileable: Callable[[NodeProto, ShapeOf, IsConstant], bool] | None = None    # patch-based execution
    shapes_consistent: Callable[[NodeProto, list, "tuple | None"], bool] | None = None  # at another size
    # -- loader rewrites (graph/rewrite.py) --
    passthrough: bool = False                 # output equals input at inference: removed
    constant_value: Callable[[NodeProto], "np.ndarray | None"] | None = None  # becomes an initializer
    folds_into_producer: Callable[[NodeProto, ConstantOf], "tuple | None"] | None = None  # (scale, shift)
    absorbs_channel_affine: bool = False      # a following per-channel y = k x + b folds into weight 1
    constant_foldable: bool = False           # evaluated when all its inputs are constants
    fold_from_shape: Callable[[NodeProto, ShapeOf], "list[np.ndarray] | None"] | None = None
    note: str = ""

    @property
    def is_quantized(self) -> bool:
        return self.output != "float"


OPS: dict[str, Op] = {}

FLOAT_OP = Op(output="float", quantized_inputs=(), note="not supported in int8: kept float")


def float_op(**facts) -> Op:
    """A registered op type with no int8 meaning (it stays float) that the loader still knows:
    `facts` say what (e.g. constant_foldable=True, passthrough=True)."""
    return replace(FLOAT_OP, **facts)


def register(table: dict[str, Op]) -> None:
    """Add a family's op types to the registry (each op type once)."""
    for op_type, entry in table.items():
        if op_type in OPS:
            raise ValueError(f"op type {op_type} registered twice")
        OPS[op_type] = entry


def lookup(op_type: str) -> Op:
    """The registry entry for `op_type`; unknown op types stay float."""
    return OPS.get(op_type, FLOAT_OP)
