"""build: the check results -> the report dict (what report.json holds). The JSON schema lives here.

Every view (terminal, report.md, report.html) is rendered from this dict only (qfit.report.text,
.markdown, .html), so they cannot disagree; docs/report.md lists its top-level keys.
"""
from __future__ import annotations

import os

from qfit import __version__
from qfit.check import CheckResult, OutputPaths
from qfit.memory.budget import BudgetResult

CAUTION = ("These figures hold for the data measured and the arithmetic named above. Validate the int8 "
           "model on representative held-out data on the real device before relying on it. This report "
           "does not replace the product's own safety validation.")


def build_report(result: CheckResult) -> dict:
    """The report dict of one `qfit check` run; keys in the order report.json shows them."""
    options, final, loaded = result.options, result.final, result.loaded
    memory = final.budget.result.to_dict()
    evaluation = final.evaluation
    layers = [{**row, **result.analysis.layer_keys.get(row["name"], {})} for row in evaluation.layers]
    return {
        "tool_version": __version__,
        "model": {"path": options.model_path, **memory["model"],
                  "inputs": {n: list(loaded.shapes[n]) for n in loaded.input_names},
                  "outputs": {n: list(loaded.shapes.get(n, ())) for n in loaded.output_names},
                  "opset": loaded.original_opset, "notes": loaded.notes,
                  "float_nodes": sorted(final.quantized.plan.unsupported_nodes)},
        "quantization": quantization_section(options),
        "calibration": result.calibration.data.describe(),
        "evaluation": {**evaluation.data.describe(), "reused_calibration_data": evaluation.reused_calibration_data},
        "evaluation_path": evaluation.path,
        "arithmetic": evaluation.arithmetic,
        **{k: v for k, v in memory.items() if k != "model"},
        "accuracy": evaluation.accuracy,
        "layers": layers,
        "sensitivity": result.analysis.sensitivity,
        "repair": final.repair,
        **final.quantized.improvements,
        "verdict": result.verdict.to_dict(),
        "outputs": output_names(result.paths),
        "caution": CAUTION,
    }


def quantization_section(options) -> dict:
    return {"weights": "per-channel symmetric int8" if options.per_channel else "per-tensor symmetric int8",
            "activations": "per-tensor symmetric int8" if options.symmetric_activations else
            "per-tensor asymmetric int8",
            "bias": "int32, scale = input scale x weight scale",
            "method": options.method,
            "percentile": options.percentile if options.method == "percentile" else None}


def output_names(paths: OutputPaths) -> dict[str, str]:
    """The files written, by name inside the output folder."""
    return {key: os.path.basename(path) for key, path in paths.as_dict().items()}


def build_budget_report(model_file: str, is_qdq: bool, result: BudgetResult) -> dict:
    """The report dict of `qfit budget` (memory only): what its JSON, terminal and HTML views show."""
    failed = [name for name, fits in (("flash", result.flash_fits), ("sram", result.sram_fits)) if fits is False]
    return {"model_file": model_file, "model_kind": "qdq" if is_qdq else "float (figures as if int8)",
            **result.to_dict(),
            "verdict": {"fits_flash": result.flash_fits, "fits_sram": result.sram_fits, "failed": failed,
                        "exit_code": 1 if failed else 0}}
