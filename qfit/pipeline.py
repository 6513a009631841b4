"""check: the whole job in one call — load, observe, quantize, evaluate, budget, report.

`check(options)` returns a CheckResult whose `report` dict is what report.json holds; the CLI only
parses arguments, calls this, writes files and prints the summary. Each stage is a plain function so
tests and later features can call them one by one.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field

import numpy as np
import onnx
from tqdm import tqdm

from qfit import __version__
from qfit.compare import EndMetrics, ErrorSums
from qfit.data import DataFolder, Preprocess
from qfit.errors import QfitError
from qfit.load import LoadedModel, load_model
from qfit.observe import DEFAULT_PERCENTILE, TensorStats, observe
from qfit.plan import METHODS, Plan, PlanOptions, make_plan
from qfit.quantize import QuantizedModel, build_qdq, calibrated_ranges
from qfit.run import FAITHFUL_PATH, Runner

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
              progress: bool = True) -> dict[str, TensorStats]:
    """One streaming pass of the float model, collecting range statistics for every quantizer."""
    tensors = plan.calibrated_tensors()
    runner = Runner(loaded.model, tensors, batch_size=batch_size)
    with _bar(len(data), "calibrating", progress) as bar:
        stats = observe(runner, data.batches(batch_size), tensors, bar)
    bad = [name for name, s in stats.items() if s.nonfinite]
    if bad:
        raise QfitError(f"calibration: tensor '{bad[0]}' took NaN or Inf values on the calibration data "
                        f"({len(bad)} tensors affected)")
    empty = [name for name, s in stats.items() if s.count == 0]
    if empty:
        raise QfitError(f"calibration: no values were observed for tensor '{empty[0]}'")
    return stats


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
    with _bar(len(data), "evaluating", progress) as bar:
        for batch in data.batches(batch_size):
            reference = float_runner(batch.inputs)
            got = int8_runner(batch.inputs)
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
            bar.update(len(batch.files))
    return metrics.result(), sums


def weight_bytes_by_node(loaded: LoadedModel, plan: Plan) -> dict[str, int]:
    totals: dict[str, int] = {}
    for (node, _), wq in plan.weights.items():
        totals[node] = totals.get(node, 0) + int(loaded.constants[wq.tensor].size) * wq.bits // 8
    return totals


def output_paths(options: CheckOptions) -> dict[str, str]:
    """The files a check writes into the output folder, keyed as in the report's "outputs"."""
    stem = os.path.splitext(os.path.basename(options.model_path))[0]
    return {"model": os.path.join(options.out_dir, f"{stem}_int8.onnx"),
            "report_json": os.path.join(options.out_dir, "report.json"),
            "report_md": os.path.join(options.out_dir, "report.md")}


def check(options: CheckOptions) -> CheckResult:
    """Run the whole job; raise QfitError for bad input."""
    if options.method not in METHODS:
        raise QfitError(f"--method: unknown method '{options.method}' (choose from {', '.join(METHODS)})")
    model_file = output_paths(options)["model"]
    model_real = os.path.realpath(options.model_path)
    for path in output_paths(options).values():
        # checked before any work: the input model must never be replaced by an output
        if os.path.realpath(path) == model_real:
            raise QfitError(f"--out: writing {path} would overwrite the input model {options.model_path}")
    loaded = load_model(options.model_path, options.input_shapes)
    plan = make_plan(loaded, PlanOptions(per_channel=options.per_channel,
                                         symmetric_activations=options.symmetric_activations))
    calib = open_data(options.calib_dir, loaded, options, "calibration", limit=options.limit)
    stats = calibrate(loaded, plan, calib, options.batch_size, options.progress)
    ranges = calibrated_ranges(plan, stats, options.method, options.percentile)
    quantized = build_qdq(loaded, plan, ranges)
    try:
        onnx.checker.check_model(quantized.model)
    except Exception as e:  # a bug in qfit, not the user's input: let it surface with context
        raise RuntimeError(f"the written QDQ model fails the ONNX checker: {e}") from e

    reused = options.eval_dir is None or os.path.abspath(options.eval_dir) == os.path.abspath(options.calib_dir)
    eval_data = open_data(options.eval_dir or options.calib_dir, loaded, options, "evaluation",
                          labels_csv=options.labels_csv, limit=options.eval_limit)
    layers = compared_layers(loaded, plan)
    accuracy, sums = evaluate(loaded, quantized, layers, eval_data, options.batch_size, options.threshold,
                              options.progress)

    from qfit import budget as budget_module
    budget_options = budget_module.BudgetOptions(flash_limit_bytes=options.flash_limit_bytes,
                                                 sram_limit_bytes=options.sram_limit_bytes,
                                                 flash_reserve_bytes=options.flash_reserve_bytes,
                                                 **options.budget)
    budget_result = budget_module.analyze(loaded, plan, budget_options)
    memory = budget_result.to_dict()

    weight_bytes = weight_bytes_by_node(loaded, plan)
    for row in layers:
        row["weight_bytes_int8"] = weight_bytes.get(row["name"], 0)
        row.update(sums[row["tensor"]].to_dict())

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

