"""repair: try fixes for the layers that lose the accuracy, and keep the cheapest that reach the target.

Candidate repairs, per layer, for the most sensitive layers (qfit.sensitivity's ranking):
  method:<m>          another calibration method for the layer's output quantizer (minmax, percentile,
                      mse, entropy); all four come from the one calibration pass, and cost no bytes
  int16_activations   the layer's output stored as int16 (ONNX QDQ int16, opset 21)
  keep_float          the layer (and a ReLU fused into it) runs in float32

Greedy search: from the all-int8 plan, every candidate is applied on top of the choices made so far
and the QDQ model is rebuilt from the edited PlanOptions. Candidates are first screened on the samples
a change can flip: those the current int8 model gets wrong plus the lowest-margin others (a one-layer
change rarely flips a confident prediction). The best-scoring few are then measured on all search
samples (faithful onnxruntime path, as every int8 figure), and the one that removes the most drop per
byte (extra flash + extra SRAM, from qfit.budget on the edited plan) is accepted. A step that would
put flash or SRAM over its limit is never accepted. The search stops when the drop is within the
target, when no candidate lowers it, or at the step limit, and says which. The log holds only full
measurements; the pipeline then measures the written model on the whole evaluation set.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Callable

import numpy as np

from qfit.graph.load import TARGET_OPSET, LoadedModel
from qfit.memory import budget
from qfit.quant.plan import METHODS, Plan, PlanOptions
from qfit.quant.quantize import QuantizedModel, Quantizer
from qfit.runtime.sessions import Runner
from qfit.sizes import format_size

DEFAULT_LAYERS_TRIED = 8
DEFAULT_MAX_STEPS = 12
DEFAULT_SEARCH_SAMPLES = 1000
KEEP_FLOAT, INT16 = "keep_float", "int16_activations"
BENEFIT_EPSILON_PT = 1e-9
DEFAULT_SCREEN_EXTRA = 64        # lowest-margin samples screened besides the ones already lost
DEFAULT_VERIFIED_PER_STEP = 3    # best-screened candidates measured on every search sample


# ---- byte costs ------------------------------------------------------------------------------------

class ByteCounter:
    """Flash total and SRAM peak of a plan, from qfit.memory.budget, cached per precision choice, so
    the budget of a plan is analysed once (`record` adds a plan the pipeline analysed in full)."""

    def __init__(self, loaded: LoadedModel, budget_options: budget.BudgetOptions):
        self.loaded = loaded
        self.options = replace(budget_options, what_if=False)
        self._cache: dict[tuple, tuple[int, int]] = {}

    def record(self, plan: Plan, result: budget.BudgetResult) -> None:
        self._cache[self.key(plan)] = (int(result.flash["total_bytes"]), int(result.sram["peak_bytes"]))

    @staticmethod
    def key(plan: Plan) -> tuple:
        return (tuple(sorted(plan.float_nodes)),
                tuple(sorted((t, q.bits, q.shared_from or "") for t, q in plan.activations.items())),
                tuple(sorted(plan.fused)))

    def __call__(self, plan: Plan) -> tuple[int, int]:
        key = self.key(plan)
        if key not in self._cache:
            result = budget.analyze(self.loaded, plan, self.options)
            self._cache[key] = (int(result.flash["total_bytes"]), int(result.sram["peak_bytes"]))
        return self._cache[key]


# ---- candidates ------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Candidate:
    layer: str
    action: str            # "method:<m>" | "int16_activations" | "keep_float"
    tensor: str | None     # the activation the action applies to (None for keep_float)
    nodes: tuple[str, ...] = ()  # nodes made float by keep_float (the layer and a fused ReLU)

    def apply(self, options: PlanOptions) -> PlanOptions:
        if self.action == KEEP_FLOAT:
            return replace(options, float_nodes=frozenset(options.float_nodes | set(self.nodes)))
        if self.action == INT16:
            return replace(options, activation_bits={**options.activation_bits, self.tensor: 16})
        method = self.action.split(":", 1)[1]
        return replace(options, activation_methods={**options.activation_methods, self.tensor: method})

    def describe(self) -> str:
        if self.action == KEEP_FLOAT:
            return "keep float"
        if self.action == INT16:
            return "int16 activations"
        return f"calibrate with {self.action.split(':', 1)[1]}"


def layer_nodes(loaded: LoadedModel, plan: Plan, row: dict) -> tuple[str, ...]:
    """The node of a layer row plus the ReLU/ReLU6 node whose output the row measures (fused)."""
    nodes = [row["name"]]
    if row["tensor"] in plan.fused.values():
        clamp = next((n.name for n in loaded.graph.node if n.output and n.output[0] == row["tensor"]), None)
        if clamp and clamp != row["name"]:
            nodes.append(clamp)
    return tuple(nodes)


def owned_tensors(loaded: LoadedModel, plan: Plan, row: dict) -> list[str]:
    """Activation quantizers a layer row owns: its output, and inputs that no int8 layer produces
    (a graph input, the output of a float layer) — the same ownership as qfit.sensitivity's switches."""
    tensors = [row["tensor"]]
    node = next((n for n in loaded.graph.node if n.name == row["name"]), None)
    producers = {o: n.name for n in loaded.graph.node for o in n.output}
    for name in (node.input if node is not None else []):
        if name in plan.activations and name not in tensors and (
                name not in producers or producers[name] in plan.float_nodes):
            tensors.append(name)
    return tensors


