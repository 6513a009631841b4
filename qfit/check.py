"""check: the whole job in one call — load, observe, quantize, evaluate, budget, report.

`check(options)` returns a CheckResult whose `report` dict is what report.json holds; the CLI only
parses arguments, calls this, writes files and prints the summary. Each stage is a plain function so
tests and later features can call them one by one.
"""
from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field

import numpy as np
import onnx
from tqdm import tqdm

from qfit import __version__
from qfit.measure.compare import EndMetrics, ErrorSums
from qfit.data import DataFolder, Preprocess
from qfit.errors import QfitError
from qfit.graph.load import LoadedModel, load_model
from qfit.quant.observe import DEFAULT_PERCENTILE, TensorStats, observe
from qfit.quant.plan import METHODS, Plan, PlanOptions, make_plan
from qfit.quant.quantize import QuantizedModel, build_qdq, calibrated_ranges
from qfit.runtime.sessions import FAITHFUL_PATH, Runner

CAUTION = ("These figures hold for the data measured and the arithmetic named above. Validate the int8 "
           "model on representative held-out data on the real device before relying on it. This report "
           "does not replace the product's own safety validation.")


@dataclass
class CheckOptions:
    model_path: str
    calib_dir: str
    out_dir: str
    flash_limit_bytes: int
    sram_limit_bytes: int
    eval_dir: str | None = None
    labels_csv: str | None = None
    flash_reserve_bytes: int = 0
    method: str = "percentile"
    percentile: float = DEFAULT_PERCENTILE
    input_shapes: dict[str, tuple[int, ...]] = field(default_factory=dict)
    preprocess: Preprocess | None = None
    limit: int | None = None
    eval_limit: int | None = None
    seed: int = 0
    batch_size: int = 16
    per_channel: bool = True
    symmetric_activations: bool = False
    max_drop_pt: float | None = None
    threshold: float | None = None
    skip_bad: bool = False
    progress: bool = True
    budget: dict = field(default_factory=dict)  # extra qfit.budget.BudgetOptions fields
    equalize: bool = False            # cross-layer equalization + bias absorption (qfit.equalize)
    bias_correction: bool = False     # empirical bias correction (qfit.equalize)
    isolated_samples: int = 64        # cap of the isolated/kept-float sweep (qfit.sensitivity); 0 = off
    repair: bool = True               # search repairs when the drop exceeds max_drop_pt (qfit.repair)
    repair_layers: int = 8            # the most sensitive layers the repair tries
    repair_steps: int = 12            # accepted steps at most
    repair_samples: int = 1000        # evaluation samples the repair search measures on


@dataclass
class CheckResult:
    report: dict
    quantized: QuantizedModel
    loaded: LoadedModel
    plan: Plan
    exit_code: int
    model_file: str
    predictions: dict | None = None  # paired per-sample predictions {"float", "int8", "labels"}
    budget: object | None = None      # qfit.budget.BudgetResult, for its text/Markdown renderers


def _bar(total: int, desc: str, enabled: bool):
    return tqdm(total=total, desc=desc, unit="sample", disable=not enabled, leave=False)


def open_data(folder: str, loaded: LoadedModel, options: CheckOptions, role: str,
              labels_csv: str | None = None, limit: int | None = None) -> DataFolder:
    inputs = {name: loaded.shapes[name] for name in loaded.input_names}
    num_classes = None
    out_shape = loaded.shapes.get(loaded.output_names[0])
    if out_shape is not None and len(out_shape) == 2:
        num_classes = int(out_shape[1])
    return DataFolder(folder, inputs, preprocess=options.preprocess, labels_csv=labels_csv, limit=limit,
                      seed=options.seed, skip_bad=options.skip_bad, role=role, num_classes=num_classes)


def calibrate(loaded: LoadedModel, plan: Plan, data: DataFolder, batch_size: int,
              progress: bool = True, histograms: bool = True) -> dict[str, TensorStats]:
    """One streaming pass of the float model, collecting range statistics for every quantizer
    (`histograms=False`: min/max only, enough for the min-max method)."""
    tensors = plan.calibrated_tensors()
    runner = Runner(loaded.model, tensors, batch_size=batch_size)
    with _bar(len(data), "calibrating", progress) as bar:
        stats = observe(runner, data.batches(batch_size), tensors, bar, histograms=histograms)
    bad = [name for name, s in stats.items() if s.nonfinite]
    if bad:
        raise QfitError(f"calibration: tensor '{bad[0]}' took NaN or Inf values on the calibration data "
                        f"({len(bad)} tensors affected)")
    empty = [name for name, s in stats.items() if s.count == 0]
    if empty:
        raise QfitError(f"calibration: no values were observed for tensor '{empty[0]}'")
    return stats


