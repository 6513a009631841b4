"""sensitivity: what each layer's quantization costs on its own, and which layers to repair first.

Two views per layer (a row of the report's layer table: a node, its weights, its output quantizer):
  isolated            only this layer quantized, every other layer float: the error it causes itself
                      (`sqnr_isolated_db` on its output tensor, `isolated_output_sqnr_db` at the model
                      output) and the end-metric change (`sensitivity_pt`: top-1 drop in points);
  kept float          every other layer quantized, this one float: how much of the int8 drop goes
                      away (`float_recovery_pt`).
Without labels the end metric is argmax agreement with the float model (`..._agreement_pt` keys);
for score outputs only output SQNR exists (`output_sqnr_if_float_db`).

One session for every configuration: the QDQ model is rewritten into a *switch model*. Each
quantizer of the int8 model (an activation's QuantizeLinear/DequantizeLinear pair, one layer's
dequantized weights and bias) is followed by Where(switch, quantized value, float value), where
`switch` is a boolean scalar graph input. All switches on is the int8 model, all off the float model,
any subset any mix; so one onnxruntime session serves the 2 x layers configurations, and each batch
of samples is read once and run through all of them (memory: one batch). The sweep costs
O(layers x samples) inferences, so it runs on a seeded sample of at most `sample_cap` evaluation
files (reported as `samples_used`).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import onnx
import onnxruntime as ort
from onnx import TensorProto, helper, numpy_helper

from qfit.measure.compare import ErrorSums, round_db
from qfit.graph.load import LoadedModel
from qfit.graph.model import GraphIndex
from qfit.ops import QDQ_OPS
from qfit.quant.plan import Plan
from qfit.quant.quantize import QuantizedModel
from qfit.runtime.sessions import Runner, _options as session_options, batch_free, with_outputs

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
    qindex = GraphIndex(qgraph)
    producer = qindex.producer
    fresh = qindex.fresh_names()

    result = SwitchModel(model=onnx.ModelProto())
    wheres_after: dict[str, onnx.NodeProto] = {}   # dequantized activation name -> Where emitted after its DQ
    renamed_dq: dict[str, str] = {}
    activation_switch: dict[str, str] = {}
    for tensor in plan.activations:
        deq = quantized.dequantized.get(tensor)
        dq = producer(deq)
        if dq is None or dq.op_type != "DequantizeLinear":
            continue
        q = producer(dq.input[0])
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
                made = producer(name)
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

    def __init__(self, switch: SwitchModel, outputs: list[str], batch_size: int = 16):
        self.switches = list(switch.switches)
        self.outputs = list(outputs)
        extended = with_outputs(switch.model, self.outputs)
        self.session = ort.InferenceSession(extended.SerializeToString(), session_options(True),
                                            providers=["CPUExecutionProvider"])
        self.batched = None
        if batch_size > 1:
            try:
                candidate = ort.InferenceSession(batch_free(extended).SerializeToString(), session_options(True),
                                                 providers=["CPUExecutionProvider"])
                if self._batch_works(candidate):
                    self.batched = candidate
            except Exception:  # a graph that hard-codes its batch: run sample by sample
                self.batched = None

    def _feeds(self, inputs: dict[str, np.ndarray], on: set[str]) -> dict[str, np.ndarray]:
        feeds = dict(inputs)
        for s in self.switches:
            feeds[s] = np.array(s in on)
        return feeds

    def _batch_works(self, session: ort.InferenceSession) -> bool:
        data_inputs = [i for i in self.session.get_inputs() if i.name not in set(self.switches)]
        feeds = {}
        for inp in data_inputs:
            shape = [d if isinstance(d, int) else 1 for d in inp.shape]
            feeds[inp.name] = np.zeros([2] + shape[1:], np.float32)
        try:
            got = session.run(self.outputs, self._feeds(feeds, set()))
            single = self.session.run(self.outputs, self._feeds({k: v[:1] for k, v in feeds.items()}, set()))
        except Exception:
            return False
        return all(g.shape[:1] == (2,) and g.shape[1:] == s.shape[1:] and s.shape[:1] == (1,)
                   for g, s in zip(got, single))

    def __call__(self, inputs: dict[str, np.ndarray], on: set[str]) -> dict[str, np.ndarray]:
        n = next(iter(inputs.values())).shape[0]
        if n == 1 or self.batched is not None:
            session = self.session if n == 1 else self.batched
            return dict(zip(self.outputs, session.run(self.outputs, self._feeds(inputs, on))))
        parts = [self.session.run(self.outputs, self._feeds({k: v[i:i + 1] for k, v in inputs.items()}, on))
                 for i in range(n)]
        return {name: np.concatenate([p[j] for p in parts], axis=0) for j, name in enumerate(self.outputs)}


class Outcome:
    """End-metric tallies of one configuration against the float model, over the same samples."""

    def __init__(self):
        self.output = ErrorSums()
        self.correct = 0
        self.agree = 0
        self.samples = 0

    def update(self, float_out: np.ndarray, out: np.ndarray, labels: np.ndarray | None, classification: bool):
        self.output.update(float_out, out)
        n = float_out.shape[0]
        self.samples += n
        if classification:
            predicted = np.argmax(out.reshape(n, -1), axis=1)
            self.agree += int(np.sum(predicted == np.argmax(float_out.reshape(n, -1), axis=1)))
            if labels is not None:
                self.correct += int(np.sum(predicted == labels))

    def drop_pt(self, float_correct: int, labelled: bool) -> float:
        """Top-1 drop vs float in points (labels), else disagreement with float in points."""
        if not self.samples:
            return 0.0
        if labelled:
            return 100.0 * (float_correct - self.correct) / self.samples
        return 100.0 * (self.samples - self.agree) / self.samples


def metric_keys(kind: str, labelled: bool) -> tuple[str | None, str]:
    """(key of the drop when only this layer is int8, key of the effect of keeping it float)."""
    if kind != "classification":
        return None, "output_sqnr_if_float_db"
    if labelled:
        return "sensitivity_pt", "float_recovery_pt"
    return "sensitivity_agreement_pt", "float_recovery_agreement_pt"


def sweep(reference: LoadedModel, plan: Plan, quantized: QuantizedModel, layers: list[dict], data,
          batch_size: int, kind: str, samples_available: int | None = None, sample_cap: int = DEFAULT_SAMPLE_CAP,
          progress=None) -> dict:
    """The isolated and kept-float sweep over `data` (already limited to the sample cap).

    Returns {"rows": {layer: {...report keys...}}, "ranking": [layer names, worst first], summary...}.
    """
    switch = build_switch_model(reference, plan, quantized, layers)
    output = reference.output_names[0]
    active = [row for row in layers if switch.layer_switches.get(row["name"])]
    tensors = list(dict.fromkeys([row["tensor"] for row in active] + [output]))
    names = [switch.value_of.get(t, t) for t in tensors]
    float_runner = Runner(reference.model, tensors, batch_size=batch_size)
    runner = SwitchRunner(switch, names, batch_size)
    classification = kind == "classification"
    everything = set(switch.switches)
    int8_outcome = Outcome()
    only = {row["name"]: Outcome() for row in active}
    without = {row["name"]: Outcome() for row in active}
    tensor_error = {row["name"]: ErrorSums() for row in active}
    float_correct = 0
    labelled = None
    out_name = switch.value_of.get(output, output)
    samples = 0
    for batch in data.batches(batch_size):
        if sample_cap is not None and samples >= sample_cap:
            break
        inputs, labels = batch.inputs, batch.labels
        n = next(iter(inputs.values())).shape[0]
        if sample_cap is not None and samples + n > sample_cap:
            keep = sample_cap - samples
            inputs = {k: v[:keep] for k, v in inputs.items()}
            labels = None if labels is None else labels[:keep]
            n = keep
        samples += n
        labelled = labels is not None if labelled is None else labelled and labels is not None
        reference_values = float_runner(inputs)
        f_out = reference_values[output]
        if classification and labels is not None:
            float_correct += int(np.sum(np.argmax(f_out.reshape(n, -1), axis=1) == labels))
        got = runner(inputs, everything)
        int8_outcome.update(f_out, got[out_name], labels, classification)
        for row in active:
            mine = set(switch.layer_switches[row["name"]])
            got = runner(inputs, mine)
            tensor = row["tensor"]
            tensor_error[row["name"]].update(reference_values[tensor], got[switch.value_of.get(tensor, tensor)])
            only[row["name"]].update(f_out, got[out_name], labels, classification)
            got = runner(inputs, everything - mine)
            without[row["name"]].update(f_out, got[out_name], labels, classification)
        if progress is not None:
            progress.update(n)
    labelled = bool(labelled)
    isolated_key, float_key = metric_keys(kind, labelled)
    int8_drop = int8_outcome.drop_pt(float_correct, labelled) if classification else None
    rows: dict[str, dict] = {}
    for row in layers:
        name = row["name"]
        entry = {"sqnr_isolated_db": None, "cosine_isolated": None, "isolated_output_sqnr_db": None,
                 float_key: None, "sensitivity_rank": None}
        if isolated_key:
            entry[isolated_key] = None
        if name in only:
            entry["sqnr_isolated_db"] = round_db(tensor_error[name].sqnr_db())
            entry["cosine_isolated"] = round(tensor_error[name].cosine(), 6)
            entry["isolated_output_sqnr_db"] = round_db(only[name].output.sqnr_db())
            if classification:
                entry[isolated_key] = round(only[name].drop_pt(float_correct, labelled), 4)
                entry[float_key] = round(int8_drop - without[name].drop_pt(float_correct, labelled), 4)
            else:
                entry[float_key] = round_db(without[name].output.sqnr_db())
        rows[name] = entry

    def badness(row):
        entry = rows[row["name"]]
        damage = entry[isolated_key] if isolated_key else 0.0
        return (-damage, entry["isolated_output_sqnr_db"], layers.index(row))

    ranking = [row["name"] for row in sorted(active, key=badness)]
    for rank, name in enumerate(ranking, 1):
        rows[name]["sensitivity_rank"] = rank
    summary = {
        "samples_used": samples,
        "samples_available": samples_available if samples_available is not None else samples,
        "sample_cap": sample_cap,
        "metric": ("top1_drop_pt" if labelled else "agreement_drop_pt") if classification else "output_sqnr_db",
        "isolated_key": isolated_key,
        "float_key": float_key,
        "int8_drop_pt_on_samples": None if int8_drop is None else round(int8_drop, 4),
        "int8_output_sqnr_db_on_samples": round_db(int8_outcome.output.sqnr_db()),
        "layers_swept": len(active),
        "runs_per_sample": 1 + 2 * len(active),
        "ranking": ranking,
        "design": "one switch model (Where after every quantizer, boolean switch inputs), one session",
    }
    return {"rows": rows, **summary}
