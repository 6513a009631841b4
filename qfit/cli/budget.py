"""cli budget: `qfit budget MODEL.onnx --flash SIZE --sram SIZE` — the memory verdict alone, no data.

Works on a float model (figures as if quantized to int8 by qfit's default plan) and on a QDQ model
(figures as quantized, honouring layers left float or at 16 bits). Exit 0 when both fit, 1 when
either does not, 2 on bad input (a QfitError, printed by qfit.cli.main as one line).
"""
from __future__ import annotations

import argparse
import json

from qfit import files
from qfit.cli import boundary
from qfit.cli.arguments import add_arena_options, add_model_and_limits, arena_options, default_of
from qfit.errors import QfitError
from qfit.graph.load import parse_input_shapes
from qfit.memory import budget
from qfit.quant import qdq_read
from qfit.quant.plan import make_plan
from qfit.report.build import build_budget_report
from qfit.report.html import render_html
from qfit.report.markdown import markdown
from qfit.report.text import summary_text
from qfit.sizes import parse_size


def add_parser(subparsers) -> argparse.ArgumentParser:
    d = lambda name: default_of(budget.BudgetOptions, name)  # noqa: E731 - the defaults live in BudgetOptions
    p = subparsers.add_parser("budget", help="flash map, SRAM peak and arena plan of a model (float or QDQ)",
                              description="Memory only: flash map, SRAM timeline, arena plan, best execution "
                                          "order, MACs, and what would make it fit.")
    add_model_and_limits(p, "ONNX model, float or QDQ")
    p.add_argument("--json", metavar="FILE", help="also write the figures as JSON to FILE")
    p.add_argument("--html", metavar="FILE", help="also write the figures as a self-contained HTML page to FILE")
    add_arena_options(p, budget.BudgetOptions)
    p.add_argument("--scratch", action="store_true", help="add an im2col-style scratch estimate for convolutions")
    p.add_argument("--cycles-per-mac", type=float, metavar="X", help="for a latency estimate (with --clock-mhz)")
    p.add_argument("--clock-mhz", type=float, metavar="F", help="for a latency estimate (with --cycles-per-mac)")
    p.add_argument("--energy-per-mac-pj", type=float, metavar="E", help="for an energy estimate")
    p.add_argument("--meta-bytes-per-layer", type=int, default=d("meta_bytes_per_layer"), metavar="N",
                   help=f"flash for each layer's metadata (estimate, default {d('meta_bytes_per_layer')})")
    p.add_argument("--what-if", action="store_true", help="show what would make it fit even when it fits")
    p.add_argument("--markdown", action="store_true", help="print Markdown instead of plain text")
    return p


def options_from(args) -> budget.BudgetOptions:
    if (args.cycles_per_mac is None) != (args.clock_mhz is None):
        raise QfitError("--cycles-per-mac and --clock-mhz go together (latency = MACs x cycles / clock)")
    if args.meta_bytes_per_layer < 0:
        raise QfitError(f"--meta-bytes-per-layer: must be >= 0, got {args.meta_bytes_per_layer}")
    return budget.BudgetOptions(
        flash_limit_bytes=parse_size(args.flash, "--flash"),
        sram_limit_bytes=parse_size(args.sram, "--sram"),
        flash_reserve_bytes=parse_size(args.flash_reserve, "--flash-reserve"),
        meta_bytes_per_layer=args.meta_bytes_per_layer, scratch=args.scratch,
        cycles_per_mac=args.cycles_per_mac, clock_mhz=args.clock_mhz,
        energy_per_mac_pj=args.energy_per_mac_pj, what_if=True if args.what_if else None, **arena_options(args))


def run(args) -> int:
    options = options_from(args)
    boundary.check_budget_outputs(args)
    loaded, plan, is_qdq = qdq_read.load_any(args.model, parse_input_shapes(args.input_shape))
    if plan is None:
        plan = make_plan(loaded)
    result = budget.analyze(loaded, plan, options)
    report_bytes = files.json_bytes(build_budget_report(args.model, is_qdq, result))
    report = json.loads(report_bytes)   # every view from the JSON's own bytes, as `qfit check` does
    contents = {}
    if args.json:
        contents[args.json] = report_bytes
    if args.html:
        contents[args.html] = files.text_bytes(render_html(report))
    if contents:
        files.write_files(contents)
    print(markdown(report) if args.markdown else summary_text(report))
    return report["verdict"]["exit_code"]