def needs_histograms(options: CheckOptions) -> bool:
    """Only the min-max method can do without histograms, and only when no repair search may try
    the other methods on the same statistics."""
    return options.method != "minmax" or (options.max_drop_pt is not None and options.repair)


def compared_layers(loaded: LoadedModel, plan: Plan) -> list[dict]:
    """The rows of the per-layer table: one per node, with the tensor its error is measured on.

    A ReLU that absorbs its producer's output is not a row of its own: the producer's row measures
    the tensor after the clamp, as an int8 kernel stores it.
    """
    rows = []
    absorbed = set(plan.fused.values())
    for node in loaded.graph.node:
        # the first output present (an LSTM may leave its sequence output Y unused, "")
        out = next((o for o in node.output if o), None)
        if out is None or out in absorbed:
            continue
        tensor = plan.fused.get(out, out)
        if tensor not in loaded.shapes:
            continue
        rows.append({"name": node.name, "op_type": node.op_type, "tensor": tensor,
                     "precision": "float" if node.name in plan.float_nodes else
                     ("int16" if plan.bits_of(tensor) == 16 else "int8")})
    return rows


def output_kind(loaded: LoadedModel) -> str:
    """'classification' when the first output is (N, K) with K > 1, else 'score'."""
    shape = loaded.shapes.get(loaded.output_names[0], ())
    return "classification" if len(shape) == 2 and shape[1] > 1 else "score"


def evaluate(loaded: LoadedModel, quantized: QuantizedModel, layers: list[dict], data: DataFolder,
             batch_size: int, threshold: float | None = None, progress: bool = True) -> tuple[dict, dict[str, ErrorSums]]:
    """Float and faithful int8 passes over `data`: end metrics and accumulated per-layer errors."""
    output = loaded.output_names[0]
    tensors = list(dict.fromkeys([row["tensor"] for row in layers] + [output]))
    int8_names = [quantized.dequantized.get(t, t) for t in tensors]
    float_runner = Runner(loaded.model, tensors, batch_size=batch_size)
    int8_runner = Runner(quantized.model, int8_names, faithful=True, batch_size=batch_size)
    sums = {t: ErrorSums() for t in tensors}
    metrics = EndMetrics(output_kind(loaded), threshold)
    input_name = loaded.input_names[0]
    reconstruction = loaded.shapes.get(output) == loaded.shapes.get(input_name)

    def absorb(batch, reference: dict, got: dict) -> None:
        for t, q in zip(tensors, int8_names):
            sums[t].update(reference[t], got[q])
        score_inputs = None
        if reconstruction and threshold is not None:
            x = batch.inputs[input_name]
            n = x.shape[0]
            score_inputs = (((reference[output] - x) ** 2).reshape(n, -1).mean(1),
                            ((got[quantized.dequantized.get(output, output)] - x) ** 2).reshape(n, -1).mean(1))
        metrics.update(reference[output], got[quantized.dequantized.get(output, output)],
                       batch.labels, score_inputs)

    # As in qfit.observe: one worker sums batch k while onnxruntime runs batch k+1; batches are
    # absorbed in order, one at a time, so the sums are those of a plain loop.
    with _bar(len(data), "evaluating", progress) as bar, \
            ThreadPoolExecutor(max_workers=1, thread_name_prefix="qfit-evaluate") as worker:
        pending = None
        for batch in data.batches(batch_size):
            reference = float_runner(batch.inputs)
            got = int8_runner(batch.inputs)
            if pending is not None:
                pending.result()
            pending = worker.submit(absorb, batch, reference, got)
            bar.update(len(batch.files))
        if pending is not None:
            pending.result()
    return metrics.result(), sums


def weight_bytes_by_node(loaded: LoadedModel, plan: Plan) -> dict[str, int]:
    totals: dict[str, int] = {}
    for (node, _), wq in plan.weights.items():
        totals[node] = totals.get(node, 0) + int(loaded.constants[wq.tensor].size) * wq.bits // 8
    return totals


