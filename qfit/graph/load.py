"""load: an ONNX file -> a clean in-memory graph with static shapes.

Steps: read (external data too) -> check -> opset to >= 21 (int16 QDQ needs it) -> fix dynamic input
dims from overrides -> the rewrites of graph/rewrite.py (Constant nodes to initializers, drop
Identity/Dropout, fold BatchNormalization into the preceding Conv/ConvTranspose/Gemm or make it
Mul+Add, fold nodes whose inputs are all constant) -> shape inference -> every tensor must have a
static shape. The file on disk is never written.
"""
from __future__ import annotations

import os
import re

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper, shape_inference

from qfit import ops
from qfit.errors import QfitError
from qfit.graph import rewrite, sanity
from qfit.graph.model import LoadedModel  # noqa: F401  (the loader's result type, importable from here)

MIN_OPSET = 13
TARGET_OPSET = 21  # first opset whose QuantizeLinear/DequantizeLinear accept int16

MAX_DIM = 2 ** 31 - 1  # ONNX stores dims as int64; a larger one is a typo, not an MCU model
_SHAPE = re.compile(r"^([^=]+)=([0-9]+(?:[x,][0-9]+)*)$")


def parse_input_shapes(specs: list[str] | None) -> dict[str, tuple[int, ...]]:
    """['image=1x3x96x96', ...] -> {'image': (1, 3, 96, 96)}."""
    shapes: dict[str, tuple[int, ...]] = {}
    for spec in specs or []:
        match = _SHAPE.match(spec.strip())
        if not match:
            raise QfitError(f"--input-shape: cannot read '{spec}' (expected NAME=1x3x96x96)")
        texts = re.split("[x,]", match.group(2))
        # length first: int() refuses strings of more than 4300 digits with its own error
        if any(len(t.lstrip("0")) > len(str(MAX_DIM)) or int(t) > MAX_DIM for t in texts):
            raise QfitError(f"--input-shape: '{spec[:80]}' has a dimension larger than {MAX_DIM}")
        dims = tuple(int(t) for t in texts)
        if any(d <= 0 for d in dims):
            raise QfitError(f"--input-shape: '{spec}' has a dimension that is not positive")
        shapes[match.group(1)] = dims
    return shapes


def read_model_file(path: str) -> onnx.ModelProto:
    """Read and parse an ONNX file (external data included), with one-line errors."""
    if not os.path.exists(path):
        raise QfitError(f"model: {path}: no such file")
    if os.path.isdir(path):
        raise QfitError(f"model: {path}: is a directory, not an ONNX file")
    if os.path.getsize(path) == 0:
        raise QfitError(f"model: {path}: file is empty")
    try:
        with open(path, "rb") as f:
            data = f.read()
    except OSError as e:
        raise QfitError(f"model: {path}: cannot read ({e.strerror})") from None
    model = onnx.ModelProto()
    try:
        model.ParseFromString(data)
    except Exception:
        raise QfitError(f"model: {path}: not an ONNX file (cannot parse it as an ONNX model)") from None
    if not model.HasField("graph") or (not model.graph.node and not model.graph.input):
        raise QfitError(f"model: {path}: not an ONNX model (no graph in the file)")
    try:
        onnx.external_data_helper.load_external_data_for_model(model, os.path.dirname(os.path.abspath(path)))
    except Exception as e:
        raise QfitError(f"model: {path}: cannot load its external data ({_first_line(e)})") from None
    return model


def _first_line(error: Exception) -> str:
    """The error's text on one line (onnx's checker breaks its sentences across lines), capped."""
    text = " ".join(part.strip() for part in str(error).strip().splitlines() if part.strip())
    return text[:300] if text else type(error).__name__


def _default_opset(model: onnx.ModelProto) -> int:
    for imp in model.opset_import:
        if imp.domain in ("", "ai.onnx"):
            return imp.version
    return 0


def _check(model: onnx.ModelProto, where: str) -> None:
    try:
        onnx.checker.check_model(model)
    except Exception as e:
        raise QfitError(f"model: {where}: fails the ONNX checker: {_first_line(e)}") from None


def _convert_opset(model: onnx.ModelProto, where: str, notes: list[str]) -> onnx.ModelProto:
    opset = _default_opset(model)
    if opset == 0:
        raise QfitError(f"model: {where}: imports no default-domain opset")
    if opset >= TARGET_OPSET:
        return model
    try:
        from onnx import version_converter
        converted = version_converter.convert_version(model, TARGET_OPSET)
        onnx.checker.check_model(converted)
        notes.append(f"opset converted from {opset} to {TARGET_OPSET}")
        return converted
    except Exception as e:
        if opset < MIN_OPSET:
            raise QfitError(f"model: {where}: opset {opset} is older than {MIN_OPSET} and could not be "
                            f"converted ({_first_line(e)}); re-export at opset {MIN_OPSET} or newer") from None
        notes.append(f"opset {opset} kept (conversion to {TARGET_OPSET} failed: int16 activations unavailable)")
        return model


