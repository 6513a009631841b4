"""The loaded model and an index of its graph, built once and shared by every stage.

`GraphIndex` answers the questions the stages used to answer with maps of their own: which node
produces a tensor, which nodes read it (once per input slot, in graph order), how often it is used,
and a name no tensor or node has yet.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
import onnx
from onnx import TensorProto, numpy_helper

from qfit import ops


class FreshNames:
    """Names not yet used: `fresh("x")` gives "x", then "x_1", "x_2", ... (each name once)."""

    def __init__(self, taken):
        self.taken = set(taken)

    def __call__(self, base: str) -> str:
        name, i = base, 1
        while name in self.taken:
            name, i = f"{base}_{i}", i + 1
        self.taken.add(name)
        return name


class GraphIndex:
    """Producers, consumers and names of one graph. Build it after the graph's last edit: it does not
    follow later changes."""

    def __init__(self, graph: onnx.GraphProto):
        self.graph = graph
        self.nodes: list[onnx.NodeProto] = list(graph.node)
        self.output_names = [o.name for o in graph.output]
        self.initializer_names = {i.name for i in graph.initializer}
        self._producer: dict[str, int] = {}
        self._readers: dict[str, list[int]] = {}
        for position, node in enumerate(self.nodes):
            for name in node.output:
                if name:
                    self._producer[name] = position
            for name in node.input:
                self._readers.setdefault(name, []).append(position)

    def producer(self, tensor: str) -> onnx.NodeProto | None:
        """The node that writes `tensor` (None for graph inputs, initializers and unknown names)."""
        position = self._producer.get(tensor)
        return None if position is None else self.nodes[position]

    def producer_position(self, tensor: str) -> int | None:
        return self._producer.get(tensor)

    def consumers(self, tensor: str) -> list[onnx.NodeProto]:
        """Nodes that read `tensor`, once per input slot (a node reading it twice is listed twice)."""
        return [self.nodes[p] for p in self._readers.get(tensor, [])]

    def reader_positions(self, tensor: str) -> list[int]:
        """Positions (in node order) of the nodes that read `tensor`, each once."""
        return list(dict.fromkeys(self._readers.get(tensor, [])))

    def sole_consumer(self, tensor: str) -> onnx.NodeProto | None:
        """The one node reading `tensor` (in one input slot), when no graph output is `tensor` either."""
        readers = self._readers.get(tensor, [])
        return self.nodes[readers[0]] if len(readers) == 1 and tensor not in self.output_names else None

    def use_count(self, tensor: str) -> int:
        """Input slots reading `tensor`, plus one per graph output that is `tensor`."""
        return len(self._readers.get(tensor, [])) + self.output_names.count(tensor)

    def fresh_names(self) -> FreshNames:
        """A name source that avoids every graph input, initializer and node output."""
        taken = set(self._producer) | self.initializer_names | {i.name for i in self.graph.input}
        return FreshNames(taken)


@dataclass
class LoadedModel:
    """A float model ready for every later stage. `model` is qfit's own copy; no stage edits it after
    loading (they edit copies), so `index` stays valid."""

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

    @cached_property
    def index(self) -> GraphIndex:
        return GraphIndex(self.model.graph)

    def shape_of(self, name: str):
        return self.shapes.get(name)

    def constant(self, name: str):
        return self.constants.get(name)

    def is_constant(self, name: str) -> bool:
        return name in self.constants


def with_constants(loaded: LoadedModel, values: dict[str, np.ndarray] | None = None,
                   new_biases: dict[str, tuple[str, np.ndarray]] | None = None) -> LoadedModel:
    """A copy of `loaded` with initializers replaced (`values`) and bias inputs added to nodes
    (`new_biases`: node -> (new initializer name, values), at the input the registry names as the
    node's bias). The input object is not changed."""
    values = dict(values or {})
    new_biases = dict(new_biases or {})
    model = onnx.ModelProto()
    model.CopyFrom(loaded.model)
    graph = model.graph
    for init in graph.initializer:
        if init.name in values:
            init.CopyFrom(numpy_helper.from_array(np.asarray(values[init.name], np.float32), init.name))
    for node in graph.node:
        if node.name in new_biases:
            name, array = new_biases[node.name]
            bias_index = ops.of(node).bias
            if bias_index is None:
                raise ValueError(f"{node.op_type} node {node.name} has no bias input")
            graph.initializer.append(numpy_helper.from_array(np.asarray(array, np.float32), name))
            while len(node.input) < bias_index:
                node.input.append("")
            if len(node.input) == bias_index:
                node.input.append(name)
            else:
                node.input[bias_index] = name
    constants = dict(loaded.constants)
    shapes = dict(loaded.shapes)
    elem_types = dict(loaded.elem_types)
    for name, array in values.items():
        constants[name] = np.asarray(array, np.float32)
    for name, array in new_biases.values():
        constants[name] = np.asarray(array, np.float32)
        shapes[name] = tuple(np.shape(array))
        elem_types[name] = TensorProto.FLOAT
    return LoadedModel(path=loaded.path, model=model, shapes=shapes, elem_types=elem_types,
                       constants=constants, notes=list(loaded.notes), original_opset=loaded.original_opset)
