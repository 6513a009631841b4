"""load: an ONNX file -> a clean in-memory graph with static shapes.

Steps: read (external data too) -> check -> opset to >= 21 (int16 QDQ needs it) -> fix dynamic input
dims from overrides -> Constant nodes to initializers -> drop Identity/Dropout -> fold
BatchNormalization into the preceding Conv/ConvTranspose/Gemm (a lone one becomes Mul+Add) -> fold
nodes whose inputs are all constant -> shape inference -> every tensor must have a static shape.
The file on disk is never written.
"""
from __future__ import annotations

import os
import re
from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper, shape_inference

from qfit import ops
from qfit.errors import QfitError

MIN_OPSET = 13
TARGET_OPSET = 21  # first opset whose QuantizeLinear/DequantizeLinear accept int16

MAX_DIM = 2 ** 31 - 1  # ONNX stores dims as int64; a larger one is a typo, not an MCU model
_SHAPE = re.compile(r"^([^=]+)=([0-9]+(?:[x,][0-9]+)*)$")


@dataclass
class LoadedModel:
    """A float model ready for every later stage. `model` is qfit's own copy."""

    path: str
    model: onnx.ModelProto
    shapes: dict[str, tuple[int, ...]]
    elem_types: dict[str, int]
    constants: dict[str, np.ndarray]
    notes: list[str] = field(default_factory=list)
    original_opset: int = 0

    @property
    def graph(self) -> onnx.GraphProto:
        return self.model.graph

    @property
    def input_names(self) -> list[str]:
        return [i.name for i in self.model.graph.input]

    @property
    def output_names(self) -> list[str]:
        return [o.name for o in self.model.graph.output]

    def shape_of(self, name: str):
        return self.shapes.get(name)

    def constant(self, name: str):
        return self.constants.get(name)


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


def _constants_to_initializers(graph: onnx.GraphProto) -> int:
    keep, moved = [], 0
    for node in graph.node:
        if node.op_type == "Constant" and node.domain in ("", "ai.onnx"):
            a = node.attribute[0]
            if a.name == "value":
                arr = numpy_helper.to_array(a.t)
            elif a.name in ("value_float", "value_int"):
                arr = np.array(helper.get_attribute_value(a), dtype=np.float32 if a.name == "value_float" else np.int64)
            elif a.name in ("value_floats", "value_ints"):
                arr = np.array(helper.get_attribute_value(a), dtype=np.float32 if a.name == "value_floats" else np.int64)
            else:
                keep.append(node)
                continue
            graph.initializer.append(numpy_helper.from_array(arr, node.output[0]))
            moved += 1
        else:
            keep.append(node)
    del graph.node[:]
    graph.node.extend(keep)
    return moved


def _rename_input(graph: onnx.GraphProto, old: str, new: str) -> None:
    for node in graph.node:
        for i, name in enumerate(node.input):
            if name == old:
                node.input[i] = new


def _drop_passthrough(graph: onnx.GraphProto) -> int:
    """Remove Identity and Dropout (inference mode): consumers read the input directly."""
    outputs = {o.name for o in graph.output}
    dropped = 0
    for node in list(graph.node):
        if node.op_type not in ("Identity", "Dropout"):
            continue
        src, dst = node.input[0], node.output[0]
        if dst in outputs:
            # keep the graph output's name: rename the producer's output instead
            for other in graph.node:
                for i, name in enumerate(other.output):
                    if name == src:
                        other.output[i] = dst
            _rename_input(graph, src, dst)
            if src in {i.name for i in graph.input} | {i.name for i in graph.initializer}:
                continue  # an input wired straight to an output: keep the Identity
        else:
            _rename_input(graph, dst, src)
        graph.node.remove(node)
        dropped += 1
    return dropped


def _consumers(graph: onnx.GraphProto) -> dict[str, list[onnx.NodeProto]]:
    users: dict[str, list[onnx.NodeProto]] = {}
    for node in graph.node:
        for name in node.input:
            users.setdefault(name, []).append(node)
    return users


def _check_folded(where: str, node: onnx.NodeProto, *arrays: np.ndarray) -> None:
    for array in arrays:
        with np.errstate(over="ignore", invalid="ignore"):
            finite = np.isfinite(array.astype(np.float32)).all()
        if not finite:
            raise QfitError(f"model: {where}: folding BatchNormalization '{node.name}' gives values outside the "
                            "float32 range (check its scale, mean and variance)")