def output_paths(options: CheckOptions) -> dict[str, str]:
    """The files `qfit check` writes into the output folder (the model, then the three report views)."""
    stem = os.path.splitext(os.path.basename(options.model_path))[0]
    return {"model": os.path.join(options.out_dir, f"{stem}_int8.onnx"),
            "report_json": os.path.join(options.out_dir, "report.json"),
            "report_md": os.path.join(options.out_dir, "report.md"),
            "report_html": os.path.join(options.out_dir, "report.html")}


def _budget_and_rows(loaded: LoadedModel, plan: Plan, budget_options, layers: list[dict],
                     sums: dict[str, ErrorSums]):
    """Budget the plan and fill each layer row's weight bytes and accumulated error figures."""
    from qfit.memory import budget as budget_module
    budget_result = budget_module.analyze(loaded, plan, budget_options)
    weight_bytes = weight_bytes_by_node(loaded, plan)
    for row in layers:
        row["weight_bytes_int8"] = weight_bytes.get(row["name"], 0)
        row.update(sums[row["tensor"]].to_dict())
    return budget_result, budget_result.to_dict()


def check(options: CheckOptions) -> CheckResult:
    """Run the whole job; raise QfitError for bad input."""
    if options.method not in METHODS:
        raise QfitError(f"--method: unknown method '{options.method}' (choose from {', '.join(METHODS)})")
    check_analysis_options(options)
    model_file = output_paths(options)["model"]
    model_real = os.path.realpath(options.model_path)
    for path in output_paths(options).values():
        # checked before any work: the input model must never be replaced by an output
        if os.path.realpath(path) == model_real:
            raise QfitError(f"--out: writing {path} would overwrite the input model {options.model_path}")
    loaded = load_model(options.model_path, options.input_shapes)
    plan_options = PlanOptions(per_channel=options.per_channel, symmetric_activations=options.symmetric_activations)
    plan = make_plan(loaded, plan_options)
    calib = open_data(options.calib_dir, loaded, options, "calibration", limit=options.limit)
    stats = calibrate(loaded, plan, calib, options.batch_size, options.progress, needs_histograms(options))
    ranges = calibrated_ranges(plan, stats, options.method, options.percentile)
    quantized = build_qdq(loaded, plan, ranges)
    try:
        onnx.checker.check_model(quantized.model)
    except Exception as e:  # a bug in qfit, not the user's input: let it surface with context
        raise RuntimeError(f"the written QDQ model fails the ONNX checker: {e}") from e

    reused = options.eval_dir is None or os.path.abspath(options.eval_dir) == os.path.abspath(options.calib_dir)
    eval_data = open_data(options.eval_dir or options.calib_dir, loaded, options, "evaluation",
                          labels_csv=options.labels_csv, limit=options.eval_limit)
    prepared = prepare_quantization(options, loaded, plan_options, plan, stats, quantized, calib, eval_data)
    reference, plan, quantized = prepared.reference, prepared.plan, prepared.quantized
    layers = compared_layers(reference, plan)
    accuracy, sums = evaluate(reference, quantized, layers, eval_data, options.batch_size, options.threshold,
                              options.progress)

    from qfit.memory import budget as budget_module
    budget_options = budget_module.BudgetOptions(flash_limit_bytes=options.flash_limit_bytes,
                                                 sram_limit_bytes=options.sram_limit_bytes,
                                                 flash_reserve_bytes=options.flash_reserve_bytes,
                                                 **options.budget)
    budget_result, memory = _budget_and_rows(prepared.builder.loaded, plan, budget_options, layers, sums)

    analysis, repaired = sensitivity_and_repair(options, prepared, plan_options, layers, accuracy, budget_options)
    if repaired is not None:
        # The written model carries the repair: re-measure it in full, keep the pre-repair analysis.
        before = {row["name"]: row for row in layers}
        analysed_keys = [key for key in SENSITIVITY_KEYS if any(key in row for row in before.values())]
        plan, quantized = prepared.builder.build(repaired)
        layers = compared_layers(reference, plan)
        accuracy, sums = evaluate(reference, quantized, layers, eval_data, options.batch_size, options.threshold,
                                  options.progress)
        budget_result, memory = _budget_and_rows(prepared.builder.loaded, plan, budget_options, layers, sums)
        for row in layers:
            old = before.get(row["name"], {})
            row.update({key: old.get(key) for key in analysed_keys})
        finish_repair(analysis["repair"], accuracy, memory)

    failed = []
    if not memory["flash"]["fits"]:
        failed.append("flash")
    if not memory["sram"]["fits"]:
        failed.append("sram")
    accuracy_ok = True
    if options.max_drop_pt is not None and accuracy.get("metric") in ("top1", "agreement"):
        accuracy_ok = accuracy["drop_pt"] <= options.max_drop_pt
        if not accuracy_ok:
            failed.append("accuracy")
    predictions = accuracy.pop("predictions", None)
    report = {
        "tool_version": __version__,
        "model": {"path": options.model_path, **memory["model"],
                  "inputs": {n: list(loaded.shapes[n]) for n in loaded.input_names},
                  "outputs": {n: list(loaded.shapes.get(n, ())) for n in loaded.output_names},
                  "opset": loaded.original_opset, "notes": loaded.notes,
                  "float_nodes": sorted(plan.unsupported_nodes)},
        "quantization": {"weights": "per-channel symmetric int8" if options.per_channel else
                         "per-tensor symmetric int8",
                         "activations": "per-tensor symmetric int8" if options.symmetric_activations else
                         "per-tensor asymmetric int8",
                         "bias": "int32, scale = input scale x weight scale",
                         "method": options.method,
                         "percentile": options.percentile if options.method == "percentile" else None},
        "calibration": calib.describe(),
        "evaluation": {**eval_data.describe(), "reused_calibration_data": reused},
        "evaluation_path": FAITHFUL_PATH,
        **{k: v for k, v in memory.items() if k != "model"},
        "accuracy": accuracy,
        "layers": layers,
        **analysis,
        **prepared.sections,
        "verdict": {"fits_flash": memory["flash"]["fits"], "fits_sram": memory["sram"]["fits"],
                    "accuracy_ok": accuracy_ok, "max_drop_pt": options.max_drop_pt, "failed": failed,
                    "exit_code": 1 if failed else 0},
        "outputs": {"model": os.path.basename(model_file), "report_json": "report.json",
                    "report_md": "report.md"},
        "caution": CAUTION,
    }
    return CheckResult(report=report, quantized=quantized, loaded=loaded, plan=plan,
                       exit_code=1 if failed else 0, model_file=model_file, predictions=predictions,
                       budget=budget_result)



