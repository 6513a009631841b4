"""sensitivity: what each layer's quantization costs on its own, and which layers to repair first.

Two configurations per layer (a row of the report's layer table: a node, its weights, its output
quantizer), each compared with the float model on the same samples:
  only it int8      every other layer float: the error this layer causes by itself, on its own tensor
                    (`sqnr_isolated_db`) and at the model output (`isolated_output_sqnr_db`, and for
                    classes the KL divergence of the output distribution, `isolated_output_kl_mnats`);
  only it float     every other layer int8: how much of the int8 error keeping it float removes
                    (`float_recovery_db`: output SQNR gain over the all-int8 model).
Each figure carries its uncertainty over the samples (bootstrap standard error and 95 % interval).
Layers are ranked by the continuous figures; on a few dozen samples a one-layer change rarely flips
a prediction, so top-1 points (`sensitivity_pt`, `float_recovery_pt`; `..._agreement_pt` without
labels) are reported only where the flips are beyond chance.

Every configuration derives from one *switch model*: after each quantizer of the int8 model (an
activation's QuantizeLinear/DequantizeLinear pair, one layer's dequantized weights and bias) comes
Where(switch, quantized value, float value). All switches on is the int8 model, all off the float
model. Each configuration is run as a plain model with its switches fixed, and only from the first
node its layer touches (see `find_cuts`). The sweep costs O(layers x samples) inferences, so it runs
on a seeded sample of at most `sample_cap` evaluation files (reported as `samples_used`).
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

from qfit.graph.load import LoadedModel
from qfit.graph.model import GraphIndex
from qfit.measure.compare import ErrorSums, binomial_test_above, round_db, sqnr_from_sums
from qfit.ops import QDQ_OPS
from qfit.quant.plan import Plan
from qfit.quant.quantize import QuantizedModel
from qfit.runtime.sessions import Runner, batch_free, session_options

DEFAULT_SAMPLE_CAP = 32
SWITCH_PREFIX = "qfit_switch_"


@dataclass
class SwitchModel:
    model: onnx.ModelProto
    switches: list[str] = field(default_factory=list)          # graph inputs, bool scalars
    described: dict[str, str] = field(default_factory=dict)    # switch -> what it quantizes
    layer_switches: dict[str, list[str]] = field(default_factory=dict)  # layer row name -> its switches
    value_of: dict[str, str] = field(default_factory=dict)     # tensor -> its name in the switch model


def build_switch_model(reference: LoadedModel, plan: Plan, quantized: QuantizedModel,
                       layers: list[dict]) -> SwitchModel:
    """Rewrite `quantized.model` so that every quantizer can be switched off at run time (see above).

    The float branch of a weight or bias switch holds the `reference` model's value, so a layer
    switched off is exactly the float layer even when its int8 bias was corrected.
    """
    qgraph = quantized.model.graph
    qindex = GraphIndex(qgraph)
    fresh = qindex.fresh_names()
    result = SwitchModel(model=onnx.ModelProto())
    activation_switch, wheres_after = _activation_switches(result, plan, quantized, qindex.producer, fresh)
    new_nodes, float_inits, weight_switch = _switched_nodes(result, reference, plan, qgraph, qindex.producer,
                                                            fresh, wheres_after)
    inputs = list(qgraph.input) + [helper.make_tensor_value_info(s, TensorProto.BOOL, []) for s in result.switches]
    graph = helper.make_graph(new_nodes, qgraph.name, inputs, list(qgraph.output),
                              list(qgraph.initializer) + float_inits)
    result.model = helper.make_model(graph, opset_imports=list(quantized.model.opset_import),
                                     ir_version=quantized.model.ir_version, producer_name="qfit")
    result.layer_switches = _layer_switches(reference, plan, layers, weight_switch, activation_switch)
    row_tensors = {row["tensor"] for row in layers}
    result.value_of = {t: quantized.dequantized.get(t, t) for t in row_tensors | set(reference.output_names)}
    return result


def _add_switch(result: SwitchModel, fresh, what: str) -> str:
    """A new switch input named in order (qfit_switch_0, _1, ...), described as `what`."""
    switch = fresh(f"{SWITCH_PREFIX}{len(result.switches)}")
    result.switches.append(switch)
    result.described[switch] = what
    return switch


def _activation_switches(result: SwitchModel, plan: Plan, quantized: QuantizedModel, producer,
                         fresh) -> tuple[dict[str, str], dict[str, onnx.NodeProto]]:
    """(tensor -> its activation switch, dequantized name -> the Where to emit after its DQ). Each DQ
    output is renamed (the Where's first data input) so that the Where takes over the old name."""
    activation_switch: dict[str, str] = {}
    wheres_after: dict[str, onnx.NodeProto] = {}
    for tensor in plan.activations:
        deq = quantized.dequantized.get(tensor)
        dq = producer(deq)
        if dq is None or dq.op_type != "DequantizeLinear":
            continue
        q = producer(dq.input[0])
        if q is None or q.op_type != "QuantizeLinear":
            continue
        switch = _add_switch(result, fresh, f"activation quantizer of {tensor}")
        activation_switch[tensor] = switch
        on_name = fresh(f"{deq}_switched")
        wheres_after[deq] = helper.make_node("Where", [switch, on_name, q.input[0]], [deq],
                                             name=fresh(f"{deq}_switch_Where"))
    return activation_switch, wheres_after


def _switched_nodes(result: SwitchModel, reference: LoadedModel, plan: Plan, qgraph: onnx.GraphProto, producer,
                    fresh, wheres_after: dict[str, onnx.NodeProto]
                    ) -> tuple[list[onnx.NodeProto], list[onnx.TensorProto], dict[str, str]]:
    """The int8 graph's nodes with a Where after each switched DQ and before each dequantized weight
    or bias input -> (nodes, the float values' initializers, layer -> its weight switch)."""
    reference_nodes = {n.name: n for n in reference.graph.node}
    weight_switch: dict[str, str] = {}
    float_inits: list[onnx.TensorProto] = []
    new_nodes: list[onnx.NodeProto] = []
    for node in qgraph.node:
        copy = onnx.NodeProto()
        copy.CopyFrom(node)
        if node.op_type == "DequantizeLinear" and node.output[0] in wheres_after:
            where = wheres_after[node.output[0]]
            copy.output[0] = where.input[1]
            new_nodes += [copy, where]
            continue
        ref = reference_nodes.get(node.name)
        if ref is not None and node.op_type not in QDQ_OPS and node.op_type == ref.op_type:
            for i, name in enumerate(node.input):
                key = (node.name, i)
                if key not in plan.weights and key not in plan.biases:
                    continue
                made = producer(name)
                if made is None or made.op_type != "DequantizeLinear":
                    continue
                if node.name not in weight_switch:
                    weight_switch[node.name] = _add_switch(result, fresh, f"weights of {node.name}")
                float_name = fresh(f"{name}_float")
                float_inits.append(numpy_helper.from_array(
                    _float_value(reference, ref, i, qgraph, made), float_name))
                chosen = fresh(f"{name}_switched")
                new_nodes.append(helper.make_node("Where", [weight_switch[node.name], name, float_name], [chosen],
                                                  name=fresh(f"{chosen}_Where")))
                copy.input[i] = chosen
        new_nodes.append(copy)
    return new_nodes, float_inits, weight_switch


def _float_value(reference: LoadedModel, ref: onnx.NodeProto, i: int, qgraph: onnx.GraphProto,
                 made: onnx.NodeProto) -> np.ndarray:
    """The float model's value of input `i` of `ref`, for the float branch of its switch."""
    if i < len(ref.input) and ref.input[i] in reference.constants:
        return reference.constants[ref.input[i]].astype(np.float32)
    # a bias that only the int8 model has (added by bias correction): float has none
    shape = [d.dim_value for d in next(init for init in qgraph.initializer if init.name == made.input[0]).dims]
    return np.zeros(shape, np.float32)


def _layer_switches(reference: LoadedModel, plan: Plan, layers: list[dict], weight_switch: dict[str, str],
                    activation_switch: dict[str, str]) -> dict[str, list[str]]:
    """Layer row name -> the switches of its quantizers (none for a layer kept float)."""
    reference_nodes = {n.name: n for n in reference.graph.node}
    row_tensors = {row["tensor"] for row in layers}
    # A quantizer that no row owns (a graph input, or the output of a float layer read by an int8
    # one) belongs to every row that reads it.
    orphans = {t for t in activation_switch if t not in row_tensors}
    layer_switches: dict[str, list[str]] = {}
    for row in layers:
        if row["name"] in plan.float_nodes:
            layer_switches[row["name"]] = []
            continue
        switches = []
        if row["name"] in weight_switch:
            switches.append(weight_switch[row["name"]])
        if row["tensor"] in activation_switch:
            switches.append(activation_switch[row["tensor"]])
        node = reference_nodes.get(row["name"])
        for name in (node.input if node is not None else []):
            if name in orphans and activation_switch[name] not in switches:
                switches.append(activation_switch[name])
        layer_switches[row["name"]] = switches
    return layer_switches


# ---- configurations as plain models, cut where a layer's quantizers begin --------------------------
#
# Running a configuration through the switch model itself costs about nine float passes on the demo:
# every Q/DQ pair runs whether switched on or not, and weights read through Where are no constants,
# so onnxruntime can neither pre-pack them nor keep its blocked convolution layout. So each
# configuration is run as a plain model with its switches fixed (each Where becomes an Identity of
# the chosen value; Q/DQ nodes nobody reads are pruned), and only from the first node its layer's
# quantizers touch (its *start*): everything before is the float model's (only this layer int8) or
# the int8 model's (only this layer float), so it reads those tensors from the float and the int8
# model computed alongside. The configurations of neighbouring layers and that stretch of the float
# and int8 models form one *sweep model* (each part's names prefixed), one onnxruntime session; a
# batch runs through the sweep models in turn, each handing the float and int8 tensors crossing into
# the next group on: memory is one batch's.

def _fixed_nodes(switch: SwitchModel, on: set[str]) -> list[onnx.NodeProto]:
    """The switch model's nodes with every switch fixed: Where(s, quantized, float) -> Identity."""
    switches = set(switch.switches)
    nodes = []
    for node in switch.model.graph.node:
        if node.input and node.input[0] in switches:   # only the switch Where nodes read a switch
            chosen = node.input[1] if node.input[0] in on else node.input[2]
            nodes.append(helper.make_node("Identity", [chosen], [node.output[0]], name=node.name))
        else:
            nodes.append(node)
    return nodes


def _needed_nodes(nodes: list[onnx.NodeProto], fed: set[str], outputs: list[str]) -> list[onnx.NodeProto]:
    """The nodes that compute `outputs` from the tensors in `fed` and the initializers, in order."""
    producer = {o: i for i, n in enumerate(nodes) for o in n.output if o}
    keep, stack = set(), [o for o in outputs if o not in fed]
    while stack:
        index = producer.get(stack.pop())
        if index is None or index in keep:
            continue
        keep.add(index)
        stack.extend(x for x in nodes[index].input if x and x not in fed)
    return [nodes[i] for i in sorted(keep)]


@dataclass
class Part:
    """One configuration inside the sweep model; the tensors it computes get the prefix `tag/`."""

    tag: str
    nodes: list[onnx.NodeProto]   # its switch-model nodes, switches fixed, pruned to what it needs
    source: str | None            # tag of the part whose tensors it reads at its start (None: fed as inputs)
    reads: set[str]               # the switch-model names it reads from there


def sweep_graph(switch: SwitchModel, parts: list[Part], wanted: list[tuple[str, str]],
                tensor_types: dict[str, tuple[int, list]]) -> tuple[onnx.ModelProto, list[str]]:
    """One model computing every part side by side, and the name of each (tag, name) in `wanted` in
    it. A part with no source (the float or int8 model) reads its `reads` as graph inputs named
    `tag@name`; a name a part reads rather than computes is its source's. A wanted name that is such
    an input is not a graph output (the caller has it). `tensor_types`: switch-model tensor ->
    (ONNX element type, shape) from shape inference."""
    graph = switch.model.graph
    # A node computed from initializers alone (the DequantizeLinear of an int8 weight or bias) is the
    # same in every part: it is emitted once, under its own name, and every part reads it. onnxruntime
    # then folds it into one float constant; emitted per part, each configuration held its own copy
    # of every weight after its start (on the demo the sweep's sessions took 130 MiB, mostly those).
    shared = constant_nodes(graph)
    parts = [replace(part, nodes=[n for n in part.nodes if n.output[0] not in shared]) for part in parts]
    made = {part.tag: {o for n in part.nodes for o in n.output if o} for part in parts}
    by_tag = {part.tag: part for part in parts}
    inputs: dict[str, str] = {}   # graph input -> the switch-model tensor it carries

    def name_in(tag: str, name: str) -> str:
        """The sweep-model name of switch-model tensor `name` as part `tag` sees it."""
        part = by_tag[tag]
        if not name or name in made[tag]:
            return f"{tag}/{name}" if name else name
        if name not in part.reads:
            return name                                   # an initializer
        if part.source is not None:
            return name_in(part.source, name)
        inputs[f"{tag}@{name}"] = name
        return f"{tag}@{name}"

    nodes, emitted = [], set()
    for part in parts:
        for node in part.nodes:
            for x in node.input:
                if x in shared and x not in made[part.tag]:
                    _emit_shared(x, shared, nodes, emitted)
            copy = helper.make_node(node.op_type, [name_in(part.tag, x) for x in node.input],
                                    [f"{part.tag}/{o}" if o else "" for o in node.output],
                                    name=f"{part.tag}/{node.name}", domain=node.domain or None)
            copy.attribute.extend(node.attribute)
            nodes.append(copy)
    used = {x for n in nodes for x in n.input}
    outputs = [name_in(tag, name) for tag, name in wanted]

    def info(name: str, tensor: str, batched: bool) -> onnx.ValueInfoProto:
        elem, shape = tensor_types.get(tensor, (TensorProto.FLOAT, None))
        return helper.make_tensor_value_info(name, elem, (["batch", *shape[1:]] if batched and shape else None))

    results = [info(out, name, False) for out, (_, name) in dict(zip(outputs, wanted)).items() if out not in inputs]
    model = helper.make_model(helper.make_graph(nodes, "qfit_sensitivity",
                                                [info(name, tensor, True) for name, tensor in inputs.items()],
                                                results, [t for t in graph.initializer if t.name in used]),
                              opset_imports=list(switch.model.opset_import), ir_version=switch.model.ir_version)
    return model, outputs


def constant_nodes(graph: onnx.GraphProto) -> dict[str, onnx.NodeProto]:
    """Output name -> node, for the nodes whose inputs are initializers or such nodes' outputs (a
    switch is a graph input, so a switch's Where is none of them)."""
    known = {t.name for t in graph.initializer}
    found: dict[str, onnx.NodeProto] = {}
    for node in graph.node:
        if node.output and node.output[0] and all((not x) or x in known for x in node.input):
            for o in node.output:
                if o:
                    found[o] = node
                    known.add(o)
    return found


def _emit_shared(name: str, shared: dict[str, onnx.NodeProto], nodes: list[onnx.NodeProto],
                 emitted: set[str]) -> None:
    """Append the constant node making `name` (after those it reads) to `nodes`, once."""
    node = shared[name]
    if name in emitted:
        return
    emitted.update(o for o in node.output if o)
    for x in node.input:
        if x in shared:
            _emit_shared(x, shared, nodes, emitted)
    nodes.append(node)


@dataclass
class Cuts:
    """Where each layer's configurations start, and which tensors cross each start."""

    start_of: dict[str, int]               # layer row -> index of the first switch-model node it touches
    live: dict[int, list[str]]             # start -> data tensors made before it and read at or after it


def find_cuts(switch: SwitchModel, rows: list[str]) -> Cuts:
    """A layer starts at the Q/DQ pair of its first activation switch, or at the first node reading a
    switched weight; nothing before its start depends on its switches. The switch model's node
    order is topological (built from the QDQ model's)."""
    graph = switch.model.graph
    nodes = list(graph.node)
    index_of = {o: i for i, n in enumerate(nodes) for o in n.output if o}
    constant = {t.name for t in graph.initializer} | set(switch.switches)
    for node in nodes:
        if all((not x) or x in constant for x in node.input):
            constant.update(o for o in node.output if o)
    readers: dict[str, list[int]] = {}
    for i, node in enumerate(nodes):
        for x in node.input:
            readers.setdefault(x, []).append(i)
    first_touch = {}
    for i, node in enumerate(nodes):
        if not node.input or node.input[0] not in switch.switches:   # not a switch Where
            continue
        if node.output[0] in constant:   # a weight switch: its effect starts at the nodes reading the weight
            touched = readers.get(node.output[0], [i])
        else:                            # an activation switch: at its own Q/DQ pair
            touched = [i] + [index_of[x] for x in (node.input[1],) if x in index_of]
            touched += [index_of[x] for x in nodes[touched[-1]].input[:1] if x in index_of
                        and nodes[index_of[x]].op_type == "QuantizeLinear"]
        first_touch[node.input[0]] = min(touched)
    start_of = {row: min(first_touch[s] for s in switch.layer_switches[row]) for row in rows}
    last_read = {o.name: len(nodes) for o in graph.output}
    for name, where in readers.items():
        if name not in constant:
            last_read[name] = max(last_read.get(name, -1), max(where))
    made_at = {i.name: -1 for i in graph.input if i.name not in constant}
    made_at.update({o: i for o, i in index_of.items() if o not in constant})
    live = {start: sorted(t for t, made in made_at.items() if made < start <= last_read.get(t, -1))
            for start in set(start_of.values()) | {0}}
    return Cuts(start_of, live)


# ---- per-sample figures of one configuration against the float model ---------------------------

@dataclass
class OutputFigures:
    """Per-sample figures of one configuration's model output against the float output."""

    noise: np.ndarray                 # sum of squared differences, per sample
    sqnr_db: np.ndarray               # per-sample output SQNR, dB (capped as compare caps it)
    kl_nats: np.ndarray | None        # KL(float softmax || this softmax), per sample (classes only)
    predicted: np.ndarray | None      # argmax, per sample (classes only)


def output_figures(float_out: np.ndarray, out: np.ndarray, classification: bool) -> OutputFigures:
    n = float_out.shape[0]
    f, q = float_out.reshape(n, -1).astype(np.float64), out.reshape(n, -1).astype(np.float64)
    noise = np.sum((f - q) ** 2, axis=1)
    signal = np.sum(f ** 2, axis=1)
    sqnr = np.array([sqnr_from_sums(s, e) for s, e in zip(signal, noise)])
    if not classification:
        return OutputFigures(noise, sqnr, None, None)
    log_p = f - f.max(axis=1, keepdims=True)
    log_p -= np.log(np.exp(log_p).sum(axis=1, keepdims=True))
    log_q = q - q.max(axis=1, keepdims=True)
    log_q -= np.log(np.exp(log_q).sum(axis=1, keepdims=True))
    kl = np.sum(np.exp(log_p) * (log_p - log_q), axis=1)
    return OutputFigures(noise, sqnr, np.maximum(kl, 0.0), np.argmax(q, axis=1))


def mean_and_se(values: np.ndarray) -> tuple[float, float | None]:
    """Mean over samples and its standard error (sample standard deviation / sqrt(n))."""
    n = len(values)
    return float(np.mean(values)), (float(np.std(values, ddof=1) / np.sqrt(n)) if n > 1 else None)


# ---- points, only where the samples resolve them ----------------------------------------------

POINTS_P_VALUE = 0.05


def flips_resolved(worse: int, better: int) -> bool:
    """Exact two-sided sign test on the discordant samples (McNemar 1947, exact form): do the
    samples this configuration gets wrong and the reference right (`worse`) outnumber the reverse
    (`better`), or the other way round, beyond chance at 5 %? Under 6 discordant samples nothing is
    resolved, however they split."""
    trials = worse + better
    if trials == 0:
        return False
    return min(1.0, 2.0 * binomial_test_above(max(worse, better), trials, 0.5)) < POINTS_P_VALUE


def metric_keys(kind: str, labelled: bool) -> tuple[str | None, str]:
    """(key of the drop in points when only this layer is int8, key of the points saved when only
    it is float); for a score output (None, the output SQNR with only it float)."""
    if kind != "classification":
        return None, "output_sqnr_if_float_db"
    if labelled:
        return "sensitivity_pt", "float_recovery_pt"
    return "sensitivity_agreement_pt", "float_recovery_agreement_pt"


POINT_KEYS = ("sensitivity_pt", "float_recovery_pt", "sensitivity_agreement_pt", "float_recovery_agreement_pt")
# Every key a row of the sweep may carry (report.json's layers[]; docs/report.md and docs/repair.md).
ROW_KEYS = ("sensitivity_rank", "isolated_output_sample_sqnr_db", "isolated_output_sample_sqnr_se_db",
            "isolated_output_sqnr_db", "isolated_output_kl_mnats", "isolated_output_kl_se_mnats",
            "float_recovery_db", "float_recovery_se_db", "output_sqnr_if_float_db",
            "sqnr_isolated_db", "cosine_isolated", *POINT_KEYS)
RANK_KEY = "isolated_output_sample_sqnr_db"


# ---- the sweep ---------------------------------------------------------------------------------

# Nodes of configurations per sweep model: onnxruntime's session set-up grows faster than linearly
# with the graph (about 4 s at 26 000 nodes, under 0.1 s at 2 000), so the layers are cut into groups,
# one session each, handing the float and int8 models' tensors on from group to group.
GROUP_NODES = 2000


@dataclass
class Group:
    """One sweep model: the configurations of some layers and the float/int8 models they read from."""

    rows: list[int]                  # indices into the swept rows
    model: onnx.ModelProto
    names: dict[tuple[str, str], str]
    state_in: list[str]              # switch-model tensors it is fed (float and int8 versions)
    state_out: list[str]             # those it hands to the next group


def sweep_groups(switch: SwitchModel, rows: list[dict], out_name: str,
                 tensor_types: dict[str, tuple[int, list]]) -> list[Group]:
    """Per layer k "alone{k}" (only it int8, reading the float model at its start) and "kept{k}" (only
    it float, reading the int8 model), packed into groups of about GROUP_NODES nodes; each group
    also computes the float and int8 models ("float", "int8") from its state to the next group's,
    each layer's own tensor in float (for the isolated tensor error), and the last the int8 output."""
    everything = set(switch.switches)
    cuts = find_cuts(switch, [row["name"] for row in rows])
    order = sorted(range(len(rows)), key=lambda k: cuts.start_of[rows[k]["name"]])
    configurations: dict[int, list[Part]] = {}
    for k in order:
        live = set(cuts.live[cuts.start_of[rows[k]["name"]]])
        mine = set(switch.layer_switches[rows[k]["name"]])
        own = switch.value_of.get(rows[k]["tensor"], rows[k]["tensor"])
        configurations[k] = []
        for tag, source, on, outputs in ((f"alone{k}", "float", mine, [out_name, own]),
                                         (f"kept{k}", "int8", everything - mine, [out_name])):
            nodes = _needed_nodes(_fixed_nodes(switch, on), live, outputs)
            configurations[k].append(Part(tag, nodes, source, ({x for n in nodes for x in n.input} | set(outputs))
                                          & live))
    packed: list[list[int]] = [[]]
    for k in order:
        size = sum(len(part.nodes) for part in configurations[k])
        if packed[-1] and sum(len(p.nodes) for j in packed[-1] for p in configurations[j]) + size > GROUP_NODES:
            packed.append([])
        packed[-1].append(k)
    inputs = sorted({i.name for i in switch.model.graph.input} - everything)
    groups = []
    for g, members in enumerate(packed):
        state_in = inputs if g == 0 else cuts.live[cuts.start_of[rows[members[0]]["name"]]]
        last = g == len(packed) - 1
        state_out = [] if last else cuts.live[cuts.start_of[rows[packed[g + 1][0]]["name"]]]
        parts = [part for k in members for part in configurations[k]]
        own = [switch.value_of.get(rows[k]["tensor"], rows[k]["tensor"]) for k in members]
        wanted = [(part.tag, name) for k in members for part, names in zip(
            configurations[k], ([out_name, own[members.index(k)]], [out_name])) for name in names]
        wanted += [("float", name) for name in own]
        wanted += [(tag, name) for tag in ("float", "int8") for name in state_out]
        wanted += [("int8", out_name)] if last else []
        needs = {tag: {x for part in parts if part.source == tag for x in part.reads} | {n for t, n in wanted if t == tag}
                 for tag in ("float", "int8")}
        chains = [Part(tag, _needed_nodes(_fixed_nodes(switch, on), set(state_in), sorted(needs[tag])), None,
                       set(state_in)) for tag, on in (("float", set()), ("int8", everything))]
        model, names = sweep_graph(switch, chains + parts, wanted, tensor_types)
        groups.append(Group(members, model, dict(zip(wanted, names)), list(state_in), list(state_out)))
    return groups


# Bytes of the largest activation of a sweep batch: a sweep model holds many of them at once (the float
# and int8 tensors its configurations start from, and each configuration's own), so large inputs
# run in smaller batches. At 2 MiB the demo (96x96, 884 KiB at its widest) runs 2 samples a batch: its
# check peaked at 296-306 MiB, its calibration's peak, against 482 MiB at 16 MiB (16 samples a batch),
# in the same time; a model of digits' size still runs 16 at a time.
SWEEP_BATCH_BYTES = 2 << 20


def sweep_batch(batch_size: int, tensor_types: dict[str, tuple[int, list]]) -> int:
    """The batch size of the sweep: `batch_size`, or fewer samples where one float32 activation of the
    batch would exceed SWEEP_BATCH_BYTES."""
    largest = max((int(np.prod([d for d in shape[1:]])) * 4 for _, shape in tensor_types.values()
                   if shape and all(isinstance(d, int) and d > 0 for d in shape[1:])), default=0)
    return max(1, min(batch_size, SWEEP_BATCH_BYTES // largest)) if largest else batch_size


class SweepSession:
    """One sweep model's onnxruntime session (faithful path). Its memory arena is off: the sweep holds
    a session per group, and an arena keeps its session's largest working set for good (on MobileNetV2
    1.0 at 224x224 the sum reached 6.5 GB); without it each run returns its memory."""

    def __init__(self, model: onnx.ModelProto, batched: bool, threads: int = 0):
        options = session_options(True, threads)
        options.enable_cpu_mem_arena = False
        self.session = ort.InferenceSession((batch_free(model) if batched else model).SerializeToString(), options,
                                            providers=["CPUExecutionProvider"])
        self.inputs = [i.name for i in model.graph.input]
        self.outputs = [o.name for o in model.graph.output]
        self.batched = batched

    def __call__(self, state: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        if self.batched:
            return dict(zip(self.outputs, self.session.run(self.outputs, {n: state[n] for n in self.inputs})))
        count = len(state[self.inputs[0]])   # a graph that hard-codes its batch: sample by sample
        parts = [self.session.run(self.outputs, {n: state[n][i:i + 1] for n in self.inputs}) for i in range(count)]
        return {name: np.concatenate([p[j] for p in parts]) for j, name in enumerate(self.outputs)}


def _tensor_types(model: onnx.ModelProto) -> dict[str, tuple[int, list]]:
    inferred = onnx.shape_inference.infer_shapes(model).graph
    return {v.name: (v.type.tensor_type.elem_type,
                     [d.dim_value if d.HasField("dim_value") else d.dim_param for d in v.type.tensor_type.shape.dim]
                     if v.type.tensor_type.HasField("shape") else None)
            for v in list(inferred.value_info) + list(inferred.input) + list(inferred.output)}


def sweep(reference: LoadedModel, plan: Plan, quantized: QuantizedModel, layers: list[dict], data,
          batch_size: int, kind: str, samples_available: int | None = None, sample_cap: int = DEFAULT_SAMPLE_CAP,
          progress=None, threads: int = 0) -> dict:
    """Only-this-layer-int8 and only-this-layer-float for every layer, on `data` (a sample of at most
    `sample_cap` evaluation files), through the sweep models (see above); then `figures_of`.

    Returns {"rows": {layer: {...ROW_KEYS...}}, "ranking": [layer names, worst first], summary...}.
    """
    switch = build_switch_model(reference, plan, quantized, layers)
    output = reference.output_names[0]
    out_name = switch.value_of.get(output, output)
    active = [row for row in layers if switch.layer_switches.get(row["name"])]
    tensor_types = _tensor_types(switch.model)
    groups = sweep_groups(switch, active, out_name, tensor_types)
    batch_size = sweep_batch(batch_size, tensor_types)
    float_runner = Runner(reference.model, [output], batch_size=batch_size, threads=threads)
    batched = batch_size > 1 and float_runner.batched is not None
    runners = [SweepSession(group.model, batched, threads) for group in groups]
    float_outs, int8_outs = [], []
    outs = {k: ([], []) for k in range(len(active))}
    tensor_error = {row["name"]: ErrorSums() for row in active}
    labels: list | None = []
    samples = 0
    for batch in data.batches(batch_size):
        keep = len(batch.files) if sample_cap is None else min(len(batch.files), sample_cap - samples)
        if keep <= 0:
            break
        inputs = {k: v[:keep] for k, v in batch.inputs.items()}
        labels = None if labels is None or batch.labels is None else labels + list(batch.labels[:keep])
        samples += keep
        float_outs.append(float_runner(inputs)[output])
        int8_outs += _run_groups(inputs, groups, runners, switch, active, out_name, outs, tensor_error)
        if progress is not None:
            progress.update(keep)
    isolated = {row["name"]: np.concatenate(outs[k][0]) for k, row in enumerate(active)}
    kept_float = {row["name"]: np.concatenate(outs[k][1]) for k, row in enumerate(active)}
    rows, summary = figures_of(layers, np.concatenate(float_outs), np.concatenate(int8_outs), isolated, kept_float,
                               tensor_error, None if labels is None else np.asarray(labels), kind)
    summary.update(_sweep_notes(samples, samples_available, sample_cap, len(active), len(groups)))
    return {"rows": rows, **summary}


def _run_groups(inputs: dict[str, np.ndarray], groups: list, runners: list[SweepSession], switch: SwitchModel,
                active: list[dict], out_name: str, outs: dict, tensor_error: dict) -> list[np.ndarray]:
    """One batch through the sweep models in turn, each handing the float and int8 tensors crossing
    into the next group on; appends each configuration's output to `outs` and its own tensor's error
    to `tensor_error`. Returns the int8 model's output (in a list: only the group that ends the model has it)."""
    state = {f"{tag}@{name}": value for name, value in inputs.items() for tag in ("float", "int8")}
    int8_outs = []
    for group, runner in zip(groups, runners):
        got = {**state, **runner(state)}
        for k in group.rows:
            own = switch.value_of.get(active[k]["tensor"], active[k]["tensor"])
            outs[k][0].append(got[group.names[(f"alone{k}", out_name)]])
            outs[k][1].append(got[group.names[(f"kept{k}", out_name)]])
            tensor_error[active[k]["name"]].update(got[group.names[("float", own)]],
                                                   got[group.names[(f"alone{k}", own)]])
        state = {f"{tag}@{name}": got[group.names[(tag, name)]] for name in group.state_out
                 for tag in ("float", "int8")}
        if not group.state_out:
            int8_outs.append(got[group.names[("int8", out_name)]])
    return int8_outs


def _sweep_notes(samples: int, samples_available: int | None, sample_cap: int | None, layers_swept: int,
                 sweep_models: int) -> dict:
    """The summary keys that say what the sweep ran on and how."""
    return {
        "samples_used": samples,
        "samples_available": samples_available if samples_available is not None else samples,
        "sample_cap": sample_cap,
        "samples_note": (f"the default cap of {DEFAULT_SAMPLE_CAP} samples was chosen so that the ranking from two "
                         f"disjoint halves of the demo's evaluation folder agrees (Spearman rank correlation >= 0.9)"
                         if sample_cap == DEFAULT_SAMPLE_CAP else f"cap set to {sample_cap} samples "
                         f"(default {DEFAULT_SAMPLE_CAP}, chosen for a ranking that agrees between halves of the data)"),
        "layers_swept": layers_swept,
        "runs_per_sample": 1 + 2 * layers_swept,
        "sweep_models": sweep_models,
        "design": "each configuration a plain model with its switches fixed, run only from the first node its "
                  "layer's quantizers touch, reading the float or int8 model's tensors there; configurations "
                  "of neighbouring layers share one onnxruntime session",
    }


def figures_of(layers: list[dict], float_out: np.ndarray, int8_out: np.ndarray, isolated: dict, kept_float: dict,
               tensor_error: dict, labels: np.ndarray | None, kind: str) -> tuple[dict, dict]:
    """The rows (ROW_KEYS) and the section's summary from the outputs of each configuration."""
    classification = kind == "classification"
    labelled = classification and labels is not None
    samples = len(float_out)
    signal = float(np.sum(float_out.astype(np.float64) ** 2))
    int8 = output_figures(float_out, int8_out, classification)
    truth = float_predicted = None
    if classification:
        float_predicted = np.argmax(float_out.reshape(samples, -1), axis=1)
        truth = labels if labelled else float_predicted
    isolated_key, float_key = metric_keys(kind, labelled)
    rows, points = {}, {"isolated": {}, "float": {}}
    for row in layers:
        name = row["name"]
        entry = {key: None for key in ROW_KEYS if key not in POINT_KEYS or key in (isolated_key, float_key)}
        rows[name] = entry
        if name not in isolated:
            continue
        alone = output_figures(float_out, isolated[name], classification)
        kept = output_figures(float_out, kept_float[name], classification)
        _sqnr_figures(entry, alone, kept, int8, signal, tensor_error[name])
        if not classification:
            continue
        mean, se = mean_and_se(1000.0 * alone.kl_nats)
        entry["isolated_output_kl_mnats"], entry["isolated_output_kl_se_mnats"] = round(mean, 4), _r(se, 4)
        points["isolated"][name], points["float"][name] = _flip_points(alone, kept, int8, float_predicted, truth,
                                                                      samples)
    shown = {view: any(resolved for _, resolved in points[view].values()) for view in points}
    for view, key in (("isolated", isolated_key), ("float", float_key)):
        if classification and shown[view]:
            for name, (value, _) in points[view].items():
                rows[name][key] = round(value, 4)
    ranking = rank(layers, rows)
    for position, name in enumerate(ranking, 1):
        rows[name]["sensitivity_rank"] = position
    int8_drop = None
    if classification:
        int8_drop = 100.0 * (int(np.sum(float_predicted == truth)) - int(np.sum(int8.predicted == truth))) / samples
    summary = {
        "metric": ("top1_drop_pt" if labelled else "agreement_drop_pt") if classification else "output_sqnr_db",
        "ranked_by": f"{RANK_KEY}, lowest first: the model output's SQNR per sample, in dB, averaged over the "
                     f"samples, with only this layer int8 (ties: float_recovery_db, highest first)",
        "uncertainty": "_se_ keys: standard error of the mean over the samples",
        # the keys of the points columns; None where no layer's points are resolved by the samples
        "isolated_key": isolated_key if shown["isolated"] else None,
        "float_key": float_key if (not classification or shown["float"]) else None,
        "points_shown": shown,
        "points_resolution_pt": round(100.0 / samples, 4) if classification else None,
        "points_note": _points_note(samples, shown) if classification else None,
        "int8_drop_pt_on_samples": None if int8_drop is None else round(int8_drop, 4),
        "int8_output_sqnr_db_on_samples": round_db(sqnr_from_sums(signal, float(int8.noise.sum()))),
        "ranking": ranking,
        "row_keys": list(rows[ranking[0]]) if ranking else [],   # the keys this sweep put on each layer row
    }
    return rows, summary


def _sqnr_figures(entry: dict, alone, kept, int8, signal: float, own_error: ErrorSums) -> None:
    """A layer's SQNR figures: only it int8 (at the output and on its own tensor), only it float."""
    mean, se = mean_and_se(alone.sqnr_db)
    entry["isolated_output_sample_sqnr_db"], entry["isolated_output_sample_sqnr_se_db"] = round_db(mean), _r(se)
    entry["isolated_output_sqnr_db"] = round_db(sqnr_from_sums(signal, float(alone.noise.sum())))
    # per sample: how many dB keeping this layer float gains over the all-int8 output
    mean, se = mean_and_se(kept.sqnr_db - int8.sqnr_db)
    entry["float_recovery_db"], entry["float_recovery_se_db"] = round_db(mean), _r(se)
    entry["output_sqnr_if_float_db"] = round_db(sqnr_from_sums(signal, float(kept.noise.sum())))
    entry["sqnr_isolated_db"] = round_db(own_error.sqnr_db())
    entry["cosine_isolated"] = round(own_error.cosine(), 6)


def _flip_points(alone, kept, int8, float_predicted: np.ndarray, truth: np.ndarray,
                 samples: int) -> tuple[tuple, tuple]:
    """(only it int8, only it float): each (top-1 points lost, whether the flips are beyond chance)."""
    float_right, alone_right = float_predicted == truth, alone.predicted == truth
    int8_right, kept_right = int8.predicted == truth, kept.predicted == truth
    worse, better = int(np.sum(float_right & ~alone_right)), int(np.sum(~float_right & alone_right))
    saved, lost = int(np.sum(~int8_right & kept_right)), int(np.sum(int8_right & ~kept_right))
    return ((100.0 * (worse - better) / samples, flips_resolved(worse, better)),
            (100.0 * (saved - lost) / samples, flips_resolved(saved, lost)))


def _r(value: float | None, digits: int = 2) -> float | None:
    return None if value is None else round(value, digits)


def _points_note(samples: int, shown: dict) -> str:
    views = ", ".join(f"{'only it int8' if view == 'isolated' else 'only it float'}: "
                      f"{'shown' if shown[view] else 'not resolved, not shown'}" for view in ("isolated", "float"))
    return (f"{samples} samples: one flipped prediction is {100.0 / samples:.2f} pt. A points column is shown "
            f"only where some layer's flips are beyond chance (exact sign test, p < {POINTS_P_VALUE:g}); {views}")


def rank(layers: list[dict], rows: dict) -> list[str]:
    """Layer names, worst first: lowest RANK_KEY, then highest float_recovery_db, then network order."""
    swept = [row["name"] for row in layers if rows[row["name"]][RANK_KEY] is not None]
    order = {name: i for i, name in enumerate(swept)}
    return sorted(swept, key=lambda name: (rows[name][RANK_KEY], -(rows[name]["float_recovery_db"] or 0.0),
                                           order[name]))
