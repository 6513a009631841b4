"""qdq_read: a QDQ model (QuantizeLinear/DequantizeLinear) back to a float graph + the Plan it encodes.

So that `qfit budget` counts a quantized model exactly as it was quantized — layers left float,
16-bit activations, per-tensor weights — without re-deciding anything:
  * QuantizeLinear -> DequantizeLinear on an activation: the pair is removed, consumers read the
    float tensor again, and the tensor is recorded as stored with the zero point's integer width
    (int8/uint8 -> 8 bits, int16/uint16 -> 16);
  * DequantizeLinear of a constant integer tensor: replaced by the dequantized float constant; a
    weight input records WeightQuant(bits, axis) (axis from the node, per tensor when the scale is
    a single number), an int32 bias input records the bias;
  * a node is quantized when its weights were integer constants, or (without weights) when it reads
    a dequantized tensor and its outputs are quantized again; a Conv/Gemm/Add output read only by a
    quantized ReLU-family clamp (the registry's one rule, ops.is_fusable_clamp) whose output is
    quantized is fused (never stored). Everything else is float.
The input file is never modified.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import onnx
from onnx import TensorProto, numpy_helper

from qfit import ops
from qfit.errors import QfitError
from qfit.graph import rewrite
from qfit.graph.load import prepare_model, read_model_file
from qfit.graph.model import GraphIndex, LoadedModel
from qfit.quant.plan import ActivationQuant, Plan, WeightQuant

_BITS = {TensorProto.INT8: 8, TensorProto.UINT8: 8, TensorProto.INT16: 16, TensorProto.UINT16: 16,
         TensorProto.INT4: 4, TensorProto.UINT4: 4, TensorProto.INT32: 32}


def is_qdq_model(model: onnx.ModelProto) -> bool:
    return any(ops.is_qdq(n) for n in model.graph.node)


def _zero_point_type(node, inits) -> int:
    """Integer type of a Q/DQ node: its zero point's type, else output_dtype, else uint8 (the default)."""
    if len(node.input) > 2 and node.input[2] and node.input[2] in inits:
        return inits[node.input[2]].data_type
    dtype = ops.attr(node, "output_dtype", 0)
    return dtype or TensorProto.UINT8


def _quant_params(node, inits) -> tuple:
    """(scale values, zero point values) of a QuantizeLinear, to recognise shared quantizers."""
    values = []
    for name in node.input[1:3]:
        values.append(tuple(numpy_helper.to_array(inits[name]).reshape(-1).tolist()) if name in inits else None)
    return tuple(values)


def _feeds_quantized_clamp(tensor: str, loaded: LoadedModel, act_bits: dict) -> bool:
    """A tensor read only by one ReLU-family clamp whose output is quantized: a fused activation."""
    users = loaded.index.consumers(tensor)
    return (len(users) == 1 and ops.is_fusable_clamp(users[0], loaded.constant)
            and all(o in act_bits for o in users[0].output if o))


def _dequantize(q: np.ndarray, scale: np.ndarray, zero: np.ndarray | None, axis: int) -> np.ndarray:
    q = q.astype(np.float64)
    if scale.size > 1:
        shape = [1] * q.ndim
        shape[axis % q.ndim] = -1
        scale = scale.reshape(shape)
        zero = zero.reshape(shape) if zero is not None and zero.size > 1 else zero
    zero = 0 if zero is None else zero.astype(np.float64)
    return ((q - zero) * scale.astype(np.float64)).astype(np.float32)


@dataclass
class _Stripped:
    """What removing the quantizer nodes of a QDQ graph leaves to record."""

    const_quant: dict[str, tuple[int, int | None]] = field(default_factory=dict)  # float constant -> (bits, axis)
    act_bits: dict[str, tuple] = field(default_factory=dict)   # activation -> (bits, quantizer parameters)
    rename: dict[str, str] = field(default_factory=dict)       # tensor read by consumers -> tensor it stands for
    removed: set[int] = field(default_factory=set)             # positions of the quantizer nodes
    new_inits: list[onnx.TensorProto] = field(default_factory=list)  # dequantized constants


