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

from dataclasses import dataclass, field

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

from qfit.measure.compare import SQNR_CAP_DB, ErrorSums, binomial_test_above, round_db, sqnr_from_sums
from qfit.graph.load import LoadedModel
from qfit.ops import QDQ_OPS
from qfit.quant.plan import Plan
from qfit.quant.quantize import QuantizedModel
from qfit.runtime.sessions import Runner, batch_free, session_options

DEFAULT_SAMPLE_CAP = 64
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
    producer = {o: n for n in qgraph.node for o in n.output}
    taken = ({o for n in qgraph.node for o in n.output} | {i.name for i in qgraph.initializer}
             | {i.name for i in qgraph.input})

    def fresh(base: str) -> str:
        name, i = base, 1
        while name in taken:
            name, i = f"{base}_{i}", i + 1
        taken.add(name)
        return name

    result = SwitchModel(model=onnx.ModelProto())
    wheres_after: dict[str, onnx.NodeProto] = {}   # dequantized activation name -> Where emitted after its DQ
    renamed_dq: dict[str, str] = {}
    activation_switch: dict[str, str] = {}
    for tensor in plan.activations:
        deq = quantized.dequantized.get(tensor)
        dq = producer.get(deq)
        if dq is None or dq.op_type != "DequantizeLinear":
            continue
        q = producer.get(dq.input[0])
        if q is None or q.op_type != "QuantizeLinear":
            continue
        switch = fresh(f"{SWITCH_PREFIX}{len(result.switches)}")
        result.switches.append(switch)
        result.described[switch] = f"activation quantizer of {tensor}"
        activation_switch[tensor] = switch
        on_name = fresh(f"{deq}_switched")
        renamed_dq[deq] = on_name
        wheres_after[deq] = helper.make_node("Where", [switch, on_name, q.input[0]], [deq],
                                             name=fresh(f"{deq}_switch_Where"))

    reference_nodes = {n.name: n for n in reference.graph.node}
    weight_switch: dict[str, str] = {}
    float_inits: list[onnx.TensorProto] = []
    new_nodes: list[onnx.NodeProto] = []
    for node in qgraph.node:
        copy = onnx.NodeProto()
        copy.CopyFrom(node)
        if node.op_type == "DequantizeLinear" and node.output[0] in renamed_dq:
            copy.output[0] = renamed_dq[node.output[0]]
            new_nodes += [copy, wheres_after[node.output[0]]]
            continue
        ref = reference_nodes.get(node.name)
        if ref is not None and node.op_type not in QDQ_OPS and node.op_type == ref.op_type:
            for i, name in enumerate(node.input):
                key = (node.name, i)
                if key not in plan.weights and key not in plan.biases:
                    continue
                made = producer.get(name)
                if made is None or made.op_type != "DequantizeLinear":
                    continue
                if node.name not in weight_switch:
                    switch = fresh(f"{SWITCH_PREFIX}{len(result.switches)}")
                    result.switches.append(switch)
                    result.described[switch] = f"weights of {node.name}"
                    weight_switch[node.name] = switch
                if i < len(ref.input) and ref.input[i] in reference.constants:
                    float_value = reference.constants[ref.input[i]].astype(np.float32)
                else:  # a bias that only the int8 model has (added by bias correction): float has none
                    shape = [d.dim_value for d in next(
                        init for init in qgraph.initializer if init.name == made.input[0]).dims]
                    float_value = np.zeros(shape, np.float32)
                float_name = fresh(f"{name}_float")
                float_inits.append(numpy_helper.from_array(float_value, float_name))
                chosen = fresh(f"{name}_switched")
                new_nodes.append(helper.make_node("Where", [weight_switch[node.name], name, float_name], [chosen],
                                                  name=fresh(f"{chosen}_Where")))
                copy.input[i] = chosen
        new_nodes.append(copy)

    inputs = list(qgraph.input) + [helper.make_tensor_value_info(s, TensorProto.BOOL, []) for s in result.switches]
    graph = helper.make_graph(new_nodes, qgraph.name, inputs, list(qgraph.output),
                              list(qgraph.initializer) + float_inits)
    result.model = helper.make_model(graph, opset_imports=list(quantized.model.opset_import),
                                     ir_version=quantized.model.ir_version, producer_name="qfit")

    row_tensors = {row["tensor"] for row in layers}
    # A quantizer that no row owns (a graph input, or the output of a float layer read by an int8
    # one) belongs to every row that reads it.
    orphans = {t for t in activation_switch if t not in row_tensors}
    for row in layers:
        if row["name"] in plan.float_nodes:
            result.layer_switches[row["name"]] = []
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
        result.layer_switches[row["name"]] = switches
    result.value_of = {t: quantized.dequantized.get(t, t) for t in row_tensors | set(reference.output_names)}
    return result


