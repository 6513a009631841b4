"""sanity: models that parse and pass the ONNX checker but that no later stage can use, refused with
one line, and old models that the checker refuses for a reason conversion removes.

Called from qfit.graph.load.prepare_model at three points: before the checker (`accept_old_ir`),
after it (`check_structure`), and once static shapes are known (`check_sizes_and_note`).
"""
from __future__ import annotations

import numpy as np
import onnx

from qfit import ops
from qfit.errors import QfitError
from qfit.sizes import check_tensor_elements

OLDEST_IR_WITHOUT_INITIALIZER_INPUTS = 4  # from IR version 4 an initializer need not be a graph input
DENORMAL_FLOAT32 = float(np.finfo(np.float32).tiny)  # smallest normal float32, 2**-126


def accept_old_ir(model: onnx.ModelProto) -> None:
    """IR 3 (opset 7 era) requires every initializer to be listed as a graph input; exporters of
    the time sometimes left them out, and the checker refuses the file ("initializer but not in
    graph input") though its meaning is clear. IR 4 dropped that rule and changed nothing else a
    float graph uses, so such a model is read as IR 4; the opset conversion follows as for any model."""
    listed = {i.name for i in model.graph.input}
    if model.ir_version < OLDEST_IR_WITHOUT_INITIALIZER_INPUTS and any(
            init.name not in listed for init in model.graph.initializer):
        model.ir_version = OLDEST_IR_WITHOUT_INITIALIZER_INPUTS


def check_structure(model: onnx.ModelProto, where: str) -> None:
    """Refuse graphs with nothing to measure: no outputs, no nodes, or only pass-through nodes."""
    graph = model.graph
    if not graph.output:
        raise QfitError(f"model: {where}: has no outputs; there is nothing to quantize or compare")
    if not graph.node:
        raise QfitError(f"model: {where}: has no operators; there is nothing to quantize")
    if all(ops.of(node).passthrough for node in graph.node):
        kinds = ", ".join(sorted({node.op_type for node in graph.node}))
        raise QfitError(f"model: {where}: has only pass-through operators ({kinds}); there is nothing to quantize")


def check_sizes_and_note(shapes: dict[str, tuple[int, ...]], constants: dict[str, np.ndarray],
                         notes: list[str], where: str) -> None:
    """Every tensor within qfit's element ceiling (qfit.sizes), so no byte, element or MAC count can
    wrap around; and a note for weights holding denormal values, whose int8 scale is raised to the
    minimum (qfit.quant.scale_floor) so that no scale is 0 or denormal."""
    for name, shape in shapes.items():
        check_tensor_elements(shape, f"model: {where}: tensor '{name}'")
    tiny = sorted(name for name, array in constants.items()
                  if array.dtype.kind == "f" and array.size
                  and np.any((array != 0) & (np.abs(array) < DENORMAL_FLOAT32)))
    if tiny:
        notes.append(f"denormal weight values in {', '.join(tiny[:5])}{' and more' if len(tiny) > 5 else ''}: "
                     f"a channel whose weights are all that small quantizes to zeros at the minimum weight scale")