def _fold_batchnorm(graph: onnx.GraphProto, where: str = "<memory>") -> tuple[int, int]:
    """Fold BN into the preceding Conv/ConvTranspose/Gemm; turn a lone BN into Mul+Add."""
    inits = {i.name: i for i in graph.initializer}
    outputs = {o.name for o in graph.output}
    producer = {o: n for n in graph.node for o in n.output}
    users = _consumers(graph)
    folded = lone = 0
    new_nodes = []
    removed = set()
    for node in graph.node:
        if node.op_type != "BatchNormalization":
            continue
        if any(n not in inits for n in node.input[1:5]):
            continue
        gamma, beta, mean, var = (numpy_helper.to_array(inits[n]).astype(np.float64) for n in node.input[1:5])
        eps = float(ops.attr(node, "epsilon", 1e-5))
        if not (var + eps > 0).all():  # also catches NaN
            raise QfitError(f"model: {where}: BatchNormalization '{node.name}' has a variance + epsilon that is "
                            "not positive; it cannot be folded")
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):  # checked just below
            k = gamma / np.sqrt(var + eps)
            shift = beta - mean * k
        _check_folded(where, node, k, shift)
        prev = producer.get(node.input[0])
        can_fold = (prev is not None and prev.op_type in ("Conv", "ConvTranspose", "Gemm")
                    and len(users.get(prev.output[0], [])) == 1 and prev.output[0] not in outputs
                    and len(prev.input) > 1 and prev.input[1] in inits
                    and (len(prev.input) < 3 or not prev.input[2] or prev.input[2] in inits))
        if can_fold and prev.op_type == "ConvTranspose" and ops.attr(prev, "group", 1) != 1:
            can_fold = False
        if can_fold:
            w = numpy_helper.to_array(inits[prev.input[1]]).astype(np.float64)
            if prev.op_type == "Conv":
                axis = 0
            elif prev.op_type == "ConvTranspose":
                axis = 1
            else:
                axis = 0 if ops.attr(prev, "transB", 0) else 1
            if w.shape[axis] != k.shape[0]:
                can_fold = False
            elif len(prev.input) > 2 and prev.input[2]:
                # a bias of another shape (a Gemm's C may broadcast) is not one value per channel
                bias_dims = tuple(inits[prev.input[2]].dims)
                can_fold = bias_dims == (k.shape[0],)
        if can_fold:
            bshape = [1] * w.ndim
            bshape[axis] = -1
            with np.errstate(over="ignore", invalid="ignore"):  # _check_folded refuses non-finite results
                w = w * k.reshape(bshape)
            b = (numpy_helper.to_array(inits[prev.input[2]]).astype(np.float64)
                 if len(prev.input) > 2 and prev.input[2] else np.zeros(k.shape[0]))
            has_bias = len(prev.input) > 2 and bool(prev.input[2])
            beta_g = float(ops.attr(prev, "beta", 1.0)) if prev.op_type == "Gemm" else 1.0
            if has_bias and beta_g != 0.0:
                # Gemm: y = alpha*A@B + beta*C, so BN gives B' = k*B and C' = k*C + shift/beta
                with np.errstate(over="ignore", invalid="ignore"):
                    b = b * k + shift / beta_g
            else:
                b = shift
                if prev.op_type == "Gemm":
                    keep_attrs = [a for a in prev.attribute if a.name != "beta"]
                    del prev.attribute[:]
                    prev.attribute.extend(keep_attrs)
            _check_folded(where, node, w, b)
            wname, bname = prev.input[1] + "_bnfold", node.output[0] + "_bias_bnfold"
            graph.initializer.append(numpy_helper.from_array(w.astype(np.float32), wname))
            graph.initializer.append(numpy_helper.from_array(b.astype(np.float32), bname))
            prev.input[1] = wname
            if len(prev.input) > 2:
                prev.input[2] = bname
            else:
                prev.input.append(bname)
            prev.output[0] = node.output[0]
            removed.add(id(node))
            folded += 1
        else:
            # y = x * k + shift with k, shift broadcast over the channel axis 1
            rank = len(_value_rank(graph, node.input[0]) or [0, 0, 0, 0])
            shape = [1] * max(rank, 2)
            shape[1] = -1
            kname, sname = node.output[0] + "_bn_scale", node.output[0] + "_bn_shift"
            graph.initializer.append(numpy_helper.from_array(k.reshape(shape).astype(np.float32), kname))
            graph.initializer.append(numpy_helper.from_array(shift.reshape(shape).astype(np.float32), sname))
            mid = node.output[0] + "_bn_mul"
            new_nodes.append((id(node), [
                helper.make_node("Mul", [node.input[0], kname], [mid], name=(node.name or mid) + "_mul"),
                helper.make_node("Add", [mid, sname], [node.output[0]], name=(node.name or mid) + "_add")]))
            lone += 1
    replacements = dict(new_nodes)
    result = []
    for node in graph.node:
        if id(node) in removed:
            continue
        result.extend(replacements.get(id(node), [node]))
    del graph.node[:]
    graph.node.extend(result)
    return folded, lone


def _value_rank(graph: onnx.GraphProto, name: str):
    for vi in list(graph.value_info) + list(graph.input) + list(graph.output):
        if vi.name == name and vi.type.tensor_type.HasField("shape"):
            return [d.dim_value for d in vi.type.tensor_type.shape.dim]
    return None