# ---- published improvements, sensitivity and repair (qfit.equalize, qfit.sensitivity, qfit.repair) --

@dataclass
class Prepared:
    """What the quantization after the optional improvements starts from."""

    reference: LoadedModel        # float model every int8 figure is compared with (same function as the input)
    builder: object               # qfit.repair.ModelBuilder: PlanOptions -> QDQ model
    plan: Plan
    quantized: QuantizedModel
    sections: dict                # report sections "equalization" and "bias_correction"


def end_metrics_only(reference: LoadedModel, quantized: QuantizedModel, data: DataFolder,
                     options: CheckOptions) -> dict:
    """Drop, int8 figure and output SQNR of one QDQ model (no per-layer tensors)."""
    accuracy, _ = evaluate(reference, quantized, [], data, options.batch_size, options.threshold, options.progress)
    keys = ("metric", "float", "int8", "drop_pt", "drop_ci95_pt", "agreement_pct", "output_sqnr_db",
            "decision_flips_pct")
    return {k: accuracy[k] for k in keys if k in accuracy}


def prepare_quantization(options: CheckOptions, loaded: LoadedModel, plan_options: PlanOptions, plan: Plan,
                         stats: dict[str, TensorStats], quantized: QuantizedModel, calib: DataFolder,
                         eval_data: DataFolder) -> Prepared:
    """Cross-layer equalization and bias correction when asked for, each measured before and after."""
    from qfit.quant import equalize
    from qfit.search.repair import ModelBuilder

    builder = ModelBuilder(loaded, stats, options.method, options.percentile, calib, options.batch_size)
    sections = {"equalization": {"enabled": bool(options.equalize)},
                "bias_correction": {"enabled": bool(options.bias_correction)}}
    if not (options.equalize or options.bias_correction):
        return Prepared(loaded, builder, plan, quantized, sections)
    reference = loaded
    before = end_metrics_only(loaded, quantized, eval_data, options)
    if options.equalize:
        result = equalize.equalize(loaded, calib, options.batch_size)
        reference = result.loaded
        eq_plan = make_plan(reference, plan_options)
        eq_stats = calibrate(reference, eq_plan, calib, options.batch_size, options.progress,
                             needs_histograms(options))
        builder = ModelBuilder(reference, eq_stats, options.method, options.percentile, calib, options.batch_size)
        plan, quantized = builder.build(plan_options)
        after = end_metrics_only(reference, quantized, eval_data, options)
        sections["equalization"].update({**result.to_dict(), "before": before, "after": after})
        before = after
    if options.bias_correction:
        correction = equalize.bias_correction(builder.loaded, plan, quantized, calib, options.batch_size)
        builder = ModelBuilder(correction.structure(builder.loaded), builder.stats, options.method,
                               options.percentile, calib, options.batch_size, bias_correction=correction)
        plan, quantized = builder.build(plan_options)
        after = end_metrics_only(reference, quantized, eval_data, options)
        sections["bias_correction"].update({**correction.to_dict(), "before": before, "after": after})
    try:
        onnx.checker.check_model(quantized.model)
    except Exception as e:  # a bug in qfit, not the user's input
        raise RuntimeError(f"the improved QDQ model fails the ONNX checker: {e}") from e
    return Prepared(reference, builder, plan, quantized, sections)


