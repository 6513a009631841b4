"""Data movement: values are copied, selected or regrouped, not computed, so the output keeps the
input's scale (Concat: the inputs take the output's). Reshape and friends are views of the same bytes."""
from __future__ import annotations

import numpy as np
from onnx import NodeProto

from qfit.ops.kernels import movement as movement_kernels
from qfit.ops.registry import Op, ShapeOf, attr, attr_text, register
from qfit.sizes import element_count


def _resize_is_nearest(node: NodeProto) -> bool:
    # nearest-neighbour resizing copies input values, so the input's scale holds; linear and cubic
    # modes compute new values and need a range of their own
    return attr_text(node, "mode", "nearest") == "nearest"


def _same_element_count(node: NodeProto, inputs: list, output) -> bool:
    # a view keeps every element: a Reshape to a fixed element count cannot run at another size
    if not inputs or inputs[0] is None or output is None:
        return True
    return element_count(inputs[0]) == element_count(output)


def _tileable_channel_concat(node: NodeProto, shape_of: ShapeOf, is_constant) -> bool:
    """A Concat along the channels of NCHW tensors with equal spatial sizes: tiles concatenate."""
    out = shape_of(node.output[0]) if node.output else None
    if out is None or len(out) != 4:
        return False
    acts = [n for n in node.input if n and not is_constant(n)]
    return attr(node, "axis", 0) in (1, -3) and all(
        shape_of(n) is not None and tuple(shape_of(n)[2:]) == tuple(out[2:]) for n in acts)


_VIEW = dict(output="shared", alias="view", constant_foldable=True, shapes_consistent=_same_element_count)

register({
    "Concat": Op(integer_kernel=movement_kernels.build_concat,
                 quantized_inputs=None, inputs_share_output=True, constant_foldable=True,
                 tileable=_tileable_channel_concat, export_kind="CONCAT",
                 note="inputs stored with the output's scale (a byte copy) when only the Concat reads "
                      "them; otherwise requantized to it"),
    "Split": Op(integer_kernel=movement_kernels.build_movement, output="shared"),
    "Slice": Op(integer_kernel=movement_kernels.build_movement, output="shared", constant_foldable=True),
    "Reshape": Op(integer_kernel=movement_kernels.build_movement, export_kind="RESHAPE", **_VIEW),
    "Flatten": Op(integer_kernel=movement_kernels.build_movement, export_kind="RESHAPE", **_VIEW),
    "Squeeze": Op(integer_kernel=movement_kernels.build_movement, export_kind="RESHAPE", **_VIEW),
    "Unsqueeze": Op(integer_kernel=movement_kernels.build_movement, export_kind="RESHAPE", **_VIEW),
    "Transpose": Op(integer_kernel=movement_kernels.build_movement, output="shared", constant_foldable=True),
    "Pad": Op(integer_kernel=movement_kernels.build_movement,
              output="shared", note="constant pad value must be representable (0 is)"),
    "Resize": Op(integer_kernel=movement_kernels.build_movement, quantized_inputs=(0,), shares_when=_resize_is_nearest,
                 note="nearest mode keeps the input's scale; linear and cubic modes requantize"),
})
