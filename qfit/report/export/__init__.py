"""export: an int8 QDQ model as C99 data (header + source) and a JSON manifest, with qfit's memory plan.

Library entry points: `export_files(...) -> {path: bytes}` (nothing written; the caller writes the
files in one staged step) and `build(...) -> ExportModel`. The format is described in docs/export.md.
"""
from __future__ import annotations

import os
from dataclasses import dataclass

import onnx

from qfit.errors import QfitError
from qfit.report.export.c_code import assign_names, render_header, render_source, valid_prefix
from qfit.report.export.collect import ExportModel, collect
from qfit.report.export.manifest import build_manifest

DEFAULT_ALIGNMENT = 16   # one 128-bit vector load (common practice for SIMD kernels); >= any element size


@dataclass
class ExportOptions:
    prefix: str = "qmodel"
    alignment: int = DEFAULT_ALIGNMENT

    def validate(self) -> None:
        if not valid_prefix(self.prefix):
            raise QfitError(f"--prefix: '{self.prefix}' is not a C identifier of letters, digits and single "
                            "underscores, starting with a letter, at most 24 characters")
        if self.alignment < 1 or self.alignment & (self.alignment - 1) or self.alignment > 4096:
            raise QfitError(f"--export-alignment: must be a power of two from 1 to 4096, got {self.alignment}")


def build(model: onnx.ModelProto, path: str, budget_result=None, budget_options=None,
          input_shapes: dict | None = None) -> ExportModel:
    """The export's content for the QDQ `model`. `budget_result` is the budget a report already holds
    (so the offsets are the report's); without it the budget is computed with `budget_options`."""
    from qfit.memory import budget
    from qfit.quant import qdq_read

    if not qdq_read.is_qdq_model(model):
        raise QfitError(f"export: {path}: not a QDQ model (no QuantizeLinear/DequantizeLinear); "
                        "quantize it first with qfit check")
    loaded, plan = qdq_read.read_qdq(model, path, input_shapes)
    if budget_result is None:
        budget_result = budget.analyze(loaded, plan, budget_options or budget.BudgetOptions())
    return collect(model, path, loaded, plan, budget_result)


def export_files(model: onnx.ModelProto, path: str, out_dir: str, options: ExportOptions,
                 budget_result=None, budget_options=None, input_shapes: dict | None = None) -> dict[str, bytes]:
    """{file path: bytes} of the header, the source and the manifest."""
    from qfit import files

    options.validate()
    export = build(model, path, budget_result, budget_options, input_shapes)
    if not export.layers:
        raise QfitError(f"export: {path}: the model has no layers to export")
    assign_names(export, options.prefix)
    names = {"header": f"{options.prefix}.h", "source": f"{options.prefix}.c", "manifest": f"{options.prefix}.json"}
    manifest = build_manifest(export, os.path.basename(path), options.prefix, options.alignment, names)
    for name in names.values():
        if os.path.realpath(os.path.join(out_dir, name)) == os.path.realpath(path):
            raise QfitError(f"--out: writing {os.path.join(out_dir, name)} would overwrite the input model {path}")
    return {
        os.path.join(out_dir, names["header"]): render_header(export, options.prefix, options.alignment).encode(),
        os.path.join(out_dir, names["source"]): render_source(export, options.prefix, names["header"]).encode(),
        os.path.join(out_dir, names["manifest"]): files.json_bytes(manifest),
    }