def candidates_for(loaded: LoadedModel, plan: Plan, row: dict, run_method: str,
                   methods: tuple[str, ...] = METHODS) -> list[Candidate]:
    if row["name"] in plan.float_nodes:
        return []
    out = []
    for tensor in owned_tensors(loaded, plan, row):
        q = plan.activations.get(tensor)
        if q is None:
            continue
        if q.shared_from is None:
            current = q.method or run_method
            out += [Candidate(row["name"], f"method:{m}", tensor) for m in methods if m != current]
        if q.bits == 8 and _int16_available(loaded):
            out.append(Candidate(row["name"], INT16, tensor))
    out.append(Candidate(row["name"], KEEP_FLOAT, None, layer_nodes(loaded, plan, row)))
    return out


def _int16_available(loaded: LoadedModel) -> bool:
    for imp in loaded.model.opset_import:
        if imp.domain in ("", "ai.onnx"):
            return imp.version >= TARGET_OPSET
    return False


def fallback_costs(builder: Quantizer, base: PlanOptions, layers: list[dict], counter: ByteCounter) -> dict:
    """Per layer row: extra flash and SRAM bytes of keeping it float / storing its output as int16,
    each against the all-int8 plan (None where the repair does not apply)."""
    base_plan = builder.plan(base)
    base_flash, base_sram = counter(base_plan)
    costs = {}
    for row in layers:
        entry = {"float": None, "int16": None}
        if row["name"] not in base_plan.float_nodes:
            for cand in candidates_for(builder.loaded, base_plan, row, builder.method, methods=()):
                if cand.action == INT16 and cand.tensor != row["tensor"]:
                    continue  # the table prices the layer's own output
                flash, sram = counter(builder.plan(cand.apply(base)))
                key = "float" if cand.action == KEEP_FLOAT else "int16"
                entry[key] = {"flash": flash - base_flash, "sram": sram - base_sram}
        costs[row["name"]] = entry
    return costs


# ---- measuring a candidate -------------------------------------------------------------------------

@dataclass
class Predictions:
    top1: np.ndarray      # predicted class per sample
    margin: np.ndarray    # top-1 minus top-2 output value per sample (how close it is to flipping)


