"""cli export: `qfit export INT8_MODEL.onnx --out DIR` — the int8 model as C99 data + memory plan.

Writes DIR/<prefix>.h, DIR/<prefix>.c and DIR/<prefix>.json (format: docs/export.md) in one staged
step. The execution order and arena offsets are those `qfit budget` computes for the same model with
the same memory conventions. Exit 0 when written, 2 on bad input.
"""
from __future__ import annotations

import argparse
import json
import os

from qfit import files
from qfit.cli.arguments import add_arena_options, arena_options
from qfit.errors import QfitError
from qfit.graph.load import parse_input_shapes, read_model_file
from qfit.memory.budget import BudgetOptions
from qfit.report.export import ExportOptions, export_files

EXIT_OK = 0


def add_export_options(p: argparse.ArgumentParser) -> None:
    """The options of the files themselves (shared by `qfit export` and `qfit check --export`)."""
    p.add_argument("--prefix", default=ExportOptions.prefix,
                   help=f"C name prefix and file name stem (default {ExportOptions.prefix})")
    p.add_argument("--export-alignment", type=int, default=ExportOptions.alignment, metavar="N",
                   help=f"alignment of every parameter array in bytes (default {ExportOptions.alignment})")


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser("export", help="write an int8 QDQ model as a C99 header/source pair and a JSON manifest",
                       description="The int8 model as C data for firmware: weights, biases, per-channel "
                                   "multipliers and shifts, a layer table in execution order and a tensor "
                                   "table at the arena offsets of qfit's memory plan. No kernels.")
    p.add_argument("model", help="int8 QDQ ONNX model (as qfit check writes it)")
    p.add_argument("--out", required=True, help="output folder")
    add_export_options(p)
    p.add_argument("--input-shape", action="append", metavar="NAME=1x3x96x96",
                   help="fix the dimensions of an input (repeatable)")
    add_arena_options(p, BudgetOptions)
    return p


def export_options_from(args) -> ExportOptions:
    options = ExportOptions(prefix=args.prefix, alignment=args.export_alignment)
    options.validate()
    return options


def run(args) -> int:
    options = export_options_from(args)
    budget_options = BudgetOptions(what_if=False, **arena_options(args))
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise QfitError(f"--out: {args.out} exists and is not a folder")
    files.check_output_dir(args.out)
    contents = export_files(read_model_file(args.model), args.model, args.out, options,
                            budget_options=budget_options, input_shapes=parse_input_shapes(args.input_shape))
    files.ensure_writable_dir(args.out)
    files.write_files(contents)
    print(summary_line(contents))
    return EXIT_OK


def summary_line(contents: dict[str, bytes], caution: bool = True) -> str:
    """What was written, with the two figures firmware sizes its buffers by (and the caution, unless
    the report printed just before already carries it)."""
    manifest = json.loads(next(data for path, data in contents.items() if path.endswith(".json")))
    return (f"Wrote {', '.join(contents)}: {len(manifest['layers'])} layers, {len(manifest['tensors'])} tensors, "
            f"arena {manifest['arena']['bytes']} B, parameters {manifest['flash']['param_bytes']} B in flash."
            + (f"\n{manifest['caution']}" if caution else ""))