def read_qdq(model: onnx.ModelProto, path: str = "<memory>",
             input_shapes: dict[str, tuple[int, ...]] | None = None) -> tuple[LoadedModel, Plan]:
    """The float LoadedModel and the Plan a QDQ `model` encodes (see the module docstring)."""
    work = onnx.ModelProto()
    work.CopyFrom(model)
    graph = work.graph
    # Constant nodes (scales written as Constant) become initializers first.
    rewrite.constants_to_initializers(graph)
    inits = {i.name: i for i in graph.initializer}
    stripped = _strip_quantizers(graph, inits, path)
    _rewire(graph, inits, stripped, path)
    loaded = prepare_model(work, path, input_shapes)
    return loaded, _plan_from(loaded, stripped.act_bits, stripped.const_quant)


def _strip_quantizers(graph: onnx.GraphProto, inits: dict, path: str) -> _Stripped:
    """Record every quantizer of `graph`: dequantized constants become float initializers, a
    QuantizeLinear -> DequantizeLinear pair on an activation records the activation's bits."""
    index = GraphIndex(graph)
    outputs = {o.name for o in graph.output}
    found = _Stripped()

    def array(name: str) -> np.ndarray:
        return numpy_helper.to_array(inits[name])

    for position, node in enumerate(index.nodes):
        if node.op_type == "DequantizeLinear" and node.input[0] in inits:
            q = array(node.input[0])
            scale = array(node.input[1]) if node.input[1] in inits else None
            if scale is None:
                raise QfitError(f"model: {path}: DequantizeLinear '{node.name}' has a scale that is not a constant")
            zero = array(node.input[2]) if len(node.input) > 2 and node.input[2] in inits else None
            axis = int(ops.attr(node, "axis", 1))
            bits = _BITS.get(inits[node.input[0]].data_type)
            if bits is None:
                raise QfitError(f"model: {path}: DequantizeLinear '{node.name}' reads an unsupported integer type")
            found.new_inits.append(numpy_helper.from_array(_dequantize(q, scale, zero, axis), node.output[0]))
            found.const_quant[node.output[0]] = (bits, axis if scale.size > 1 else None)
            found.removed.add(position)
        elif node.op_type == "QuantizeLinear":
            x, q = node.input[0], node.output[0]
            bits = _BITS.get(_zero_point_type(node, inits))
            if bits is None or bits > 16:
                raise QfitError(f"model: {path}: QuantizeLinear '{node.name}' writes an unsupported integer type")
            readers = index.reader_positions(q)
            if q in outputs or any(index.nodes[r].op_type != "DequantizeLinear" for r in readers):
                raise QfitError(f"model: {path}: QuantizeLinear '{node.name}' output '{q}' is not only read by "
                                "DequantizeLinear (integer graph outputs or integer operators are not supported)")
            if x in inits:
                found.const_quant[x] = (bits, int(ops.attr(node, "axis", 1)) if array(node.input[1]).size > 1 else None)
            else:
                found.act_bits[x] = (bits, _quant_params(node, inits))
            for r in readers:
                found.rename[index.nodes[r].output[0]] = x
                found.removed.add(r)
            found.removed.add(position)
    for position, node in enumerate(index.nodes):
        if node.op_type == "DequantizeLinear" and position not in found.removed:
            raise QfitError(f"model: {path}: DequantizeLinear '{node.name}' reads '{node.input[0]}', which is "
                            "neither a constant nor the output of a QuantizeLinear")
    return found