class DropMeter:
    """The drop (points) of a QDQ model against the float model on fixed search samples.

    Float predictions are computed once. A full measurement is one faithful int8 pass over the search
    samples (kept in memory when they fit `max_cached_bytes`, else re-read); a screening measurement
    runs only a gathered subset of samples (see `screen`).
    """

    def __init__(self, reference: LoadedModel, data, batch_size: int, max_cached_bytes: int = 256 << 20,
                 threads: int = 0):
        self.output = reference.output_names[0]
        self.batch_size = batch_size
        self.threads = threads
        self.data = data
        runner = Runner(reference.model, [self.output], batch_size=batch_size, threads=threads)
        float_top1, labels = [], []
        self.cached: list | None = []
        cached_bytes = 0
        for batch in data.batches(batch_size):
            out = runner(batch.inputs)[self.output]
            float_top1.append(np.argmax(out.reshape(out.shape[0], -1), axis=1))
            labels = None if batch.labels is None or labels is None else labels + [np.asarray(batch.labels)]
            if self.cached is not None:
                cached_bytes += sum(v.nbytes for v in batch.inputs.values())
                self.cached = self.cached + [batch.inputs] if cached_bytes <= max_cached_bytes else None
        self.float_top1 = np.concatenate(float_top1) if float_top1 else np.zeros(0, np.int64)
        self.samples = int(self.float_top1.size)
        self.labelled = bool(labels)
        # "good" = right (with labels) or the float model's class (without): the drop counts lost goods
        self.truth = np.concatenate(labels) if self.labelled else self.float_top1
        self.float_good = int(np.sum(self.float_top1 == self.truth))
        self.full_passes = 0
        self.screen_passes = 0

    def _batches(self):
        if self.cached is not None:
            return iter(self.cached)
        return (b.inputs for b in self.data.batches(self.batch_size))

    def _run(self, quantized: QuantizedModel, batches) -> Predictions:
        name = quantized.dequantized.get(self.output, self.output)
        runner = Runner(quantized.model, [name], faithful=True, batch_size=self.batch_size, threads=self.threads)
        top1, margin = [], []
        for inputs in batches:
            out = runner(inputs)[name]
            flat = out.reshape(out.shape[0], -1)
            top1.append(np.argmax(flat, axis=1))
            ordered = np.sort(flat, axis=1)
            margin.append(ordered[:, -1] - ordered[:, -2] if flat.shape[1] > 1 else np.abs(ordered[:, -1]))
        return Predictions(np.concatenate(top1), np.concatenate(margin))

    def measure(self, quantized: QuantizedModel) -> Predictions:
        self.full_passes += 1
        return self._run(quantized, self._batches())

    def drop_pt(self, predictions: Predictions) -> float:
        if not self.samples:
            return 0.0
        return 100.0 * (self.float_good - int(np.sum(predictions.top1 == self.truth))) / self.samples

    def screen(self, current: Predictions, extra_samples: int) -> "Screen":
        """The samples a one-layer change can flip first: those the int8 model gets wrong (against the
        truth above) plus the `extra_samples` others with the smallest int8 margin."""
        wrong = np.nonzero(current.top1 != self.truth)[0]
        rest = np.nonzero(current.top1 == self.truth)[0]
        closest = rest[np.argsort(current.margin[rest], kind="stable")[:extra_samples]]
        chosen = np.sort(np.concatenate([wrong, closest]))
        inputs = self._gather(chosen)
        return Screen(chosen, inputs, current.top1[chosen] == self.truth[chosen])

    def _gather(self, indices: np.ndarray) -> list[dict[str, np.ndarray]]:
        wanted = set(int(i) for i in indices)
        parts: dict[str, list[np.ndarray]] = {}
        start = 0
        for inputs in self._batches():
            n = next(iter(inputs.values())).shape[0]
            local = [i - start for i in range(start, start + n) if i in wanted]
            if local:
                for k, v in inputs.items():
                    parts.setdefault(k, []).append(v[local])
            start += n
        if not parts:
            return []
        joined = {k: np.concatenate(v) for k, v in parts.items()}
        total = next(iter(joined.values())).shape[0]
        return [{k: v[i:i + self.batch_size] for k, v in joined.items()} for i in range(0, total, self.batch_size)]

    def estimate_drop_pt(self, quantized: QuantizedModel, screen: "Screen", current_drop_pt: float) -> float:
        """The drop if only screened samples can change (the others are assumed to keep their class)."""
        if not screen.indices.size:
            return current_drop_pt
        self.screen_passes += 1
        got = self._run(quantized, iter(screen.inputs))
        gained = int(np.sum(got.top1 == self.truth[screen.indices])) - int(np.sum(screen.good))
        return current_drop_pt - 100.0 * gained / self.samples