class SwitchRunner:
    """One faithful (QDQ fusion off) session over a switch model; each call names the switches on."""

    def __init__(self, switch: SwitchModel, outputs: list[str], batch_size: int = 16, threads: int = 0):
        self.switches = list(switch.switches)
        self.outputs = list(outputs)
        self.runner = Runner(switch.model, self.outputs, faithful=True, batch_size=batch_size, threads=threads,
                             unbatched=self.switches)

    def __call__(self, inputs: dict[str, np.ndarray], on: set[str]) -> dict[str, np.ndarray]:
        return self.runner(inputs, {s: np.array(s in on) for s in self.switches})


# ---- configurations as plain models: a switch model with its switches fixed, cut at a layer ----------
#
# Running every configuration through the switch model costs about nine float passes each on the
# demo: every Q/DQ pair runs whether switched on or not, and weights read through Where are not
# constants, so onnxruntime can neither pre-pack them nor keep its blocked convolution layout. A
# configuration with its switches fixed is a plain model instead (each Where becomes an Identity of
# the chosen value; unused Q/DQ nodes are pruned), and it only needs to run from the first node its
# own switches touch: everything before is the float model's (only this layer int8) or the int8
# model's (only this layer float) and is fed from those two passes, which advance from layer to layer
# alongside the sweep.

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


def _cut_model(switch: SwitchModel, nodes: list[onnx.NodeProto], fed: dict[str, np.ndarray],
               outputs: list[str]) -> onnx.ModelProto:
    """The part of `nodes` that computes `outputs` from the tensors in `fed` (arrays whose dtype and
    per-sample shape the inputs take) and the initializers."""
    producer = {o: i for i, n in enumerate(nodes) for o in n.output if o}
    keep, seen, stack = set(), set(), list(outputs)
    while stack:
        name = stack.pop()
        if name in seen or name in fed or name not in producer:
            continue
        seen.add(name)
        index = producer[name]
        if index not in keep:
            keep.add(index)
            stack.extend(x for x in nodes[index].input if x)
    kept = [nodes[i] for i in sorted(keep)]
    used = {x for n in kept for x in n.input}
    graph = switch.model.graph
    inputs = [helper.make_tensor_value_info(name, helper.np_dtype_to_tensor_dtype(value.dtype),
                                            ["batch", *value.shape[1:]])
              for name, value in fed.items() if name in used]
    results = [helper.make_tensor_value_info(name, TensorProto.FLOAT, None) for name in outputs]
    initializers = [t for t in graph.initializer if t.name in used]
    return helper.make_model(helper.make_graph(kept, "qfit_configuration", inputs, results, initializers),
                             opset_imports=list(switch.model.opset_import), ir_version=switch.model.ir_version)


@dataclass
class Cuts:
    """Where each layer's configurations start, and which tensors cross each start."""

    start_of: dict[str, int]               # layer row -> index of the first node its switches touch
    live: dict[int, list[str]]             # start index -> data tensors made before it and read from it on


def find_cuts(switch: SwitchModel, rows: list[str]) -> Cuts:
    """A layer's start is its first Where, or the Q/DQ pair feeding it, or the first node reading a
    switched weight. Everything before the start is untouched by the layer's switches."""
    graph = switch.model.graph
    nodes = list(graph.node)
    index_of = {o: i for i, n in enumerate(nodes) for o in n.output if o}
    constant = {t.name for t in graph.initializer} | set(switch.switches)
    for node in nodes:
        if all((not x) or x in constant for x in node.input):
            constant.update(o for o in node.output if o)
    where_of = {}  # switch -> indices of the nodes that start its effect
    for i, node in enumerate(nodes):
        if not node.input or node.input[0] not in switch.switches:   # the switch Where nodes
            continue
        if node.output[0] in constant:   # a weight switch: it starts at the nodes reading the weight
            starts = [j for j, n in enumerate(nodes) if node.output[0] in n.input]
        else:  # an activation switch: it starts at its own Q/DQ pair
            starts = [i]
            dq = index_of.get(node.input[1])
            if dq is not None:
                starts.append(dq)
                q = index_of.get(nodes[dq].input[0])
                if q is not None and nodes[q].op_type == "QuantizeLinear":
                    starts.append(q)
        where_of.setdefault(node.input[0], []).extend(starts)
    start_of = {row: min(i for s in switch.layer_switches[row] for i in where_of[s]) for row in rows}
    last_read: dict[str, int] = {o.name: len(nodes) for o in graph.output}
    for i, node in enumerate(nodes):
        for x in node.input:
            if x and x not in constant:
                last_read[x] = max(last_read.get(x, -1), i)
    made_at = {name: -1 for name in (i.name for i in graph.input) if name not in constant}
    made_at.update({o: i for o, i in index_of.items() if o not in constant})
    live = {start: sorted(t for t, made in made_at.items() if made < start and last_read.get(t, -1) >= start)
            for start in set(start_of.values())}
    return Cuts(start_of, live)


