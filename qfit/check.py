"""check: the whole job as stages in order — load, plan, calibrate, quantize, evaluate, budget, analyse,
repair, verdict.

Each stage is a plain function that takes the options and the results before it and returns a frozen
result; `check(options)` runs them and returns a CheckResult holding every stage's result.
qfit.report.build turns that into the report dict (what report.json holds); the CLI only parses
arguments, calls these two, writes the files and prints the summary.

The defaults of every option are written once, in CheckOptions (the CLI reads them from there).
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field, replace

import onnx

from qfit.data import DataFolder, Preprocess
from qfit.errors import QfitError
from qfit.graph.load import LoadedModel, load_model
from qfit.runtime.opset_support import check_runtime_opset
from qfit.measure import gate as gates, integer, sensitivity
from qfit.measure.evaluate import (compared_layers, end_metrics_only, evaluate, fill_layer_rows, output_kind,
                                   progress_bar, sample_of)
from qfit.memory import budget as memory_budget
from qfit.quant import equalize
from qfit.quant.observe import DEFAULT_PERCENTILE, TensorStats, observe
from qfit.quant.plan import METHODS, Plan, PlanOptions, make_plan
from qfit.quant.quantize import QuantizedModel, Quantizer
from qfit.runtime.sessions import FAITHFUL_PATH, Runner
from qfit.search import repair as repairs

REPAIR_ORDER_TIME_LIMIT_S = 0.5  # per plan the repair prices; a shorter search can only overstate SRAM


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
    threads: int = 0                  # onnxruntime intra-op threads per session (0 = its default)
    arithmetic: str = "integer"       # int8 figures from the integer path, or "float" (the float preview)
    rounding: str = "double"          # the integer path's requantization rounding: "double" or "single"
    per_channel: bool = True
    symmetric_activations: bool = False
    max_drop_pt: float | None = None  # None: the default gate (qfit.measure.gate.DEFAULT_MAX_DROP_PT)
    accuracy_gate: bool = True        # False: no accuracy gate at all (--no-accuracy-gate)
    gate_upper_bound: bool = False    # gate the upper end of the drop's 95 % interval (--gate-upper-bound)
    expect_float_pt: float | None = None  # float top-1 measured in training (--expect-float)
    expect_float_tolerance_pt: float = gates.DEFAULT_FLOAT_TOLERANCE_PT
    class_order: list[str] | None = None  # class names in the model's output order (--class-order)
    threshold: float | None = None
    skip_bad: bool = False
    progress: bool = True
    budget: dict = field(default_factory=dict)  # extra qfit.memory.budget.BudgetOptions fields
    equalize: bool = False            # cross-layer equalization + bias absorption (qfit.quant.equalize)
    bias_correction: bool = False     # empirical bias correction (qfit.quant.equalize)
    isolated_samples: int = sensitivity.DEFAULT_SAMPLE_CAP  # cap of the isolated sweep; 0 = off
    repair: bool = True               # search repairs when the drop exceeds max_drop_pt (qfit.search.repair)
    repair_layers: int = repairs.DEFAULT_LAYERS_TRIED     # the most sensitive layers the repair tries
    repair_steps: int = repairs.DEFAULT_MAX_STEPS         # accepted steps at most
    repair_samples: int = repairs.DEFAULT_SEARCH_SAMPLES  # evaluation samples the repair search measures on


@dataclass(frozen=True)
class OutputPaths:
    """The files `qfit check` writes into the output folder: the model, then the three report views."""

    model: str
    report_json: str
    report_md: str
    report_html: str

    @classmethod
    def of(cls, options: CheckOptions) -> "OutputPaths":
        stem = os.path.splitext(os.path.basename(options.model_path))[0]
        return cls(*(os.path.join(options.out_dir, name) for name in
                     (f"{stem}_int8.onnx", "report.json", "report.md", "report.html")))

    def as_dict(self) -> dict[str, str]:
        return {"model": self.model, "report_json": self.report_json, "report_md": self.report_md,
                "report_html": self.report_html}


# ---- stage results --------------------------------------------------------------------------------

@dataclass(frozen=True)
class Loaded:
    model: LoadedModel
    paths: OutputPaths


@dataclass(frozen=True)
class Planned:
    options: PlanOptions
    plan: Plan


@dataclass(frozen=True)
class Calibration:
    data: DataFolder
    stats: dict[str, TensorStats]


@dataclass(frozen=True)
class Quantized:
    """The QDQ model written, and what built it (the reference is the float model every int8 figure is
    compared with: the input model, or its equalized equivalent)."""

    reference: LoadedModel
    quantizer: Quantizer
    plan: Plan
    model: QuantizedModel
    improvements: dict            # report sections "equalization" and "bias_correction"


@dataclass(frozen=True)
class Evaluation:
    data: DataFolder
    reused_calibration_data: bool
    layers: list[dict]            # compared layers with weight bytes and accumulated error figures
    accuracy: dict
    predictions: dict | None      # paired per-sample predictions {"float", "int8", "labels"}
    path: str = FAITHFUL_PATH     # the arithmetic that produced the figures
    arithmetic: dict = field(default_factory=dict)  # qfit.measure.integer.arithmetic_section


@dataclass(frozen=True)
class Budget:
    options: memory_budget.BudgetOptions
    result: memory_budget.BudgetResult


@dataclass(frozen=True)
class Analysis:
    sensitivity: dict
    layer_keys: dict[str, dict]   # layer name -> its sensitivity figures and repair costs
    repair: dict
    repaired_options: PlanOptions | None


@dataclass(frozen=True)
class Repaired:
    """The figures of the model written: after the repair when it took steps, else those measured."""

    quantized: Quantized
    evaluation: Evaluation
    budget: Budget
    repair: dict


@dataclass(frozen=True)
class Verdict:
    fits_flash: bool
    fits_sram: bool
    accuracy_ok: bool
    max_drop_pt: float | None
    failed: list[str]
    exit_code: int
    accuracy_gate: dict = field(default_factory=dict)   # qfit.measure.gate.accuracy_gate
    float_check: dict | None = None                      # qfit.measure.gate.float_check
    warnings: list[str] = field(default_factory=list)    # shown by every view

    def to_dict(self) -> dict:
        return {"fits_flash": self.fits_flash, "fits_sram": self.fits_sram, "accuracy_ok": self.accuracy_ok,
                "max_drop_pt": self.max_drop_pt, "failed": list(self.failed), "exit_code": self.exit_code,
                "accuracy_gate": dict(self.accuracy_gate), "float_check": self.float_check,
                "warnings": list(self.warnings)}


@dataclass(frozen=True)
class CheckResult:
    options: CheckOptions
    loaded: LoadedModel
    paths: OutputPaths
    planned: Planned
    calibration: Calibration
    analysis: Analysis
    final: Repaired
    verdict: Verdict

    @property
    def quantized(self) -> QuantizedModel:
        return self.final.quantized.model

    @property
    def plan(self) -> Plan:
        return self.final.quantized.plan

    @property
    def exit_code(self) -> int:
        return self.verdict.exit_code

    @property
    def model_file(self) -> str:
        return self.paths.model

    @property
    def predictions(self) -> dict | None:
        return self.final.evaluation.predictions


def check(options: CheckOptions) -> CheckResult:
    """Run the whole job; raise QfitError for bad input."""
    loaded = load_stage(options)
    planned = plan_stage(options, loaded)
    calibration = calibration_stage(options, loaded, planned)
    eval_data, reused = open_evaluation(options, loaded.model)
    quantized = quantize_stage(options, loaded, planned, calibration, eval_data)
    evaluation = evaluation_stage(options, quantized, eval_data, reused)
    budgeted = budget_stage(options, quantized)
    analysis = analysis_stage(options, planned, quantized, evaluation, budgeted)
    final = repair_stage(options, quantized, evaluation, budgeted, analysis)
    verdict = verdict_stage(options, final)
    return CheckResult(options, loaded.model, loaded.paths, planned, calibration, analysis, final, verdict)


# ---- load, plan, calibrate ------------------------------------------------------------------------

def load_stage(options: CheckOptions) -> Loaded:
    """Check the options (before any work), then load the model."""
    if options.method not in METHODS:
        raise QfitError(f"--method: unknown method '{options.method}' (choose from {', '.join(METHODS)})")
    check_analysis_options(options)
    integer.check_arithmetic_options(options.arithmetic, options.rounding)
    paths = OutputPaths.of(options)
    model_real = os.path.realpath(options.model_path)
    for path in paths.as_dict().values():
        # checked before any work: the input model must never be replaced by an output
        if os.path.realpath(path) == model_real:
            raise QfitError(f"--out: writing {path} would overwrite the input model {options.model_path}")
    return Loaded(check_runtime_opset(load_model(options.model_path, options.input_shapes)), paths)


def plan_stage(options: CheckOptions, loaded: Loaded) -> Planned:
    plan_options = PlanOptions(per_channel=options.per_channel, symmetric_activations=options.symmetric_activations)
    return Planned(plan_options, make_plan(loaded.model, plan_options))


def open_data(folder: str, loaded: LoadedModel, options: CheckOptions, role: str,
              labels_csv: str | None = None, limit: int | None = None) -> DataFolder:
    inputs = {name: loaded.shapes[name] for name in loaded.input_names}
    num_classes = None
    out_shape = loaded.shapes.get(loaded.output_names[0])
    if out_shape is not None and len(out_shape) == 2:
        num_classes = int(out_shape[1])
    return DataFolder(folder, inputs, preprocess=options.preprocess, labels_csv=labels_csv, limit=limit,
                      seed=options.seed, skip_bad=options.skip_bad, role=role, num_classes=num_classes,
                      class_order=options.class_order)


def calibrate(loaded: LoadedModel, plan: Plan, data: DataFolder, batch_size: int,
              progress: bool = True, histograms: bool = True, threads: int = 0) -> dict[str, TensorStats]:
    """One streaming pass of the float model, collecting range statistics for every quantizer
    (`histograms=False`: min/max only, enough for the min-max method)."""
    tensors = plan.calibrated_tensors()
    runner = Runner(loaded.model, tensors, batch_size=batch_size, threads=threads)
    with progress_bar(len(data), "calibrating", progress) as bar:
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
    return options.method != "minmax" or (repair_target(options) is not None and options.repair)


def calibration_stage(options: CheckOptions, loaded: Loaded, planned: Planned) -> Calibration:
    data = open_data(options.calib_dir, loaded.model, options, "calibration", limit=options.limit)
    stats = calibrate(loaded.model, planned.plan, data, options.batch_size, options.progress,
                      needs_histograms(options), options.threads)
    return Calibration(data, stats)


def open_evaluation(options: CheckOptions, loaded: LoadedModel) -> tuple[DataFolder, bool]:
    """The evaluation folder, opened once for every pass that measures (the sensitivity sweep and the
    repair search take seeded samples of it); True when it is the calibration folder itself."""
    reused = options.eval_dir is None or os.path.abspath(options.eval_dir) == os.path.abspath(options.calib_dir)
    data = open_data(options.eval_dir or options.calib_dir, loaded, options, "evaluation",
                     labels_csv=options.labels_csv, limit=options.eval_limit)
    gates.check_expectation_has_labels(gate_options(options), data.labels is not None)  # before any pass
    return data, reused


# ---- quantize (with the optional published improvements) -----------------------------------------

def _checked(quantized: QuantizedModel, what: str) -> QuantizedModel:
    try:
        onnx.checker.check_model(quantized.model)
    except onnx.checker.ValidationError as e:  # a bug in qfit, not the user's input: surface it with context
        raise RuntimeError(f"the {what} QDQ model fails the ONNX checker: {e}") from e
    return quantized


def quantize_stage(options: CheckOptions, loaded: Loaded, planned: Planned, calibration: Calibration,
                   eval_data: DataFolder) -> Quantized:
    """The QDQ model of the plan; with cross-layer equalization and bias correction when asked for,
    each measured before and after on the evaluation data."""
    calib, batch, threads = calibration.data, options.batch_size, options.threads
    quantizer = Quantizer(loaded.model, calibration.stats, options.method, options.percentile, calib, batch,
                          threads=threads)
    plan, quantized = quantizer.build_plan(planned.plan)
    _checked(quantized, "written")
    sections = {"equalization": {"enabled": bool(options.equalize)},
                "bias_correction": {"enabled": bool(options.bias_correction)}}
    if not (options.equalize or options.bias_correction):
        return Quantized(loaded.model, quantizer, plan, quantized, sections)
    reference = loaded.model

    def measured(model: QuantizedModel) -> dict:
        return end_metrics_only(reference, model, eval_data, batch, options.threshold, options.progress, threads,
                                options.arithmetic, options.rounding)

    before = measured(quantized)
    if options.equalize:
        result = equalize.equalize(loaded.model, calib, batch)
        reference = result.loaded
        eq_plan = make_plan(reference, planned.options)
        eq_stats = calibrate(reference, eq_plan, calib, batch, options.progress, needs_histograms(options), threads)
        quantizer = Quantizer(reference, eq_stats, options.method, options.percentile, calib, batch, threads=threads)
        plan, quantized = quantizer.build(planned.options)
        after = measured(quantized)
        sections["equalization"].update({**result.to_dict(), "before": before, "after": after})
        before = after
    if options.bias_correction:
        correction = equalize.bias_correction(quantizer.loaded, plan, quantized, calib, batch)
        quantizer = Quantizer(correction.structure(quantizer.loaded), quantizer.stats, options.method,
                              options.percentile, calib, batch, bias_correction=correction, threads=threads)
        plan, quantized = quantizer.build(planned.options)
        after = measured(quantized)
        sections["bias_correction"].update({**correction.to_dict(), "before": before, "after": after})
    return Quantized(reference, quantizer, plan, _checked(quantized, "improved"), sections)


# ---- evaluate, budget -----------------------------------------------------------------------------

def evaluation_stage(options: CheckOptions, quantized: Quantized, data: DataFolder, reused: bool) -> Evaluation:
    layers = compared_layers(quantized.reference, quantized.plan)
    accuracy, sums = evaluate(quantized.reference, quantized.model, layers, data, options.batch_size,
                              options.threshold, options.progress, options.threads, options.arithmetic,
                              options.rounding)
    fill_layer_rows(quantized.quantizer.loaded, quantized.plan, layers, sums)
    requantization = integer.layer_requantization(quantized.model.model)
    for row in layers:
        row["requantization"] = requantization.get(row["name"])
    predictions = accuracy.pop("predictions", None)
    arithmetic = accuracy.pop("arithmetic")
    return Evaluation(data, reused, layers, accuracy, predictions, arithmetic["path"], arithmetic)


def budget_stage(options: CheckOptions, quantized: Quantized) -> Budget:
    budget_options = memory_budget.BudgetOptions(flash_limit_bytes=options.flash_limit_bytes,
                                                 sram_limit_bytes=options.sram_limit_bytes,
                                                 flash_reserve_bytes=options.flash_reserve_bytes, **options.budget)
    return Budget(budget_options, memory_budget.analyze(quantized.quantizer.loaded, quantized.plan, budget_options))


# ---- where the accuracy goes, and the repair search -----------------------------------------------

def classification_drop(accuracy: dict) -> float | None:
    """The drop in points when the metric has one (top-1 with labels, argmax agreement without)."""
    return accuracy.get("drop_pt") if accuracy.get("metric") in ("top1", "agreement") else None


def analysis_stage(options: CheckOptions, planned: Planned, quantized: Quantized, evaluation: Evaluation,
                   budgeted: Budget) -> Analysis:
    """Rank the layers, price their repairs and, given --max-drop, search for the repair."""
    counter_options = replace(budgeted.options, what_if=False,
                              order_time_limit_s=min(budgeted.options.order_time_limit_s, REPAIR_ORDER_TIME_LIMIT_S))
    counter = repairs.ByteCounter(quantized.quantizer.loaded, counter_options)
    counter.record(quantized.plan, budgeted.result)   # the written plan is analysed once, in full
    costs = repairs.fallback_costs(quantized.quantizer, planned.options, evaluation.layers, counter)
    section, rows = sensitivity_section(options, quantized, evaluation)
    layer_keys = {}
    for row in evaluation.layers:
        keys = {}
        for key in (section["isolated_key"], section["float_key"], *section.get("row_keys", (
                "sqnr_isolated_db", "cosine_isolated", "isolated_output_sqnr_db", "sensitivity_rank"))):
            if key:
                keys[key] = rows.get(row["name"], {}).get(key)
        keys["fallback_cost_bytes"] = costs.get(row["name"])
        layer_keys[row["name"]] = keys
    repair_section, repaired = repair_search(options, planned, quantized, evaluation, section["ranking"], counter)
    return Analysis(section, layer_keys, repair_section, repaired)


def sensitivity_section(options: CheckOptions, quantized: Quantized, evaluation: Evaluation) -> tuple[dict, dict]:
    """The report section "sensitivity" and its per-layer figures (the isolated sweep on a sample of
    the evaluation data; without it, the ranking by accumulated SQNR)."""
    accuracy, layers = evaluation.accuracy, evaluation.layers
    kind = output_kind(quantized.reference)
    if not options.isolated_samples:
        isolated_key, float_key = sensitivity.metric_keys(kind, accuracy.get("metric") == "top1")
        ranking = [r["name"] for r in sorted((r for r in layers if r["precision"] != "float"),
                                             key=lambda r: r.get("sqnr_db", 0.0))]
        return {"samples_used": 0, "skipped": "isolated sweep switched off (--isolated-samples 0)",
                "isolated_key": isolated_key, "float_key": float_key, "ranking": ranking}, {}
    cap = capped(options.isolated_samples, options.eval_limit)
    sample = sample_of(evaluation.data, cap, options.seed)
    with progress_bar(len(sample), "sensitivity", options.progress) as bar:
        swept = sensitivity.sweep(quantized.reference, quantized.plan, quantized.model, layers, sample,
                                  options.batch_size, kind, accuracy.get("samples"), cap, bar, options.threads)
    rows = swept.pop("rows")
    # one switch model serves every configuration of the sweep; it runs on the float preview
    swept["evaluation_path"] = integer.evaluation_path("float", options.rounding)
    return swept, rows


def capped(samples: int, eval_limit: int | None) -> int:
    return samples if eval_limit is None else min(samples, eval_limit)


def _repair_section(target, reason: str, reached=None, drop=None) -> dict:
    return {"target_drop_pt": target, "steps": [], "drop_before_pt": drop, "final_drop_pt": drop,
            "reached": reached, "reason": reason}


def repair_search(options: CheckOptions, planned: Planned, quantized: Quantized, evaluation: Evaluation,
                  ranking: list[str], counter: repairs.ByteCounter) -> tuple[dict, PlanOptions | None]:
    """The report section "repair" and the PlanOptions the search chose (None when nothing changed)."""
    target, accuracy = repair_target(options), evaluation.accuracy
    drop = classification_drop(accuracy)
    if target is None:
        why = ("accuracy gate switched off (--no-accuracy-gate)" if not options.accuracy_gate else
               "no --max-drop given: the default gate judges the drop, the repair searches only towards a "
               "target you give")
        return _repair_section(None, f"{why}: no target to repair towards", drop=drop), None
    if drop is None:
        return _repair_section(target, "the model output is a score, not classes: there is no accuracy drop "
                                       "for --max-drop to bound"), None
    if drop <= target:
        return _repair_section(target, f"the int8 drop {drop:.2f} pt is already within the target {target:.2f} pt",
                               reached=True, drop=drop), None
    if not options.repair:
        return _repair_section(target, "repair switched off (--no-repair)", reached=False, drop=drop), None
    by_name = {row["name"]: row for row in evaluation.layers}
    ranked = [by_name[name] for name in ranking if name in by_name]
    search_data = sample_of(evaluation.data, capped(options.repair_samples, options.eval_limit), options.seed)
    meter = repairs.DropMeter(quantized.reference, search_data, options.batch_size, threads=options.threads)
    quantizer = quantized.quantizer
    with progress_bar(None, "repair", options.progress, unit="candidate") as bar:
        found = repairs.greedy_repair(quantizer, planned.options, ranked, meter, counter, target,
                                     options.flash_limit_bytes, options.sram_limit_bytes,
                                     layers_tried=options.repair_layers, max_steps=options.repair_steps,
                                     progress=lambda text: bar.update(1))
    section = {"target_drop_pt": target, "steps": found.steps, "drop_before_pt": drop, "final_drop_pt": drop,
               "reached": found.reached, "reason": found.reason,
               "search": {"samples": meter.samples, "samples_available": accuracy.get("samples"),
                          "drop_before_pt": round(found.drop_before_pt, 4),
                          "drop_after_pt": round(found.drop_after_pt, 4),
                          "layers_tried": min(options.repair_layers, len(ranked)),
                          "candidates_screened": found.candidates_screened,
                          "candidates_verified": found.candidates_verified,
                          "screen_samples": found.screen_samples,
                          "extra_calibration_passes": quantizer.extra_calibration_passes,
                          # candidates are screened on the float preview; the written model is re-measured
                          # in the selected arithmetic (repair_stage)
                          "evaluation_path": integer.evaluation_path("float", options.rounding)},
               "refused": found.refused}
    return section, (found.options if found.steps else None)


# ---- repair, verdict ------------------------------------------------------------------------------

def repair_stage(options: CheckOptions, quantized: Quantized, evaluation: Evaluation, budgeted: Budget,
                 analysis: Analysis) -> Repaired:
    """The written model carries the repair: re-measure it in full (the analysis keeps the pre-repair
    figures) and put its own figures into the repair section."""
    if analysis.repaired_options is None:
        return Repaired(quantized, evaluation, budgeted, analysis.repair)
    plan, model = quantized.quantizer.build(analysis.repaired_options)
    quantized = replace(quantized, plan=plan, model=model)
    evaluation = evaluation_stage(options, quantized, evaluation.data, evaluation.reused_calibration_data)
    budgeted = budget_stage(options, quantized)
    return Repaired(quantized, evaluation, budgeted, finished_repair(analysis.repair, evaluation, budgeted))


def finished_repair(section: dict, evaluation: Evaluation, budgeted: Budget) -> dict:
    """The repair section with the written model's figures (full evaluation set, full budget)."""
    section = dict(section)
    target, final = section["target_drop_pt"], evaluation.accuracy.get("drop_pt")
    flash_fits, sram_fits = budgeted.result.flash_fits, budgeted.result.sram_fits
    fits = flash_fits is not False and sram_fits is not False
    within = final is not None and final <= target
    searched = section.get("search", {})
    section["final_drop_pt"] = final
    section["reached"] = bool(within and fits)
    if not fits:
        section["reason"] += "; but the final budget does not fit: " + ", ".join(
            what for what, ok in (("flash", flash_fits), ("sram", sram_fits)) if ok is False)
    elif within != (searched.get("drop_after_pt", final) <= target):
        section["reason"] += (f"; on the full evaluation set ({evaluation.accuracy.get('samples')} samples) the "
                              f"drop is {final:.2f} pt, the search used {searched.get('samples')} samples")
    return section