@dataclass
class Screen:
    indices: np.ndarray
    inputs: list
    good: np.ndarray


# ---- the greedy search -----------------------------------------------------------------------------

@dataclass
class RepairResult:
    options: PlanOptions
    steps: list[dict] = field(default_factory=list)
    drop_before_pt: float = 0.0
    drop_after_pt: float = 0.0
    reached: bool = False
    reason: str = ""
    candidates_screened: int = 0
    candidates_verified: int = 0
    screen_samples: int = 0
    refused: list[dict] = field(default_factory=list)   # the best step refused for breaking a limit


def _over(value: int, limit: int | None) -> int:
    return 0 if limit is None else max(0, value - limit)


def greedy_repair(builder: Quantizer, base: PlanOptions, ranked_rows: list[dict], meter: DropMeter,
                  counter: ByteCounter, target_drop_pt: float, flash_limit_bytes: int | None,
                  sram_limit_bytes: int | None, layers_tried: int = DEFAULT_LAYERS_TRIED,
                  max_steps: int = DEFAULT_MAX_STEPS, screen_extra_samples: int = DEFAULT_SCREEN_EXTRA,
                  verified_per_step: int = DEFAULT_VERIFIED_PER_STEP,
                  progress: Callable[[str], None] | None = None) -> RepairResult:
    """Greedy search described in the module docstring; `ranked_rows` are layer rows, worst first.

    Each step screens every candidate on the at-risk samples (DropMeter.screen), then measures the
    best-scoring few on all search samples and accepts the best of those; the log holds the full
    measurements only."""
    state = _State(base, *builder.build(base))
    state.predictions = meter.measure(state.quantized)
    state.drop = meter.drop_pt(state.predictions)
    state.flash, state.sram = counter(state.plan)
    result = RepairResult(options=base, drop_before_pt=state.drop, drop_after_pt=state.drop)
    if state.drop <= target_drop_pt:
        result.reached = True
        result.reason = f"the int8 drop {state.drop:.2f} pt is already within the target {target_drop_pt:.2f} pt"
        return result
    rows = ranked_rows[:layers_tried]
    limits = (flash_limit_bytes, sram_limit_bytes)
    refused_best: dict | None = None
    while len(result.steps) < max_steps:
        screen = meter.screen(state.predictions, screen_extra_samples)
        result.screen_samples = max(result.screen_samples, int(screen.indices.size))
        screened, refused_best = _screened(builder, rows, state, meter, screen, counter, limits, result, progress)
        best = _verified_best(screened[:verified_per_step], state.drop, meter, result)
        if best is None:
            result.reason = _no_step_reason(state.drop, target_drop_pt, len(rows), refused_best)
            break
        cand = best["candidate"]
        result.steps.append({
            "layer": cand.layer, "action": cand.action, "tensor": cand.tensor,
            "drop_before_pt": round(state.drop, 4), "drop_after_pt": round(best["drop"], 4),
            "flash_cost_bytes": int(best["flash_cost"]), "sram_cost_bytes": int(best["sram_cost"]),
            "flash_total_bytes": int(best["flash"]), "sram_peak_bytes": int(best["sram"])})
        state = _State(best["options"], best["plan"], best["quantized"], best["predictions"], best["drop"],
                       best["flash"], best["sram"])
        if state.drop <= target_drop_pt:
            result.reached = True
            result.reason = (f"drop {state.drop:.2f} pt is within the target {target_drop_pt:.2f} pt after "
                             f"{len(result.steps)} step{'s' if len(result.steps) != 1 else ''}")
            break
    else:
        result.reason = (f"stopped at the limit of {max_steps} steps with the drop at {state.drop:.2f} pt "
                         f"(target {target_drop_pt:.2f} pt)")
    if refused_best is not None and not result.reached:
        result.refused.append(_refused_entry(refused_best))
    result.options = state.options
    result.drop_after_pt = state.drop
    return result


@dataclass
class _State:
    """The choices accepted so far and their figures."""

    options: PlanOptions
    plan: Plan
    quantized: QuantizedModel
    predictions: Predictions | None = None
    drop: float = 0.0
    flash: int = 0
    sram: int = 0