SENSITIVITY_KEYS = ("sqnr_isolated_db", "cosine_isolated", "isolated_output_sqnr_db", "sensitivity_pt",
                    "sensitivity_agreement_pt", "float_recovery_pt", "float_recovery_agreement_pt",
                    "output_sqnr_if_float_db", "sensitivity_rank", "fallback_cost_bytes")


def _repair_section(target, reason: str, reached=None, drop=None) -> dict:
    return {"target_drop_pt": target, "steps": [], "drop_before_pt": drop, "final_drop_pt": drop,
            "reached": reached, "reason": reason}


def sensitivity_and_repair(options: CheckOptions, prepared: Prepared, plan_options: PlanOptions,
                           layers: list[dict], accuracy: dict, budget_options) -> tuple[dict, PlanOptions | None]:
    """Rank the layers, price their repairs and, given --max-drop, search for the repair.

    Adds the sensitivity keys to each row of `layers`; returns the report sections "sensitivity" and
    "repair" and the PlanOptions chosen by the repair (None when nothing changed)."""
    from dataclasses import replace as dataclass_replace

    from qfit.search import repair
    from qfit.measure import sensitivity

    reference, builder = prepared.reference, prepared.builder
    counter_options = dataclass_replace(budget_options, what_if=False,
                                        order_time_limit_s=min(budget_options.order_time_limit_s,
                                                               REPAIR_ORDER_TIME_LIMIT_S))
    counter = repair.ByteCounter(builder.loaded, counter_options)
    costs = repair.fallback_costs(builder, plan_options, layers, counter)
    kind = output_kind(reference)
    eval_folder = options.eval_dir or options.calib_dir
    eval_labels = options.labels_csv if options.eval_dir else None
    sections: dict = {}
    if options.isolated_samples and options.isolated_samples > 0:
        cap = options.isolated_samples if options.eval_limit is None else min(options.isolated_samples,
                                                                            options.eval_limit)
        sample = open_data(eval_folder, reference, options, "evaluation", labels_csv=eval_labels, limit=cap)
        with _bar(len(sample), "sensitivity", options.progress) as bar:
            swept = sensitivity.sweep(reference, prepared.plan, prepared.quantized, layers, sample,
                                      options.batch_size, kind, accuracy.get("samples"), cap, bar)
        rows = swept.pop("rows")
        sections["sensitivity"] = swept
    else:
        rows = {}
        isolated_key, float_key = sensitivity.metric_keys(kind, accuracy.get("metric") == "top1")
        sections["sensitivity"] = {"samples_used": 0, "skipped": "isolated sweep switched off (--isolated-samples 0)",
                                   "isolated_key": isolated_key, "float_key": float_key,
                                   "ranking": [r["name"] for r in sorted(
                                       (r for r in layers if r["precision"] != "float"),
                                       key=lambda r: r.get("sqnr_db", 0.0))]}
    for row in layers:
        for key in (sections["sensitivity"]["isolated_key"], sections["sensitivity"]["float_key"],
                    "sqnr_isolated_db", "cosine_isolated", "isolated_output_sqnr_db", "sensitivity_rank"):
            if key:
                row[key] = rows.get(row["name"], {}).get(key)
        row["fallback_cost_bytes"] = costs.get(row["name"])

    target = options.max_drop_pt
    drop = accuracy.get("drop_pt") if accuracy.get("metric") in ("top1", "agreement") else None
    if target is None:
        sections["repair"] = _repair_section(None, "no --max-drop given: no target to repair towards", drop=drop)
        return sections, None
    if drop is None:
        sections["repair"] = _repair_section(target, "the model output is a score, not classes: there is no "
                                             "accuracy drop for --max-drop to bound")
        return sections, None
    if drop <= target:
        sections["repair"] = _repair_section(target, f"the int8 drop {drop:.2f} pt is already within the "
                                             f"target {target:.2f} pt", reached=True, drop=drop)
        return sections, None
    if not options.repair:
        sections["repair"] = _repair_section(target, "repair switched off (--no-repair)", reached=False, drop=drop)
        return sections, None
    by_name = {row["name"]: row for row in layers}
    ranked = [by_name[name] for name in sections["sensitivity"]["ranking"] if name in by_name]
    search_limit = options.repair_samples
    if options.eval_limit is not None:
        search_limit = min(search_limit, options.eval_limit)
    search_data = open_data(eval_folder, reference, options, "evaluation", labels_csv=eval_labels, limit=search_limit)
    meter = repair.DropMeter(reference, search_data, options.batch_size)
    with tqdm(desc="repair", unit="candidate", disable=not options.progress, leave=False) as bar:
        found = repair.greedy_repair(builder, plan_options, ranked, meter, counter, target,
                                     budget_options.flash_limit_bytes, budget_options.sram_limit_bytes,
                                     layers_tried=options.repair_layers, max_steps=options.repair_steps,
                                     progress=lambda text: bar.update(1))
    sections["repair"] = {"target_drop_pt": target, "steps": found.steps, "drop_before_pt": drop,
                          "final_drop_pt": drop, "reached": found.reached, "reason": found.reason,
                          "search": {"samples": meter.samples, "samples_available": accuracy.get("samples"),
                                     "drop_before_pt": round(found.drop_before_pt, 4),
                                     "drop_after_pt": round(found.drop_after_pt, 4),
                                     "layers_tried": min(options.repair_layers, len(ranked)),
                                     "candidates_screened": found.candidates_screened,
                                     "candidates_verified": found.candidates_verified,
                                     "screen_samples": found.screen_samples,
                                     "extra_calibration_passes": builder.extra_calibration_passes},
                          "refused": found.refused}
    return sections, (found.options if found.steps else None)