def repair_target(options: CheckOptions) -> float | None:
    """The drop the repair searches towards: only one the user gave (a search costs minutes, and the
    default gate's job is to judge)."""
    return options.max_drop_pt if options.accuracy_gate else None


def gate_options(options: CheckOptions) -> gates.GateOptions:
    return gates.GateOptions(max_drop_pt=options.max_drop_pt, enabled=options.accuracy_gate,
                             on_upper_bound=options.gate_upper_bound, expect_float_pt=options.expect_float_pt,
                             float_tolerance_pt=options.expect_float_tolerance_pt)


def verdict_stage(options: CheckOptions, final: Repaired) -> Verdict:
    """Flash, SRAM and the accuracy gate (qfit.measure.gate: a default limit without --max-drop)."""
    fits_flash, fits_sram = final.budget.result.flash_fits, final.budget.result.sram_fits
    failed = [name for name, fits in (("flash", fits_flash), ("sram", fits_sram)) if not fits]
    judged = gates.judge(final.evaluation.accuracy, gate_options(options), options.method)
    failed += judged["failed"]
    return Verdict(fits_flash, fits_sram, judged["accuracy_ok"], judged["accuracy_gate"]["max_drop_pt"], failed,
                   1 if failed else 0, judged["accuracy_gate"], judged["float_check"], judged["warnings"])


def check_analysis_options(options: CheckOptions) -> None:
    """One-line errors for the sensitivity and repair settings."""
    if options.isolated_samples is None or options.isolated_samples < 0:
        raise QfitError(f"--isolated-samples: must be 0 (skip the sweep) or a positive number, "
                        f"got {options.isolated_samples}")
    for flag, value in (("--repair-layers", options.repair_layers), ("--repair-steps", options.repair_steps),
                        ("--repair-samples", options.repair_samples)):
        if value is None or value < 1:
            raise QfitError(f"{flag}: must be a positive number, got {value}")
    if not 0 < options.percentile <= 100:  # also refused by the CLI; the library keeps its own guard
        raise QfitError(f"--percentile: must be in (0, 100], got {options.percentile}")
    if options.seed is None or options.seed < 0:
        raise QfitError(f"--seed: must be 0 or a positive whole number, got {options.seed}")
    gates.check_gate_options(gate_options(options))