def _rewire(graph: onnx.GraphProto, inits: dict, stripped: _Stripped, path: str) -> None:
    """Remove the quantizer nodes: consumers read the float tensors again (in place)."""
    outputs = {o.name for o in graph.output}
    rename, act_bits = stripped.rename, stripped.act_bits
    # A DQ output that is a graph output keeps its name: the float tensor behind it takes that name.
    output_renames: dict[str, str] = {}
    for dq_out, x in list(rename.items()):
        if dq_out in outputs:
            if x in {i.name for i in graph.input} or x in inits:
                raise QfitError(f"model: {path}: graph output '{dq_out}' is a quantized copy of an input or constant")
            output_renames[x] = dq_out
            del rename[dq_out]
    kept = [n for position, n in enumerate(graph.node) if position not in stripped.removed]
    for node in kept:
        for i, name in enumerate(node.input):
            name = rename.get(name, name)
            node.input[i] = output_renames.get(name, name)
        for i, name in enumerate(node.output):
            node.output[i] = output_renames.get(name, name)
    for old, new in output_renames.items():
        if old in act_bits:
            act_bits[new] = act_bits.pop(old)
    del graph.node[:]
    graph.node.extend(kept)
    graph.initializer.extend(stripped.new_inits)
    used = {n for node in kept for n in node.input} | outputs
    keep_inits = [i for i in graph.initializer if i.name in used]
    del graph.initializer[:]
    graph.initializer.extend(keep_inits)
    del graph.value_info[:]


def _plan_from(loaded: LoadedModel, act_bits: dict[str, tuple], const_quant: dict) -> Plan:
    plan = Plan()
    graph = loaded.graph
    index = loaded.index
    quantized: set[str] = set()
    for node in graph.node:
        entry = ops.of(node)
        if not entry.is_quantized:
            plan.unsupported_nodes.add(node.name)
            plan.float_nodes.add(node.name)
            continue
        const_weights = [i for i in entry.weights if i < len(node.input) and node.input[i] in loaded.constants]
        if const_weights:
            is_q = all(node.input[i] in const_quant for i in const_weights)
        else:
            acts = [n for n in node.input if n and n not in loaded.constants]
            reads_int = any(n in act_bits for n in acts)
            prev = index.producer(acts[0]) if acts else None
            if prev is not None and ops.is_fusable_clamp(node, loaded.constant):
                reads_int = reads_int or (prev.name in quantized and ops.of(prev).takes_fused_activation)
            outs = [o for o in node.output if o]
            is_q = reads_int and bool(outs) and all(
                o in act_bits or (entry.takes_fused_activation and _feeds_quantized_clamp(o, loaded, act_bits))
                for o in outs)
        if is_q:
            quantized.add(node.name)
        else:
            plan.float_nodes.add(node.name)
    for name, (bits, params) in act_bits.items():
        plan.activations[name] = ActivationQuant(bits=bits, symmetric=bits > 8)
    for node in graph.node:
        # A data-movement op whose output quantizer equals its input's shares it (one scale stored).
        if node.name in quantized and ops.of(node).output == "shared" and node.input:
            src, out = node.input[0], node.output[0]
            if src in act_bits and out in act_bits and act_bits[src] == act_bits[out]:
                plan.activations[out].shared_from = src
    outputs = set(loaded.output_names)
    for node in graph.node:
        if node.name not in quantized:
            continue
        entry = ops.of(node)
        for out in node.output:
            users = index.consumers(out)
            if (out and entry.takes_fused_activation and out not in act_bits and out not in outputs and len(users) == 1
                    and ops.is_fusable_clamp(users[0], loaded.constant) and users[0].name in quantized):
                plan.fused[out] = users[0].output[0]
        for i, name in enumerate(node.input):
            if name not in const_quant:
                continue
            bits, axis = const_quant[name]
            if i in entry.weights:
                plan.weights[(node.name, i)] = WeightQuant(node.name, i, name, axis, bits)
            elif i == entry.bias:
                plan.biases[(node.name, i)] = name
    return plan


def load_any(path: str, input_shapes: dict[str, tuple[int, ...]] | None = None):
    """(LoadedModel, Plan or None, is_qdq) for a float or a QDQ model file; a float model's plan is
    left to the caller (it depends on the caller's precision options)."""
    model = read_model_file(path)
    if is_qdq_model(model):
        loaded, plan = read_qdq(model, path, input_shapes)
        return loaded, plan, True
    return prepare_model(model, path, input_shapes), None, False