REPAIR_ORDER_TIME_LIMIT_S = 0.5  # per plan the repair prices; a shorter search can only overstate SRAM


def finish_repair(section: dict, accuracy: dict, memory: dict) -> None:
    """Put the written model's own figures (full evaluation set, full budget) into the repair section."""
    target = section["target_drop_pt"]
    final = accuracy.get("drop_pt")
    section["final_drop_pt"] = final
    fits = memory["flash"]["fits"] is not False and memory["sram"]["fits"] is not False
    within = final is not None and final <= target
    searched = section.get("search", {})
    section["reached"] = bool(within and fits)
    if not fits:
        section["reason"] += "; but the final budget does not fit: " + ", ".join(
            what for what in ("flash", "sram") if memory[what]["fits"] is False)
    elif within != (searched.get("drop_after_pt", final) <= target):
        section["reason"] += (f"; on the full evaluation set ({accuracy.get('samples')} samples) the drop is "
                              f"{final:.2f} pt, the search used {searched.get('samples')} samples")


def check_analysis_options(options: CheckOptions) -> None:
    """One-line errors for the sensitivity and repair settings."""
    if options.isolated_samples is None or options.isolated_samples < 0:
        raise QfitError(f"--isolated-samples: must be 0 (skip the sweep) or a positive number, "
                        f"got {options.isolated_samples}")
    for flag, value in (("--repair-layers", options.repair_layers), ("--repair-steps", options.repair_steps),
                        ("--repair-samples", options.repair_samples)):
        if value is None or value < 1:
            raise QfitError(f"{flag}: must be a positive number, got {value}")
    if options.max_drop_pt is not None and not math.isfinite(options.max_drop_pt):
        # a negative target is allowed: it asks int8 to beat float by that many points
        raise QfitError(f"--max-drop: must be a finite number of points, got {options.max_drop_pt}")
