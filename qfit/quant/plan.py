"""plan: decide, for a loaded float model, what is stored as integers and what stays float.

The plan is the single record of precision choices. The quantizer turns it into a QDQ graph, the
budget counts bytes from it, and the repair search edits it (keep a layer float, give a tensor 16-bit
activations, another calibration method for a tensor) and asks both again.

Rules (all from the operator registry in qfit.ops):
  * a node is quantized when its op type is in the table and it is not listed in `float_nodes`;
  * an activation tensor produced by a quantized node is stored as an integer, unless it is "fused":
    its only consumer is a ReLU-family clamp (ops.is_fusable_clamp: Relu, or Clip with a lower bound
    >= 0) that the producer's integer kernel applies as its output clamp;
  * a graph input, or a tensor produced by a float node, is stored as an integer when a quantized node
    reads it as a quantized input; otherwise it stays float32;
  * an output of a "shared" op (MaxPool, Reshape, ...) takes the quantizer of its first input;
  * weights of quantized nodes are int8, per output channel (or per tensor); a bias is int32 with
    scale = input scale x weight scale, when both of those exist.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from onnx import NodeProto, TensorProto

from qfit import ops
from qfit.graph.model import GraphIndex, LoadedModel

METHODS = ("minmax", "percentile", "mse", "entropy")


@dataclass
class ActivationQuant:
    """An activation tensor stored as an integer."""

    bits: int = 8
    symmetric: bool = False
    method: str | None = None   # calibration method for this tensor; None = the run's method
    shared_from: str | None = None  # take scale/zero point from this tensor (shared ops)


@dataclass
class WeightQuant:
    """A weight input of one node stored as int8."""

    node: str
    input_index: int
    tensor: str
    axis: int | None            # per-channel axis, None = per tensor
    bits: int = 8


@dataclass
class Plan:
    activations: dict[str, ActivationQuant] = field(default_factory=dict)
    fused: dict[str, str] = field(default_factory=dict)    # tensor -> activation output that absorbs it
    weights: dict[tuple[str, int], WeightQuant] = field(default_factory=dict)
    biases: dict[tuple[str, int], str] = field(default_factory=dict)  # (node, idx) -> input tensor name
    float_nodes: set[str] = field(default_factory=set)     # kept float (asked for, or unsupported)
    unsupported_nodes: set[str] = field(default_factory=set)

    def bits_of(self, tensor: str) -> int | None:
        """Stored integer bits of an activation tensor, or None when it is float32."""
        q = self.activations.get(tensor)
        return q.bits if q else None

    def source_of(self, tensor: str) -> str:
        """The tensor whose calibrated range defines this tensor's quantizer."""
        seen = set()
        while tensor in self.activations and self.activations[tensor].shared_from and tensor not in seen:
            seen.add(tensor)
            tensor = self.activations[tensor].shared_from
        return tensor

    def calibrated_tensors(self) -> list[str]:
        """Tensors that need range statistics (those with a quantizer of their own)."""
        return [t for t, q in self.activations.items() if q.shared_from is None]


@dataclass
class PlanOptions:
    per_channel: bool = True
    symmetric_activations: bool = False
    float_nodes: frozenset[str] = frozenset()
    activation_bits: dict[str, int] = field(default_factory=dict)     # tensor -> 16 for int16
    activation_methods: dict[str, str] = field(default_factory=dict)  # tensor -> method


def quantized_input_indices(node: NodeProto, loaded: LoadedModel) -> list[int]:
    """Indices of the activation (non-constant, float) inputs of `node` that it reads as integers."""
    entry = ops.of(node)
    if not entry.is_quantized:
        return []
    wanted = range(len(node.input)) if entry.quantized_inputs is None else entry.quantized_inputs
    result = []
    for i in wanted:
        if i >= len(node.input) or not node.input[i] or node.input[i] in loaded.constants:
            continue
        if loaded.elem_types.get(node.input[i], TensorProto.FLOAT) != TensorProto.FLOAT:
            continue
        result.append(i)
    return result


