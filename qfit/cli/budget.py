"""budget_cli: `qfit budget MODEL.onnx --flash SIZE --sram SIZE` — the memory verdict alone, no data.

Works on a float model (figures as if quantized to int8 by qfit's default plan) and on a QDQ model
(figures as quantized, honouring layers left float or at 16 bits). Exit 0 when both fit, 1 when
either does not, 2 on bad input (a QfitError, printed by the main CLI as one line).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile

from qfit.errors import QfitError
from qfit.sizes import parse_size

EXIT_FITS, EXIT_DOES_NOT_FIT = 0, 1


def add_parser(subparsers) -> argparse.ArgumentParser:
    p = subparsers.add_parser("budget", help="flash map, SRAM peak and arena plan of a model (float or QDQ)",
                              description="Memory only: flash map, SRAM timeline, arena plan, best execution "
                                          "order, MACs, and what would make it fit.")
    p.add_argument("model", help="ONNX model, float or QDQ")
    p.add_argument("--flash", required=True, help="flash available for the model, e.g. 1MiB")
    p.add_argument("--sram", required=True, help="SRAM available for activations, e.g. 256KiB")
    p.add_argument("--flash-reserve", default="0", help="flash kept for code and runtime (estimate)")
    p.add_argument("--input-shape", action="append", metavar="NAME=1x3x96x96",
                   help="fix the dimensions of an input (repeatable)")
    p.add_argument("--json", metavar="FILE", help="also write the figures as JSON to FILE")
    p.add_argument("--html", metavar="FILE", help="also write the figures as a self-contained HTML page to FILE")
    p.add_argument("--alignment", type=int, default=4, metavar="N", help="arena alignment in bytes (default 4)")
    p.add_argument("--no-views", action="store_true", help="count Reshape/Flatten/Squeeze/Unsqueeze outputs as copies")
    p.add_argument("--no-inplace", action="store_true", help="elementwise ops never overwrite their input")
    p.add_argument("--scratch", action="store_true", help="add an im2col-style scratch estimate for convolutions")
    p.add_argument("--order-time-limit", type=float, default=2.0, metavar="S",
                   help="seconds for the execution-order search (default 2)")
    p.add_argument("--no-order-search", action="store_true", help="keep the graph's node order")
    p.add_argument("--cycles-per-mac", type=float, metavar="X", help="for a latency estimate (with --clock-mhz)")
    p.add_argument("--clock-mhz", type=float, metavar="F", help="for a latency estimate (with --cycles-per-mac)")
    p.add_argument("--energy-per-mac-pj", type=float, metavar="E", help="for an energy estimate")
    p.add_argument("--meta-bytes-per-layer", type=int, default=0, metavar="N",
                   help="flash for each layer's metadata (estimate, default 0)")
    p.add_argument("--what-if", action="store_true", help="show what would make it fit even when it fits")
    p.add_argument("--markdown", action="store_true", help="print Markdown instead of plain text")
    return p


def options_from(args):
    from qfit.memory.budget import BudgetOptions

    if (args.cycles_per_mac is None) != (args.clock_mhz is None):
        raise QfitError("--cycles-per-mac and --clock-mhz go together (latency = MACs x cycles / clock)")
    if args.meta_bytes_per_layer < 0:
        raise QfitError(f"--meta-bytes-per-layer: must be >= 0, got {args.meta_bytes_per_layer}")
    if args.alignment < 1 or args.alignment & (args.alignment - 1):
        raise QfitError(f"--alignment: must be a power of two, got {args.alignment}")
    if args.order_time_limit < 0:
        raise QfitError(f"--order-time-limit: must be >= 0 seconds, got {args.order_time_limit}")
    return BudgetOptions(
        flash_limit_bytes=parse_size(args.flash, "--flash"),
        sram_limit_bytes=parse_size(args.sram, "--sram"),
        flash_reserve_bytes=parse_size(args.flash_reserve, "--flash-reserve"),
        meta_bytes_per_layer=args.meta_bytes_per_layer, alignment=args.alignment,
        views=not args.no_views, inplace=not args.no_inplace, scratch=args.scratch,
        order_search=not args.no_order_search, order_time_limit_s=args.order_time_limit,
        cycles_per_mac=args.cycles_per_mac, clock_mhz=args.clock_mhz,
        energy_per_mac_pj=args.energy_per_mac_pj, what_if=True if args.what_if else None)


def write_json_atomic(path: str, data: dict) -> None:
    """Write to a temporary file in the same folder, then rename: never a half-written report."""
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise QfitError(f"--json: folder {folder} does not exist")
    if os.path.isdir(path):
        raise QfitError(f"--json: {path} is a folder")
    text = json.dumps(data, indent=2, allow_nan=False) + "\n"
    try:
        fd, tmp = tempfile.mkstemp(prefix="." + os.path.basename(path) + ".", suffix=".partial", dir=folder)
    except OSError as e:
        raise QfitError(f"--json: cannot write in {folder} ({e.strerror})") from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def run(args) -> int:
    from qfit.memory import budget
    from qfit.quant import qdq_read
    from qfit.graph.load import parse_input_shapes
    from qfit.quant.plan import make_plan

    options = options_from(args)
    loaded, plan, is_qdq = qdq_read.load_any(args.model, parse_input_shapes(args.input_shape))
    if plan is None:
        plan = make_plan(loaded)
    result = budget.analyze(loaded, plan, options)
    report = {"model_file": args.model, "model_kind": "qdq" if is_qdq else "float (figures as if int8)",
              **result.to_dict()}
    if args.json:
        write_json_atomic(args.json, report)
    if args.html:
        from qfit import files
        from qfit.report import html
        folder = os.path.dirname(os.path.abspath(args.html))
        if not os.path.isdir(folder):
            raise QfitError(f"--html: folder {folder} does not exist")
        if os.path.isdir(args.html):
            raise QfitError(f"--html: {args.html} is a folder")
        files.write_text(args.html, html.render_html(report))
    kind = "QDQ model, figures as quantized" if is_qdq else "float model, figures as if quantized to int8"
    render = budget.render_markdown if args.markdown else budget.render_text
    print(f"{args.model}: {kind}\n")
    print(render(result), end="")
    verdict = {True: "fits", False: "does not fit", None: "no verdict"}[result.fits]
    print(f"\nVerdict: {verdict} (flash {'fits' if result.flash_fits else 'does not fit'}, "
          f"SRAM {'fits' if result.sram_fits else 'does not fit'})")
    return EXIT_FITS if result.fits else EXIT_DOES_NOT_FIT


def main(argv: list[str] | None = None) -> int:
    """A stand-alone entry with only the budget subcommand (qfit.cli is the real one)."""
    parser = argparse.ArgumentParser(prog="qfit")
    sub = parser.add_subparsers(dest="command", required=True)
    add_parser(sub)
    try:
        args = parser.parse_args(argv)
        return run(args)
    except QfitError as e:
        print(f"qfit: error: {e}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
