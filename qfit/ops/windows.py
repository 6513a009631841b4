"""Sliding-window geometry shared by convolutions and pooling: kernel, strides, dilations, padding."""
from __future__ import annotations

from onnx import NodeProto

from qfit.ops.registry import ShapeOf, Window, attr, attr_text


def window(node: NodeProto, shape_of: ShapeOf, kernel=None) -> list[Window] | None:
    """[(kernel, stride, dilation, pad_begin)] for the two spatial dims of a 2-D window op (NCHW), or
    None when the node is not 2-D. `kernel` is the kernel size when the node has no kernel_shape."""
    kernel = attr(node, "kernel_shape", kernel)
    if kernel is None:
        return None
    kernel = list(kernel)
    if len(kernel) != 2:
        return None
    in_shape = shape_of(node.input[0])
    out_shape = shape_of(node.output[0])
    strides = list(attr(node, "strides", [1, 1]))
    dilations = list(attr(node, "dilations", [1, 1]))
    pads = list(attr(node, "pads", [0, 0, 0, 0]))
    auto_pad = attr_text(node, "auto_pad", "NOTSET")
    result = []
    for d in range(2):
        k, s, dil = kernel[d], strides[d], dilations[d]
        if auto_pad in ("SAME_UPPER", "SAME_LOWER"):
            total = max((out_shape[2 + d] - 1) * s + (k - 1) * dil + 1 - in_shape[2 + d], 0)
            begin = total // 2 if auto_pad == "SAME_UPPER" else total - total // 2
        elif auto_pad == "VALID":
            begin = 0
        else:
            begin = pads[d]
        result.append((k, s, dil, begin))
    return result


def pool_window(node: NodeProto, shape_of: ShapeOf) -> list[Window] | None:
    return window(node, shape_of, [1, 1])


def tileable_by(window_of):
    """The `tileable` hook of a 2-D window op whose window `window_of` gives: one activation input,
    and an output row band that needs an input row band."""
    def tileable(node: NodeProto, shape_of: ShapeOf, is_constant) -> bool:
        acts = [n for n in node.input if n and not is_constant(n)]
        out = shape_of(node.output[0]) if node.output else None
        if out is None or len(out) != 4 or len(acts) != 1:
            return False
        return window_of(node, shape_of) is not None
    return tileable


def has_padding(node: NodeProto) -> bool:
    """Zero padding anywhere (explicit pads, or SAME auto-padding with a kernel larger than 1)."""
    auto_pad = attr_text(node, "auto_pad", "NOTSET")
    if auto_pad in ("SAME_UPPER", "SAME_LOWER"):
        kernel = attr(node, "kernel_shape", None)
        return not (kernel is not None and all(k == 1 for k in kernel))
    return not all(p == 0 for p in attr(node, "pads", []) or [])