def _type_name(elem_type: int) -> str:
    try:
        return TensorProto.DataType.Name(elem_type)
    except ValueError:
        return f"unknown element type {elem_type}"


def _check_readable(model: onnx.ModelProto, where: str) -> None:
    """What the checker leaves alone but later steps decode: every name must be UTF-8 text and every
    stored tensor must convert to an array. Checked once here, so that a damaged file is refused with
    a message instead of failing somewhere in the middle of the cleaning steps."""
    graph = model.graph
    # protobuf hands back a string field that is not valid UTF-8 as bytes (or raises, by version)
    try:
        named = _named_fields(model)
    except UnicodeDecodeError:
        raise QfitError(f"model: {where}: a name in the file is not valid UTF-8 text") from None
    for what, texts in named:
        if any(not isinstance(text, str) for text in texts):
            raise QfitError(f"model: {where}: a name in {what} is not valid UTF-8 text")
    tensors = [(f"initializer '{t.name}'", t) for t in graph.initializer]
    tensors += [(f"node '{node.name or node.op_type}' attribute '{a.name}'", a.t) for node in graph.node
                for a in node.attribute if a.type == onnx.AttributeProto.TENSOR]
    for label, tensor in tensors:
        try:
            array = numpy_helper.to_array(tensor)
        except Exception as e:  # onnx's decoder raises KeyError/ValueError/TypeError on damaged tensors
            raise QfitError(f"model: {where}: {label} cannot be read as a tensor ({_first_line(e)})") from None
        # NaN has no int8 value and poisons every range it touches (Inf can be a legitimate mask value)
        if array.dtype.kind == "f" and np.isnan(array).any():
            raise QfitError(f"model: {where}: {label} contains NaN")


def _named_fields(model: onnx.ModelProto) -> list[tuple[str, list]]:
    """(where, [its string fields]) for every name in the model's main graph."""
    graph = model.graph
    named = [("the model header", [model.producer_name, graph.name] + [imp.domain for imp in model.opset_import])]
    named += [(f"node {i}", [node.name, node.op_type, node.domain, *node.input, *node.output,
                             *(a.name for a in node.attribute)]) for i, node in enumerate(graph.node)]
    named += [(f"{kind} {i}", [vi.name] + [d.dim_param for d in vi.type.tensor_type.shape.dim])
              for kind, infos in (("input", graph.input), ("output", graph.output), ("value info", graph.value_info))
              for i, vi in enumerate(infos)]
    named += [(f"initializer {i}", [init.name]) for i, init in enumerate(graph.initializer)]
    return named


def _graph_inputs(model: onnx.ModelProto) -> list[onnx.ValueInfoProto]:
    inits = {i.name for i in model.graph.initializer}
    return [i for i in model.graph.input if i.name not in inits]


def _fix_input_shapes(model: onnx.ModelProto, overrides: dict[str, tuple[int, ...]], where: str) -> None:
    inputs = _graph_inputs(model)
    if not inputs:
        raise QfitError(f"model: {where}: has no inputs")
    by_name = {i.name: i for i in inputs}
    for name in overrides:
        if name not in by_name:
            raise QfitError(f"--input-shape: model {where} has no input '{name}' "
                            f"(inputs: {', '.join(by_name)})")
    dynamic = []
    for inp in inputs:
        tt = inp.type.tensor_type
        if not inp.type.HasField("tensor_type"):
            raise QfitError(f"model: {where}: input '{inp.name}' is not a tensor")
        if tt.elem_type != TensorProto.FLOAT:
            raise QfitError(f"model: {where}: input '{inp.name}' is {_type_name(tt.elem_type)}; "
                            "qfit quantizes float32-input models")
        dims = tt.shape.dim if tt.HasField("shape") else []
        if inp.name in overrides:
            new = overrides[inp.name]
            if tt.HasField("shape") and len(dims) != len(new):
                raise QfitError(f"--input-shape: input '{inp.name}' has rank {len(dims)}, "
                                f"the override gives {len(new)} dimensions")
            for d, (i, value) in zip(list(dims), enumerate(new)):
                if d.HasField("dim_value") and d.dim_value > 0 and d.dim_value != value:
                    raise QfitError(f"--input-shape: input '{inp.name}' dimension {i} is fixed at "
                                    f"{d.dim_value} in the model, the override gives {value}")
            tt.ClearField("shape")
            tt.shape.dim.extend([onnx.TensorShapeProto.Dimension(dim_value=v) for v in new])
        elif not tt.HasField("shape") or any(not (d.HasField("dim_value") and d.dim_value > 0) for d in dims):
            shown = "x".join(d.dim_param or "?" if not d.dim_value else str(d.dim_value) for d in dims) or "?"
            dynamic.append(f"{inp.name} [{shown}]")
    if dynamic:
        raise QfitError(f"model: {where}: dynamic input dimensions in {'; '.join(dynamic)}; "
                        "fix them with --input-shape NAME=1x3x96x96")
    # Outputs and intermediates are re-inferred from the now static inputs.
    for out in model.graph.output:
        out.type.tensor_type.ClearField("shape")
    del model.graph.value_info[:]