class CutRunner:
    """Runs one cut model over arrays of many samples, in batches when the model allows it."""

    def __init__(self, model: onnx.ModelProto, batch_size: int, batched: bool, threads: int = 0):
        self.outputs = [o.name for o in model.graph.output]
        self.inputs = [i.name for i in model.graph.input]
        self.batch_size = batch_size if batched else 1
        serial = (batch_free(model) if batched else _batch_one(model)).SerializeToString()
        self.session = ort.InferenceSession(serial, session_options(True, threads),
                                            providers=["CPUExecutionProvider"])

    def __call__(self, values: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        count = len(next(iter(values.values())))
        parts = []
        for begin in range(0, count, self.batch_size):
            feeds = {name: values[name][begin:begin + self.batch_size] for name in self.inputs}
            parts.append(self.session.run(self.outputs, feeds))
        return {name: np.concatenate([p[k] for p in parts]) for k, name in enumerate(self.outputs)}


def _batch_one(model: onnx.ModelProto) -> onnx.ModelProto:
    copy = onnx.ModelProto()
    copy.CopyFrom(model)
    for vi in copy.graph.input:
        dims = vi.type.tensor_type.shape.dim
        if len(dims):
            dims[0].ClearField("dim_param")
            dims[0].dim_value = 1
    return copy


# ---- per-sample figures of one configuration against the float model ---------------------------

@dataclass
class OutputFigures:
    """Per-sample figures of one configuration's model output against the float output."""

    noise: np.ndarray                 # sum of squared differences, per sample
    kl_nats: np.ndarray | None        # KL(float softmax || this softmax), per sample (classes only)
    predicted: np.ndarray | None      # argmax, per sample (classes only)


def output_figures(float_out: np.ndarray, out: np.ndarray, classification: bool) -> OutputFigures:
    n = float_out.shape[0]
    f, q = float_out.reshape(n, -1).astype(np.float64), out.reshape(n, -1).astype(np.float64)
    noise = np.sum((f - q) ** 2, axis=1)
    if not classification:
        return OutputFigures(noise, None, None)
    log_p = f - f.max(axis=1, keepdims=True)
    log_p -= np.log(np.exp(log_p).sum(axis=1, keepdims=True))
    log_q = q - q.max(axis=1, keepdims=True)
    log_q -= np.log(np.exp(log_q).sum(axis=1, keepdims=True))
    kl = np.sum(np.exp(log_p) * (log_p - log_q), axis=1)
    return OutputFigures(noise, np.maximum(kl, 0.0), np.argmax(q, axis=1))


# ---- uncertainty: a bootstrap over samples ---------------------------------------------------------

BOOTSTRAP_RESAMPLES = 1000


def bootstrap_weights(samples: int, seed: int = 0) -> np.ndarray:
    """(resamples, samples) counts: how often each sample is drawn in each bootstrap resample
    (Efron & Tibshirani, An Introduction to the Bootstrap, 1993: resample the samples with
    replacement, recompute the figure, read its spread)."""
    rng = np.random.default_rng(seed)
    draws = rng.integers(0, samples, size=(BOOTSTRAP_RESAMPLES, samples))
    weights = np.zeros((BOOTSTRAP_RESAMPLES, samples))
    np.add.at(weights, (np.repeat(np.arange(BOOTSTRAP_RESAMPLES), samples), draws.ravel()), 1.0)
    return weights


def sqnr_db_of(signal: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """10 log10(signal / noise) elementwise, +inf for zero noise (capped for arithmetic)."""
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(np.maximum(signal, 1e-300) / np.maximum(noise, 1e-300))


def _interval(replicates: np.ndarray) -> tuple[float, list[float]]:
    """Standard error and 95 % percentile interval of bootstrap replicates."""
    return float(np.std(replicates)), [float(np.percentile(replicates, 2.5)), float(np.percentile(replicates, 97.5))]


# ---- points, only where the samples resolve them ----------------------------------------------

POINTS_P_VALUE = 0.05


def flips_resolved(worse: int, better: int) -> bool:
    """Exact two-sided sign test on the discordant samples (McNemar 1947, exact form): do the
    samples this configuration gets wrong and the float model right (`worse`) outnumber the reverse
    (`better`), or the other way round, beyond chance at 5 %? With fewer than 6 discordant samples
    nothing is resolved, whatever the split."""
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


# Every key a row of the sweep may carry (report.json's layers[]; docs/report.md and docs/repair.md).
ROW_KEYS = ("sqnr_isolated_db", "cosine_isolated", "isolated_output_sqnr_db", "isolated_output_sqnr_se_db",
            "isolated_output_sqnr_ci95_db", "isolated_output_kl_mnats", "isolated_output_kl_se_mnats",
            "output_sqnr_if_float_db", "float_recovery_db", "float_recovery_se_db", "float_recovery_ci95_db",
            "sensitivity_pt", "float_recovery_pt", "sensitivity_agreement_pt", "float_recovery_agreement_pt",
            "sensitivity_rank")


# ---- the sweep ---------------------------------------------------------------------------------

def _read_samples(data, batch_size: int, cap: int | None) -> tuple[dict[str, np.ndarray], np.ndarray | None]:
    """The swept samples in memory (the sweep runs on a small sample: the cap)."""
    parts: list[dict[str, np.ndarray]] = []
    labels: list[np.ndarray] | None = []
    count = 0
    for batch in data.batches(batch_size):
        if cap is not None and count >= cap:
            break
        keep = len(batch.files) if cap is None else min(len(batch.files), cap - count)
        parts.append({k: v[:keep] for k, v in batch.inputs.items()})
        labels = None if labels is None or batch.labels is None else labels + [np.asarray(batch.labels)[:keep]]
        count += keep
    inputs = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    return inputs, (None if labels is None else np.concatenate(labels))


class Configurations:
    """Runs fixed-switch configurations of one switch model from a cut, fed the tensors crossing it."""

    def __init__(self, switch: SwitchModel, batch_size: int, batched: bool, threads: int):
        self.switch, self.batch_size, self.batched, self.threads = switch, batch_size, batched, threads
        self.sessions_built = 0

    def compute(self, on: set[str], state: dict[str, np.ndarray], names: list[str]) -> dict[str, np.ndarray]:
        """Values of `names` in the configuration with switches `on`, given the tensors in `state`."""
        wanted = [name for name in dict.fromkeys(names) if name not in state]
        values = {name: state[name] for name in names if name in state}
        if wanted:
            model = _cut_model(self.switch, _fixed_nodes(self.switch, on), state, wanted)
            self.sessions_built += 1
            values.update(CutRunner(model, self.batch_size, self.batched, self.threads)(state))
        return values


def sweep(reference: LoadedModel, plan: Plan, quantized: QuantizedModel, layers: list[dict], data,
          batch_size: int, kind: str, samples_available: int | None = None, sample_cap: int = DEFAULT_SAMPLE_CAP,
          progress=None, threads: int = 0) -> dict:
    """Only-this-layer-int8 and only-this-layer-float, for every layer, on `data` (a sample of at most
    `sample_cap` evaluation files). This function runs ~60 lines of steps in order: the passes, then
    the figures (`figures_of`) and the ranking (`rank`).

    Returns {"rows": {layer: {...ROW_KEYS...}}, "ranking": [layer names, worst first], summary...}.
    """
    switch = build_switch_model(reference, plan, quantized, layers)
    output = reference.output_names[0]
    out_name = switch.value_of.get(output, output)
    active = [row for row in layers if switch.layer_switches.get(row["name"])]
    inputs, labels = _read_samples(data, batch_size, sample_cap)
    samples = len(next(iter(inputs.values())))
    float_runner = Runner(reference.model, [output], batch_size=batch_size, threads=threads)
    float_out = np.concatenate([float_runner({k: v[i:i + batch_size] for k, v in inputs.items()})[output]
                                for i in range(0, samples, batch_size)])
    runs = Configurations(switch, batch_size, batch_size > 1 and float_runner.batched is not None, threads)
    everything = set(switch.switches)
    cuts = find_cuts(switch, [row["name"] for row in active])
    state = {"float": dict(inputs), "int8": dict(inputs)}
    isolated, kept_float, tensor_error = {}, {}, {}
    steps = sorted(set(cuts.start_of.values()))
    done = 0
    for step, start in enumerate(steps):
        live = cuts.live[start]
        # advance the float and the int8 model to this cut (from the previous one)
        state = {"float": runs.compute(set(), state["float"], live),
                 "int8": runs.compute(everything, state["int8"], live)}
        here = [row for row in active if cuts.start_of[row["name"]] == start]
        own = [switch.value_of.get(row["tensor"], row["tensor"]) for row in here]
        reference_values = runs.compute(set(), state["float"], own)
        for row, tensor in zip(here, own):
            mine = set(switch.layer_switches[row["name"]])
            got = runs.compute(mine, state["float"], [out_name, tensor])
            isolated[row["name"]] = got[out_name]
            tensor_error[row["name"]] = ErrorSums()
            tensor_error[row["name"]].update(reference_values[tensor], got[tensor])
            kept_float[row["name"]] = runs.compute(everything - mine, state["int8"], [out_name])[out_name]
        if progress is not None:
            now = samples * (step + 1) // len(steps)
            progress.update(now - done)
            done = now
    int8_out = runs.compute(everything, state["int8"], [out_name])[out_name]
    rows, summary = figures_of(layers, float_out, int8_out, isolated, kept_float, tensor_error, labels, kind)
    summary.update({
        "samples_used": samples,
        "samples_available": samples_available if samples_available is not None else samples,
        "sample_cap": sample_cap,
        "layers_swept": len(active),
        "runs_per_sample": 1 + 2 * len(active),
        "sessions_built": runs.sessions_built,
        "design": "each configuration a plain model with its switches fixed, run from the first node its "
                  "layer's quantizers touch, fed from float and int8 passes that advance layer by layer",
    })
    return {"rows": rows, **summary}


def _capped_db(signal: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """SQNR of bootstrap replicates, capped as qfit.measure.compare caps a single figure."""
    return np.clip(sqnr_db_of(signal, noise), -SQNR_CAP_DB, SQNR_CAP_DB)


def figures_of(layers: list[dict], float_out: np.ndarray, int8_out: np.ndarray, isolated: dict, kept_float: dict,
               tensor_error: dict, labels: np.ndarray | None, kind: str) -> tuple[dict, dict]:
    """The rows (ROW_KEYS) and the section's summary from the per-sample outputs of each configuration."""
    classification = kind == "classification"
    labelled = classification and labels is not None
    samples = len(float_out)
    signal = np.sum(float_out.reshape(samples, -1).astype(np.float64) ** 2, axis=1)
    weights = bootstrap_weights(samples)
    resampled_signal = weights @ signal
    int8 = output_figures(float_out, int8_out, classification)
    int8_db = sqnr_from_sums(float(signal.sum()), float(int8.noise.sum()))
    int8_replicates = _capped_db(resampled_signal, weights @ int8.noise)
    truth = None
    if classification:
        float_predicted = np.argmax(float_out.reshape(samples, -1), axis=1)
        truth = labels if labelled else float_predicted
    isolated_key, float_key = metric_keys(kind, labelled)
    rows, points = {}, {"isolated": {}, "float": {}}
    for row in layers:
        name = row["name"]
        entry = {key: None for key in ROW_KEYS}
        rows[name] = entry
        if name not in isolated:
            continue
        alone = output_figures(float_out, isolated[name], classification)
        kept = output_figures(float_out, kept_float[name], classification)
        entry["sqnr_isolated_db"] = round_db(tensor_error[name].sqnr_db())
        entry["cosine_isolated"] = round(tensor_error[name].cosine(), 6)
        entry["isolated_output_sqnr_db"] = round_db(sqnr_from_sums(float(signal.sum()), float(alone.noise.sum())))
        se, ci = _interval(_capped_db(resampled_signal, weights @ alone.noise))
        entry["isolated_output_sqnr_se_db"], entry["isolated_output_sqnr_ci95_db"] = round_db(se), [round_db(v) for v in ci]
        kept_db = sqnr_from_sums(float(signal.sum()), float(kept.noise.sum()))
        entry["output_sqnr_if_float_db"] = round_db(kept_db)
        entry["float_recovery_db"] = round_db(kept_db - int8_db)
        se, ci = _interval(_capped_db(resampled_signal, weights @ kept.noise) - int8_replicates)
        entry["float_recovery_se_db"], entry["float_recovery_ci95_db"] = round_db(se), [round_db(v) for v in ci]
        if not classification:
            continue
        entry["isolated_output_kl_mnats"] = round(1000.0 * float(alone.kl_nats.mean()), 4)
        entry["isolated_output_kl_se_mnats"] = round(1000.0 * float(alone.kl_nats.std(ddof=1)) / np.sqrt(samples), 4) \
            if samples > 1 else None
        float_right, alone_right = float_predicted == truth, alone.predicted == truth
        int8_right, kept_right = int8.predicted == truth, kept.predicted == truth
        worse, better = int(np.sum(float_right & ~alone_right)), int(np.sum(~float_right & alone_right))
        points["isolated"][name] = (100.0 * (worse - better) / samples, flips_resolved(worse, better))
        saved, lost = int(np.sum(~int8_right & kept_right)), int(np.sum(int8_right & ~kept_right))
        points["float"][name] = (100.0 * (saved - lost) / samples, flips_resolved(saved, lost))
    shown = {view: any(resolved for _, resolved in points[view].values()) for view in points}
    for view, key in (("isolated", isolated_key), ("float", float_key)):
        if key is not None and shown[view]:
            for name, (value, _) in points[view].items():
                rows[name][key] = round(value, 4)
    for name, entry in rows.items():  # only the keys of this kind of output
        for key in ("sensitivity_pt", "float_recovery_pt", "sensitivity_agreement_pt", "float_recovery_agreement_pt"):
            if key not in (isolated_key, float_key):
                del entry[key]
    int8_drop = None
    if classification:
        int8_drop = 100.0 * (int(np.sum(float_predicted == truth)) - int(np.sum(int8.predicted == truth))) / samples
    ranking = rank(layers, rows)
    for position, name in enumerate(ranking, 1):
        rows[name]["sensitivity_rank"] = position
    resolution = 100.0 / samples
    summary = {
        "metric": ("top1_drop_pt" if labelled else "agreement_drop_pt") if classification else "output_sqnr_db",
        "ranked_by": RANKED_BY,
        "uncertainty": f"bootstrap over the samples ({BOOTSTRAP_RESAMPLES} resamples): standard error (_se_) and "
                       f"95 % percentile interval (_ci95_); KL: standard error of the mean",
        # the keys of the points columns, or None where the samples do not resolve any layer's points
        "isolated_key": isolated_key if shown["isolated"] else None,
        "float_key": (float_key if shown["float"] or shown["isolated"] else "output_sqnr_if_float_db")
        if classification else float_key,
        "points_shown": shown if classification else {"isolated": False, "float": False},
        "points_resolution_pt": round(resolution, 4) if classification else None,
        "points_note": None if not classification else (
            f"one sample is {resolution:.2f} pt; a points figure is shown only where some layer's flips are "
            f"beyond chance (exact sign test on the discordant samples, p < {POINTS_P_VALUE:g}): "
            + ", ".join(f"{view} {'shown' if shown[view] else 'not resolved'}" for view in ("isolated", "float"))),
        "int8_drop_pt_on_samples": None if int8_drop is None else round(int8_drop, 4),
        "int8_output_sqnr_db_on_samples": round_db(int8_db),
        "ranking": ranking,
    }
    return rows, summary


RANKED_BY = ("isolated_output_sqnr_db, lowest first (the model output's SQNR when only this layer is int8); "
             "ties by float_recovery_db, highest first")


def rank(layers: list[dict], rows: dict) -> list[str]:
    """Layer names, worst first, by the continuous figures (see RANKED_BY)."""
    swept = [row["name"] for row in layers if rows[row["name"]]["isolated_output_sqnr_db"] is not None]
    order = {name: i for i, name in enumerate(swept)}
    return sorted(swept, key=lambda name: (rows[name]["isolated_output_sqnr_db"],
                                           -(rows[name]["float_recovery_db"] or 0.0), order[name]))