_FOLDABLE = {"Transpose", "Reshape", "Cast", "Squeeze", "Unsqueeze", "Concat", "Gather", "Shape",
             "Mul", "Add", "Sub", "Div", "Neg", "Sqrt", "Pow", "Slice", "Flatten", "Range",
             "ConstantOfShape", "Expand", "Equal", "Where", "Not", "ReduceProd", "Min", "Max", "Floor"}


def _fold_constants(model: onnx.ModelProto) -> int:
    """Evaluate nodes whose inputs are all constants (e.g. a weight Transpose, a Shape->Gather chain)."""
    from onnx.reference import ReferenceEvaluator

    graph = model.graph
    folded = 0
    changed = True
    while changed:
        changed = False
        inits = {i.name: i for i in graph.initializer}
        shapes = _static_shapes(model)
        for node in list(graph.node):
            if node.op_type not in _FOLDABLE or node.domain not in ("", "ai.onnx"):
                continue
            if node.op_type == "Shape":
                shape = shapes.get(node.input[0])
                if shape is None:
                    continue
                start, end = ops.attr(node, "start", 0), ops.attr(node, "end", None)
                values = [np.array(shape[start:end], dtype=np.int64)]
            else:
                if not all((not n) or n in inits for n in node.input):
                    continue
                feeds = {n: numpy_helper.to_array(inits[n]) for n in node.input if n}
                sub = helper.make_graph(
                    [node], "fold",
                    [helper.make_tensor_value_info(n, inits[n].data_type, None) for n in feeds],
                    [helper.make_tensor_value_info(o, TensorProto.UNDEFINED, None) for o in node.output])
                sub_model = helper.make_model(sub, opset_imports=model.opset_import)
                try:
                    values = ReferenceEvaluator(sub_model).run(None, feeds)
                except Exception:
                    continue
            for name, value in zip(node.output, values):
                graph.initializer.append(numpy_helper.from_array(np.asarray(value), name))
            graph.node.remove(node)
            folded += 1
            changed = True
            break
    return folded


def _static_shapes(model: onnx.ModelProto) -> dict[str, tuple[int, ...]]:
    try:
        inferred = shape_inference.infer_shapes(model)
    except Exception:
        inferred = model
    shapes = {}
    for vi in list(inferred.graph.value_info) + list(inferred.graph.input) + list(inferred.graph.output):
        tt = vi.type.tensor_type
        if tt.HasField("shape") and all(d.HasField("dim_value") for d in tt.shape.dim):
            shapes[vi.name] = tuple(d.dim_value for d in tt.shape.dim)
    return shapes


def _remove_unused_initializers(graph: onnx.GraphProto) -> None:
    used = {n for node in graph.node for n in node.input} | {o.name for o in graph.output}
    keep = [i for i in graph.initializer if i.name in used]
    del graph.initializer[:]
    graph.initializer.extend(keep)
    inits = {i.name for i in keep}
    inputs = [i for i in graph.input if i.name not in {x.name for x in graph.initializer} or i.name in inits]
    # drop graph inputs that merely mirror initializers (old IR style)
    inputs = [i for i in inputs if i.name not in inits]
    del graph.input[:]
    graph.input.extend(inputs)


def _name_nodes(graph: onnx.GraphProto) -> None:
    seen = set()
    for i, node in enumerate(graph.node):
        name = node.name or f"{node.op_type}_{i}"
        while name in seen:
            name = f"{name}_{i}"
        node.name = name
        seen.add(name)


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
    _check(work, path)
    _check_readable(work, path)
    original_opset = _default_opset(work)
    _fix_input_shapes(work, dict(input_shapes or {}), path)
    _constants_to_initializers(work.graph)
    work = _convert_opset(work, path, notes)
    _name_nodes(work.graph)
    moved = _constants_to_initializers(work.graph)
    dropped = _drop_passthrough(work.graph)
    try:
        work = shape_inference.infer_shapes(work, strict_mode=True)
    except Exception as e:
        raise QfitError(f"model: {path}: shape inference failed: {_first_line(e)}") from None
    folded_bn, lone_bn = _fold_batchnorm(work.graph, path)
    folded_const = _fold_constants(work)
    _remove_unused_initializers(work.graph)
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
    missing = [o for node in work.graph.node for o in node.output if o and o not in shapes]
    if missing:
        raise QfitError(f"model: {path}: cannot determine a static shape for tensor '{missing[0]}' "
                        f"({len(missing)} tensors without a static shape)")
    unsupported = sorted({n.op_type for n in work.graph.node if not ops.is_supported(n.op_type)})
    if unsupported:
        notes.append(f"kept float (not supported in int8): {', '.join(unsupported)}")
    for node in work.graph.node:
        reason = ops.float_reason(node, lambda name: name in constants) if ops.is_supported(node.op_type) else None
        if reason:
            notes.append(f"kept float: {node.name} ({reason})")
    return LoadedModel(path=path, model=work, shapes=shapes, elem_types=elem_types,
                       constants=constants, notes=notes, original_opset=original_opset)
