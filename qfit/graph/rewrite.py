"""rewrite: the loader's graph edits. Each step asks the operator registry what an op is; none of them
knows an op type by name.

  * Constant nodes become initializers;
  * pass-through ops (Identity, Dropout at inference) are removed;
  * a per-channel affine op (BatchNormalization) folds into the weights of the layer before it, or
    becomes Mul + Add when there is no such layer;
  * nodes whose inputs are all constants (a weight Transpose, a Shape -> Gather chain) are evaluated;
  * initializers nobody reads are dropped, and every node gets a unique name.
"""
from __future__ import annotations

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper, shape_inference

from qfit import ops
from qfit.errors import QfitError
from qfit.graph.model import GraphIndex

DEFAULT_DOMAINS = ("", "ai.onnx")


def constants_to_initializers(graph: onnx.GraphProto) -> int:
    keep, moved = [], 0
    for node in graph.node:
        entry = ops.of(node)
        value = (entry.constant_value(node) if entry.constant_value is not None and node.domain in DEFAULT_DOMAINS
                 else None)
        if value is None:
            keep.append(node)
            continue
        graph.initializer.append(numpy_helper.from_array(value, node.output[0]))
        moved += 1
    del graph.node[:]
    graph.node.extend(keep)
    return moved


def _rename_input(graph: onnx.GraphProto, old: str, new: str) -> None:
    for node in graph.node:
        for i, name in enumerate(node.input):
            if name == old:
                node.input[i] = new


def drop_passthrough(graph: onnx.GraphProto) -> int:
    """Remove ops whose output equals their input at inference: consumers read the input directly."""
    outputs = {o.name for o in graph.output}
    dropped = 0
    for node in list(graph.node):
        if not ops.of(node).passthrough:
            continue
        src, dst = node.input[0], node.output[0]
        if dst in outputs:
            if src in {i.name for i in graph.input} | {i.name for i in graph.initializer}:
                continue  # an input wired straight to an output: keep the Identity (renaming makes a loop)
            # keep the graph output's name: rename the producer's output instead
            for other in graph.node:
                for i, name in enumerate(other.output):
                    if name == src:
                        other.output[i] = dst
            _rename_input(graph, src, dst)
        else:
            _rename_input(graph, dst, src)
        graph.node.remove(node)
        dropped += 1
    return dropped


def _check_folded(where: str, node: onnx.NodeProto, *arrays: np.ndarray) -> None:
    for array in arrays:
        with np.errstate(over="ignore", invalid="ignore"):
            finite = np.isfinite(array.astype(np.float32)).all()
        if not finite:
            raise QfitError(f"model: {where}: folding {node.op_type} '{node.name}' gives values outside the "
                            "float32 range (check its scale, mean and variance)")


def _fold_target(prev, index: GraphIndex, inits: dict, outputs: set, channels: int):
    """(weight as float64, per-channel axis) when the affine op after `prev` can fold into it: `prev`
    absorbs a per-channel affine, nothing else reads its output, its weight and bias are constants,
    its output channels run along one weight axis, and its bias (if any) is one value per channel."""
    if prev is None or not ops.of(prev).absorbs_channel_affine or 1 not in ops.of(prev).weights:
        return None
    if (len(index.consumers(prev.output[0])) != 1 or prev.output[0] in outputs or len(prev.input) < 2
            or prev.input[1] not in inits or (len(prev.input) > 2 and prev.input[2] and prev.input[2] not in inits)):
        return None
    w = numpy_helper.to_array(inits[prev.input[1]]).astype(np.float64)
    axis = ops.of(prev).weights[1](prev, w.shape)
    if axis is None or w.shape[axis] != channels:
        return None
    if len(prev.input) > 2 and prev.input[2]:
        # a bias of another shape (a Gemm's C may broadcast) is not one value per channel
        if tuple(inits[prev.input[2]].dims) != (channels,):
            return None
    return w, axis


def _fold_into(graph, node, prev, w, axis: int, k, shift, inits: dict, where: str) -> None:
    """prev's weight W' = k W along `axis`, its bias b' = k b + shift / beta (beta: the factor prev
    applies to its bias, 1 for Conv; y = alpha A B + beta C for Gemm); prev then writes node's output."""
    bshape = [1] * w.ndim
    bshape[axis] = -1
    with np.errstate(over="ignore", invalid="ignore"):  # _check_folded refuses non-finite results
        w = w * k.reshape(bshape)
    has_bias = len(prev.input) > 2 and bool(prev.input[2])
    b = numpy_helper.to_array(inits[prev.input[2]]).astype(np.float64) if has_bias else np.zeros(k.shape[0])
    beta = ops.bias_scale(prev)
    if has_bias and beta != 0.0:
        with np.errstate(over="ignore", invalid="ignore"):
            b = b * k + shift / beta
    else:
        b = shift
        scale_attr = ops.of(prev).bias_scale_attr   # the new bias is used as it is: factor back to 1
        keep_attrs = [a for a in prev.attribute if a.name != scale_attr]
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


