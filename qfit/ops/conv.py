"""Convolutions: Conv and ConvTranspose (weights at input 1, bias at input 2)."""
from __future__ import annotations

import numpy as np
from onnx import NodeProto, TensorProto, helper, numpy_helper

from qfit.ops.kernels import conv as conv_kernels
from qfit.ops.registry import Equalization, Op, ShapeOf, attr, register
from qfit.ops.windows import has_padding, tileable_by, window
from qfit.sizes import element_count


def _conv_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    w = shape_of(node.input[1])
    y = shape_of(node.output[0])
    if w is None or y is None:
        return 0
    # y: N, Cout, spatial...; w: Cout, Cin/groups, k...  -> each output element costs Cin/g * prod(k)
    return element_count(y) * element_count(w[1:])


def _conv_transpose_macs(node: NodeProto, shape_of: ShapeOf) -> int:
    x = shape_of(node.input[0])
    w = shape_of(node.input[1])
    if w is None or x is None:
        return 0
    # w: Cin, Cout/groups, k...; every input element is scattered into Cout/g * prod(k) outputs
    return element_count(x) * element_count(w[1:])


def _axis0(node: NodeProto, shape) -> int | None:
    return 0


def _conv_transpose_axis(node: NodeProto, shape) -> int | None:
    # weight is (Cin, Cout/groups, k...); output channels run along axis 1 only when groups == 1
    return 1 if attr(node, "group", 1) == 1 else None


def _conv_window(node: NodeProto, shape_of: ShapeOf):
    # kernel_shape is optional: the weight's trailing dims
    w = shape_of(node.input[1]) if len(node.input) > 1 else None
    return window(node, shape_of, list(w[2:]) if w is not None and len(w) == 4 else None)


def _conv_scratch_bytes(node: NodeProto, shape_of: ShapeOf, element_bytes: int) -> int:
    """im2col-style scratch (an estimate): two columns of Cin/groups x kernel elements (widened to
    `element_bytes`); a depthwise conv one column per channel; a 1x1 stride-1 unpadded conv none."""
    if len(node.input) < 2:
        return 0
    w = shape_of(node.input[1])
    if not w or len(w) < 3:
        return 0
    kernel = element_count(w[2:])
    strides = attr(node, "strides", [1] * (len(w) - 2))
    pads = attr(node, "pads", [0] * 2 * (len(w) - 2))
    if kernel == 1 and all(s == 1 for s in strides) and not any(pads):
        return 0
    group = int(attr(node, "group", 1))
    if group > 1 and w[1] == 1:
        return group * kernel * element_bytes
    return 2 * int(w[1]) * kernel * element_bytes


def _conv_shapes_consistent(node: NodeProto, inputs: list, output) -> bool:
    if len(inputs) > 1 and inputs[0] and inputs[1]:
        return inputs[0][1] == inputs[1][1] * int(attr(node, "group", 1))
    return True


def _conv_mean_shift(node: NodeProto, mean_input: np.ndarray, error: np.ndarray, evaluate) -> np.ndarray:
    """Conv(mean input map, weight error) with the node's own attributes (padding included),
    averaged per output channel."""
    attrs = {a.name: helper.get_attribute_value(a) for a in node.attribute}
    x = mean_input[None].astype(np.float32)
    graph = helper.make_graph(
        [helper.make_node("Conv", ["x", "w"], ["y"], **attrs)], "shift",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(x.shape))],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, None)],
        [numpy_helper.from_array(error.astype(np.float32), "w")])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)], ir_version=10)
    y = evaluate(model, {"x": x})[0][0]
    return y.reshape(y.shape[0], -1).mean(axis=1).astype(np.float64)


_CONV_EQUALIZATION = Equalization(
    to_out_in=lambda node, w: w.copy(),
    from_out_in=lambda node, w: w,
    groups=lambda node: int(attr(node, "group", 1)),
    rescalable=lambda node, w: True,
    unpadded=lambda node: not has_padding(node),
    mean_shift=_conv_mean_shift,
)

register({
    "Conv": Op(integer_kernel=conv_kernels.build_conv,
               weights={1: _axis0}, bias=2, cost=_conv_macs, cost_kind="macs", takes_fused_activation=True,
               absorbs_channel_affine=True, scratch_bytes=_conv_scratch_bytes, window=_conv_window,
               tileable=tileable_by(_conv_window), shapes_consistent=_conv_shapes_consistent,
               equalization=_CONV_EQUALIZATION, export_kind="CONV"),
    "ConvTranspose": Op(weights={1: _conv_transpose_axis}, bias=2, cost=_conv_transpose_macs, cost_kind="macs",
                        takes_fused_activation=True, absorbs_channel_affine=True),
})