def make_plan(loaded: LoadedModel, options: PlanOptions | None = None) -> Plan:
    """Apply the rules of the module docstring to `loaded`."""
    options = options or PlanOptions()
    graph = loaded.graph
    plan = Plan()
    for node in graph.node:
        if ops.float_reason(node, lambda name: name in loaded.constants) is not None:
            plan.unsupported_nodes.add(node.name)
            plan.float_nodes.add(node.name)
        elif node.name in options.float_nodes:
            plan.float_nodes.add(node.name)
    quantized = {n.name for n in graph.node if n.name not in plan.float_nodes}
    graph_index = loaded.index
    reads_quantized: set[str] = set()
    for node in graph.node:
        if node.name in quantized:
            reads_quantized.update(node.input[i] for i in quantized_input_indices(node, loaded))
    outputs = set(loaded.output_names)

    def new_quant(tensor: str, shared_from: str | None = None) -> ActivationQuant:
        return ActivationQuant(bits=options.activation_bits.get(tensor, 8),
                               symmetric=options.symmetric_activations or options.activation_bits.get(tensor, 8) > 8,
                               method=options.activation_methods.get(tensor), shared_from=shared_from)

    for name in loaded.input_names:
        if name in reads_quantized:
            plan.activations[name] = new_quant(name)
    for node in graph.node:
        entry = ops.of(node)
        for out in node.output:
            if not out or loaded.elem_types.get(out, TensorProto.FLOAT) != TensorProto.FLOAT:
                continue
            if node.name not in quantized:
                if out in reads_quantized:
                    plan.activations[out] = new_quant(out)
                continue
            users = graph_index.consumers(out)
            if (entry.takes_fused_activation and len(users) == 1 and out not in outputs
                    and users[0].name in quantized and ops.is_fusable_clamp(users[0], loaded.constant)
                    and out not in options.activation_bits):
                plan.fused[out] = users[0].output[0]
                continue
            shared_from = None
            source = node.input[0] if node.input else None
            if source in plan.fused:
                pass  # this node is the clamp fused into the producer: the producer's requantized output
            elif ops.output_kind(node) == "shared" and source in plan.activations:
                if plan.activations[source].bits == options.activation_bits.get(out, 8):
                    shared_from = source
            plan.activations[out] = new_quant(out, shared_from)
        if node.name in quantized:
            _add_weights(plan, node, loaded, options)
    _match_input_scales(plan, graph, quantized, graph_index, set(loaded.input_names) | outputs)
    return plan


def _add_weights(plan: Plan, node: NodeProto, loaded: LoadedModel, options: PlanOptions) -> None:
    """The int8 weights of a quantized node (per channel along the registry's axis, or per tensor)
    and its int32 bias, when its input and weight are quantized."""
    entry = ops.of(node)
    for index, axis_rule in entry.weights.items():
        if index >= len(node.input) or node.input[index] not in loaded.constants:
            continue
        tensor = node.input[index]
        if loaded.constants[tensor].dtype != np.float32:
            continue
        shape = loaded.constants[tensor].shape
        axis = axis_rule(node, shape) if options.per_channel else None
        plan.weights[(node.name, index)] = WeightQuant(node.name, index, tensor, axis)
    if entry.bias is not None and entry.bias < len(node.input) and node.input[entry.bias]:
        bias = node.input[entry.bias]
        weight = plan.weights.get((node.name, 1))
        if (bias in loaded.constants and weight is not None and node.input[0] in plan.activations
                and loaded.constants[bias].ndim == 1):
            plan.biases[(node.name, entry.bias)] = bias


def _match_input_scales(plan: Plan, graph, quantized: set[str], index: GraphIndex, fixed: set[str]) -> None:
    """Inputs of an op whose int8 kernel copies bytes from several inputs (Concat) take its output's
    quantizer, so no input is requantized. An input keeps its own when something else reads it, when
    it is a graph input or output, or when its quantizer is already another tensor's."""
    for node in graph.node:
        if node.name not in quantized or not ops.of(node).inputs_share_output or not node.output:
            continue
        out = node.output[0]
        target = plan.activations.get(out)
        if target is None or target.shared_from is not None:
            continue
        for name in node.input:
            q = plan.activations.get(name)
            if (q is None or q.shared_from is not None or name in fixed or q.bits != target.bits
                    or [c.name for c in index.consumers(name)] != [node.name]):
                continue
            q.shared_from = out


def describe_node_precision(plan: Plan, node: NodeProto) -> str:
    """'int8', 'int8/a16' or 'float' for a report line."""
    if node.name in plan.float_nodes:
        return "float"
    bits = {plan.bits_of(o) for o in node.output} | {plan.bits_of(plan.fused.get(o, "")) for o in node.output}
    return "int8/a16" if 16 in bits else "int8"
