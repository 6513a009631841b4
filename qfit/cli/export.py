"""cli export: `qfit export INT8_MODEL.onnx --out DIR` — the int8 model as C99 data + memory plan.

Writes DIR/<prefix>.h, DIR/<prefix>.c and DIR/<prefix>.json (format: docs/export.md) in one staged
step. The execution order and arena offsets are those `qfit budget` computes for the same model with
the same memory conventions. Exit 0 when written, 2 on bad input.
"""
from __future__ import annotations

import argparse
import os

EXIT_OK = 0


def add_export_options(p: argparse.ArgumentParser) -> None:
    """The options of the files themselves (shared by `qfit export` and `qfit check --export`)."""
    from qfit.report.export import ExportOptions

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
    p.add_argument("--alignment", type=int, default=4, metavar="N", help="arena alignment in bytes (default 4)")
    p.add_argument("--no-views", action="store_true", help="count Reshape/Flatten/Squeeze/Unsqueeze outputs as copies")
    p.add_argument("--no-inplace", action="store_true", help="elementwise ops never overwrite their input")
    p.add_argument("--order-time-limit", type=float, default=2.0, metavar="S",
                   help="seconds for the execution-order search (default 2)")
    p.add_argument("--no-order-search", action="store_true", help="keep the graph's node order")
    return p


def export_options_from(args):
    from qfit.report.export import ExportOptions

    options = ExportOptions(prefix=args.prefix, alignment=args.export_alignment)
    options.validate()
    return options


def run(args) -> int:
    from qfit import files
    from qfit.errors import QfitError
    from qfit.graph.load import parse_input_shapes, read_model_file
    from qfit.memory.budget import BudgetOptions
    from qfit.report.export import export_files

    options = export_options_from(args)
    if args.alignment < 1 or args.alignment & (args.alignment - 1):
        raise QfitError(f"--alignment: must be a power of two, got {args.alignment}")
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise QfitError(f"--out: {args.out} exists and is not a folder")
    files.check_output_dir(args.out)
    budget_options = BudgetOptions(alignment=args.alignment, views=not args.no_views, inplace=not args.no_inplace,
                                   order_search=not args.no_order_search, order_time_limit_s=args.order_time_limit,
                                   what_if=False)
    contents = export_files(read_model_file(args.model), args.model, args.out, options,
                            budget_options=budget_options, input_shapes=parse_input_shapes(args.input_shape))
    files.ensure_writable_dir(args.out)
    files.write_files(contents)
    print(summary_line(contents))
    return EXIT_OK


def summary_line(contents: dict[str, bytes], caution: bool = True) -> str:
    """What was written, with the two figures firmware sizes its buffers by (and the caution, unless
    the report printed just before already carries it)."""
    import json

    manifest = json.loads(next(data for path, data in contents.items() if path.endswith(".json")))
    return (f"Wrote {', '.join(contents)}: {len(manifest['layers'])} layers, {len(manifest['tensors'])} tensors, "
            f"arena {manifest['arena']['bytes']} B, parameters {manifest['flash']['param_bytes']} B in flash."
            + (f"\n{manifest['caution']}" if caution else ""))