def _screened(builder: Quantizer, rows: list[dict], state: _State, meter: DropMeter, screen: "Screen",
              counter: ByteCounter, limits: tuple[int | None, int | None], result: RepairResult,
              progress: Callable[[str], None] | None) -> tuple[list[dict], dict | None]:
    """Every candidate on top of `state`, estimated on the screened samples: those that lower the drop
    within the limits, best score first, and the best one refused for breaking a limit."""
    flash_limit, sram_limit = limits
    screened, refused_best = [], None
    for row in rows:
        for cand in candidates_for(builder.loaded, state.plan, row, builder.method):
            options = cand.apply(state.options)
            cand_plan, cand_q = builder.build(options)
            estimate = meter.estimate_drop_pt(cand_q, screen, state.drop)
            result.candidates_screened += 1
            if progress is not None:
                progress(f"{cand.layer} {cand.describe()}: about {estimate:.2f} pt")
            benefit = state.drop - estimate
            if benefit <= BENEFIT_EPSILON_PT:
                continue
            cand_flash, cand_sram = counter(cand_plan)
            # "Breaking" a limit: ending over it, and more over it than before the step.
            breaks = []
            if _over(cand_flash, flash_limit) > _over(state.flash, flash_limit):
                breaks.append(("flash", cand_flash, flash_limit))
            if _over(cand_sram, sram_limit) > _over(state.sram, sram_limit):
                breaks.append(("SRAM", cand_sram, sram_limit))
            info = {"candidate": cand, "options": options, "plan": cand_plan, "quantized": cand_q,
                    "drop": estimate, "flash": cand_flash, "sram": cand_sram,
                    "flash_cost": cand_flash - state.flash, "sram_cost": cand_sram - state.sram, "breaks": breaks}
            if breaks:
                if refused_best is None or estimate < refused_best["drop"]:
                    refused_best = info
                continue
            info["score"] = _score(benefit, info)
            screened.append(info)
    screened.sort(key=lambda info: info["score"], reverse=True)
    return screened, refused_best


def _score(benefit: float, info: dict) -> tuple[float, float]:
    """Drop removed per byte added (flash + SRAM), then the drop removed."""
    cost = max(0, info["flash_cost"]) + max(0, info["sram_cost"])
    return benefit / max(cost, 1), benefit


def _verified_best(shortlist: list[dict], drop: float, meter: DropMeter, result: RepairResult) -> dict | None:
    """The shortlisted candidates measured on every search sample: the best that lowers the drop."""
    best = None
    for info in shortlist:
        full = meter.measure(info["quantized"])
        result.candidates_verified += 1
        true_drop = meter.drop_pt(full)
        benefit = drop - true_drop
        if benefit <= BENEFIT_EPSILON_PT:
            continue
        score = _score(benefit, info)
        if best is None or score > best["score"]:
            best = {**info, "drop": true_drop, "predictions": full, "score": score}
    return best


def _refused_entry(info: dict) -> dict:
    cand = info["candidate"]
    return {"layer": cand.layer, "action": cand.action, "estimated_drop_after_pt": round(info["drop"], 4),
            "flash_total_bytes": int(info["flash"]), "sram_peak_bytes": int(info["sram"]),
            "breaks": [{"memory": what, "bytes": int(used), "limit_bytes": int(limit)}
                       for what, used, limit in info["breaks"]]}


def _no_step_reason(drop: float, target: float, layers: int, refused: dict | None) -> str:
    which = f"no repair of the {layers} most sensitive layer{'s' if layers != 1 else ''} lowers the drop further"
    if refused is not None:
        which += " within the flash and SRAM limits"
    text = f"{which}: it stays at {drop:.2f} pt (target {target:.2f} pt)"
    if refused is not None:
        cand = refused["candidate"]
        over = "; ".join(f"{what} {format_size(used)} > limit {format_size(limit)}"
                         for what, used, limit in refused["breaks"])
        text += (f"; the best refused step, {cand.layer} {cand.describe()} (drop about {refused['drop']:.2f} pt), "
                 f"would need {over}")
    return text