def load_model(path: str, input_shapes: dict[str, tuple[int, ...]] | None = None) -> LoadedModel:
    """Read `path` and prepare it for quantization and budgeting (see the module docstring)."""
    model = read_model_file(path)
    return prepare_model(model, path, input_shapes)


def prepare_model(model: onnx.ModelProto, path: str = "<memory>",
                  input_shapes: dict[str, tuple[int, ...]] | None = None) -> LoadedModel:
    """The loader's cleaning steps on an already parsed model (a copy is made)."""
    work = onnx.ModelProto()
    work.CopyFrom(model)
    notes: list[str] = []
    sanity.accept_old_ir(work)
    _check(work, path)
    sanity.check_structure(work, path)
    _check_readable(work, path)
    original_opset = _default_opset(work)
    _fix_input_shapes(work, dict(input_shapes or {}), path)
    rewrite.constants_to_initializers(work.graph)
    work = _convert_opset(work, path, notes)
    rewrite.name_nodes(work.graph)
    moved = rewrite.constants_to_initializers(work.graph)
    dropped = rewrite.drop_passthrough(work.graph)
    try:
        work = shape_inference.infer_shapes(work, strict_mode=True)
    except Exception as e:
        raise QfitError(f"model: {path}: shape inference failed: {_first_line(e)}") from None
    folded_bn, lone_bn = rewrite.fold_channel_affine(work.graph, path)
    folded_const = rewrite.fold_constants(work)
    rewrite.remove_unused_initializers(work.graph)
    del work.graph.value_info[:]
    try:
        work = shape_inference.infer_shapes(work, strict_mode=True, data_prop=True)
    except Exception as e:
        raise QfitError(f"model: {path}: shape inference failed after cleaning: {_first_line(e)}") from None
    for n, what in ((folded_bn, "BatchNormalization folded into the preceding layer"),
                    (lone_bn, "BatchNormalization without a preceding layer turned into Mul+Add"),
                    (dropped, "Identity/Dropout removed"), (moved, "Constant nodes made initializers"),
                    (folded_const, "constant subgraphs folded")):
        if n:
            notes.append(f"{n} {what}")
    constants = {i.name: numpy_helper.to_array(i) for i in work.graph.initializer}
    shapes, elem_types = {}, {}
    for vi in list(work.graph.value_info) + list(work.graph.input) + list(work.graph.output):
        tt = vi.type.tensor_type
        elem_types[vi.name] = tt.elem_type
        if tt.HasField("shape") and all(d.HasField("dim_value") for d in tt.shape.dim):
            shapes[vi.name] = tuple(int(d.dim_value) for d in tt.shape.dim)
    for name, arr in constants.items():
        shapes[name] = tuple(arr.shape)
        elem_types[name] = helper.np_dtype_to_tensor_dtype(arr.dtype)
    sanity.check_sizes_and_note(shapes, constants, notes, path)
    missing = [o for node in work.graph.node for o in node.output if o and o not in shapes]
    if missing:
        raise QfitError(f"model: {path}: cannot determine a static shape for tensor '{missing[0]}' "
                        f"({len(missing)} tensors without a static shape)")
    unsupported = sorted({n.op_type for n in work.graph.node if not ops.is_supported(n)})
    if unsupported:
        notes.append(f"kept float (not supported in int8): {', '.join(unsupported)}")
    for node in work.graph.node:
        reason = ops.float_reason(node, lambda name: name in constants) if ops.is_supported(node) else None
        if reason:
            notes.append(f"kept float: {node.name} ({reason})")
    return LoadedModel(path=path, model=work, shapes=shapes, elem_types=elem_types,
                       constants=constants, notes=notes, original_opset=original_opset)