def _as_mul_add(graph, node, k, shift) -> list[onnx.NodeProto]:
    """y = x * k + shift with k, shift broadcast over the channel axis 1."""
    rank = len(_value_rank(graph, node.input[0]) or [0, 0, 0, 0])
    shape = [1] * max(rank, 2)
    shape[1] = -1
    kname, sname = node.output[0] + "_bn_scale", node.output[0] + "_bn_shift"
    graph.initializer.append(numpy_helper.from_array(k.reshape(shape).astype(np.float32), kname))
    graph.initializer.append(numpy_helper.from_array(shift.reshape(shape).astype(np.float32), sname))
    mid = node.output[0] + "_bn_mul"
    return [helper.make_node("Mul", [node.input[0], kname], [mid], name=(node.name or mid) + "_mul"),
            helper.make_node("Add", [mid, sname], [node.output[0]], name=(node.name or mid) + "_add")]


def fold_channel_affine(graph: onnx.GraphProto, where: str = "<memory>") -> tuple[int, int]:
    """Fold per-channel affine ops (BatchNormalization) into the layer before them; a lone one becomes
    Mul + Add. Returns (folded, lone)."""
    inits = {i.name: i for i in graph.initializer}
    outputs = {o.name for o in graph.output}
    index = GraphIndex(graph)

    def constant_of(name: str):
        return numpy_helper.to_array(inits[name]) if name in inits else None

    folded = lone = 0
    replacements: dict[int, list[onnx.NodeProto]] = {}   # node position -> the nodes that replace it
    for position, node in enumerate(index.nodes):
        rule = ops.of(node).folds_into_producer
        if rule is None:
            continue
        try:
            affine = rule(node, constant_of)
        except ValueError as e:
            raise QfitError(f"model: {where}: {node.op_type} '{node.name}' {e}; it cannot be folded") from None
        if affine is None:
            continue
        k, shift = affine
        _check_folded(where, node, k, shift)
        prev = index.producer(node.input[0])
        target = _fold_target(prev, index, inits, outputs, k.shape[0])
        if target is not None:
            _fold_into(graph, node, prev, *target, k, shift, inits, where)
            replacements[position] = []
            folded += 1
        else:
            replacements[position] = _as_mul_add(graph, node, k, shift)
            lone += 1
    result = []
    for position, node in enumerate(graph.node):
        result.extend(replacements.get(position, [node]))
    del graph.node[:]
    graph.node.extend(result)
    return folded, lone


def _value_rank(graph: onnx.GraphProto, name: str):
    for vi in list(graph.value_info) + list(graph.input) + list(graph.output):
        if vi.name == name and vi.type.tensor_type.HasField("shape"):
            return [d.dim_value for d in vi.type.tensor_type.shape.dim]
    return None


def _evaluate_on_constants(model: onnx.ModelProto, node: onnx.NodeProto, inits: dict) -> list | None:
    """The node's outputs computed by onnx.reference from its constant inputs, or None."""
    from onnx.reference import ReferenceEvaluator

    if not all((not n) or n in inits for n in node.input):
        return None
    feeds = {n: numpy_helper.to_array(inits[n]) for n in node.input if n}
    sub = helper.make_graph(
        [node], "fold",
        [helper.make_tensor_value_info(n, inits[n].data_type, None) for n in feeds],
        [helper.make_tensor_value_info(o, TensorProto.UNDEFINED, None) for o in node.output])
    sub_model = helper.make_model(sub, opset_imports=model.opset_import)
    try:
        return ReferenceEvaluator(sub_model).run(None, feeds)
    except Exception:  # onnx.reference raises anything on inputs it cannot evaluate: leave the node
        return None


def fold_constants(model: onnx.ModelProto) -> int:
    """Evaluate nodes whose inputs are all constants (e.g. a weight Transpose, a Shape->Gather chain)."""
    graph = model.graph
    folded = 0
    changed = True
    while changed:
        changed = False
        inits = {i.name: i for i in graph.initializer}
        shapes = static_shapes(model)
        for node in list(graph.node):
            entry = ops.of(node)
            if not entry.constant_foldable or node.domain not in DEFAULT_DOMAINS:
                continue
            if entry.fold_from_shape is not None:
                values = entry.fold_from_shape(node, shapes.get)
            else:
                values = _evaluate_on_constants(model, node, inits)
            if values is None:
                continue
            for name, value in zip(node.output, values):
                graph.initializer.append(numpy_helper.from_array(np.asarray(value), name))
            graph.node.remove(node)
            folded += 1
            changed = True
            break
    return folded


def static_shapes(model: onnx.ModelProto) -> dict[str, tuple[int, ...]]:
    try:
        inferred = shape_inference.infer_shapes(model)
    except Exception:  # shape inference fails in many ways on partial graphs: fold what is known
        inferred = model
    shapes = {}
    for vi in list(inferred.graph.value_info) + list(inferred.graph.input) + list(inferred.graph.output):
        tt = vi.type.tensor_type
        if tt.HasField("shape") and all(d.HasField("dim_value") for d in tt.shape.dim):
            shapes[vi.name] = tuple(d.dim_value for d in tt.shape.dim)
    return shapes


def remove_unused_initializers(graph: onnx.GraphProto) -> None:
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


def name_nodes(graph: onnx.GraphProto) -> None:
    seen = set()
    for i, node in enumerate(graph.node):
        name = node.name or f"{node.op_type}_{i}"
        while name in seen:
            name = f"{name}_{i}"
        node.name = name
        seen.add(name)
