"""cli check: `qfit check MODEL.onnx --calib DIR --flash SIZE --sram SIZE --out DIR` — the whole job.

Parses the options into qfit.check.CheckOptions (whose fields hold every default), runs the check,
builds the report dict, renders every view from report.json's own bytes and writes all files in one
staged step; then prints the terminal summary.
"""
from __future__ import annotations

import argparse
import json
import os
import sys

from qfit import files
from qfit.cli import boundary
from qfit.cli import export as export_command
from qfit.check import CheckOptions, check
from qfit.cli.arguments import add_model_and_limits, default_of
from qfit.data import Preprocess, load_preprocess, read_class_order
from qfit.errors import QfitError
from qfit.graph.load import parse_input_shapes
from qfit.measure.gate import DEFAULT_MAX_DROP_PT
from qfit.report.build import build_report
from qfit.report.export import ExportOptions
from qfit.report.html import render_html
from qfit.report.markdown import markdown
from qfit.report.text import summary_text
from qfit.sizes import parse_size


def add_parser(sub) -> argparse.ArgumentParser:
    # Over 60 lines: one flat list of options, one line each; splitting it would only scatter them.
    d = lambda name: default_of(CheckOptions, name)  # noqa: E731 - the defaults live in CheckOptions
    p = sub.add_parser("check", help="quantize to int8, measure the accuracy cost, check flash and SRAM")
    add_model_and_limits(p, "float ONNX model")
    p.add_argument("--calib", required=True, help="folder of representative inputs (images or .npy/.npz)")
    p.add_argument("--eval", help="folder of evaluation inputs (class subfolders give labels)")
    p.add_argument("--labels", help="CSV of file,label for the evaluation folder")
    p.add_argument("--out", required=True, help="output folder for the int8 model and the reports")
    p.add_argument("--method", default=d("method"), help="calibration: minmax, percentile, mse, entropy")
    p.add_argument("--percentile", type=float, default=d("percentile"), help="for --method percentile")
    p.add_argument("--per-tensor", action="store_true", help="per-tensor weight scales (for comparison)")
    p.add_argument("--symmetric", action="store_true", help="symmetric activations (zero point 0)")
    p.add_argument("--max-drop", type=float, metavar="PT",
                   help=f"accuracy gate: largest allowed top-1 drop (argmax disagreement without labels), in points; "
                        f"without it the default {DEFAULT_MAX_DROP_PT:g} pt gates")
    p.add_argument("--no-accuracy-gate", action="store_true",
                   help="no accuracy gate at all: the verdict judges flash and SRAM only")
    p.add_argument("--gate-upper-bound", action="store_true",
                   help="gate the upper end of the drop's 95 %% interval instead of the estimate")
    p.add_argument("--expect-float", type=float, metavar="PCT",
                   help="float top-1 measured in training, in percent: a measured float further away fails")
    p.add_argument("--expect-float-tolerance", type=float, default=d("expect_float_tolerance_pt"), metavar="PT",
                   help="how far the measured float top-1 may be from --expect-float, in points")
    p.add_argument("--class-order", metavar="NAMES|FILE",
                   help="class names in the model's output order: comma-separated, or a file with one per line "
                        "(needed when --labels gives class names)")
    p.add_argument("--threshold", type=float, help="decision threshold for score/reconstruction outputs")
    p.add_argument("--preprocess", help="JSON file: size, resize, color, layout, scale, mean, std")
    p.add_argument("--size", help="image target size HxW, e.g. 96x96")
    p.add_argument("--color", choices=["RGB", "BGR", "L"], help="image colour mode")
    p.add_argument("--layout", choices=["NCHW", "NHWC"], help="input layout")
    p.add_argument("--scale", type=float, help="pixel scale (x = pixel*scale, then (x-mean)/std)")
    p.add_argument("--mean", help="comma-separated per-channel mean")
    p.add_argument("--std", help="comma-separated per-channel std")
    p.add_argument("--limit", type=int, help="use at most N calibration files (seeded sample)")
    p.add_argument("--eval-limit", type=int, help="use at most N evaluation files (seeded sample)")
    p.add_argument("--seed", type=int, default=d("seed"), help="seed for --limit sampling")
    p.add_argument("--batch", type=int, default=d("batch_size"), help="samples per onnxruntime run")
    p.add_argument("--threads", type=int, default=d("threads"), help="onnxruntime threads (0 = its default)")
    p.add_argument("--arithmetic", default=d("arithmetic"), choices=["integer", "float"],
                   help="int8 figures from integer arithmetic as MCU kernels run it (default), or the faster "
                        "float preview (onnxruntime, QDQ fusion off)")
    p.add_argument("--rounding", default=d("rounding"), choices=["double", "single"],
                   help="requantization rounding of the integer path: double (doubling high multiply, then "
                        "rounding shift; default) or single (one rounding)")
    p.add_argument("--skip-bad", action="store_true", help="skip unreadable data files (counted in the report)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.add_argument("--equalize", action="store_true",
                   help="cross-layer equalization + bias absorption before quantizing (Nagel et al. 2019)")
    p.add_argument("--bias-correction", action="store_true",
                   help="correct each layer's bias for its weight rounding, from the calibration data")
    p.add_argument("--isolated-samples", type=int, default=d("isolated_samples"), metavar="N",
                   help="evaluation samples for the one-layer-at-a-time sweep (0 = skip it)")
    p.add_argument("--no-repair", action="store_true", help="do not search repairs when the drop exceeds --max-drop")
    p.add_argument("--repair-layers", type=int, default=d("repair_layers"), metavar="N",
                   help="most sensitive layers the repair tries")
    p.add_argument("--repair-steps", type=int, default=d("repair_steps"), metavar="N",
                   help="repair steps accepted at most")
    p.add_argument("--repair-samples", type=int, default=d("repair_samples"), metavar="N",
                   help="evaluation samples the repair search measures on")
    p.add_argument("--export", metavar="DIR",
                   help="also write the int8 model as C99 data with the report's memory plan into DIR (qfit export)")
    export_command.add_export_options(p)
    return p


def preprocess_from(args) -> Preprocess | None:
    pre = load_preprocess(args.preprocess) if args.preprocess else None
    overrides = {}
    if args.size:
        try:
            h, w = (int(v) for v in args.size.lower().split("x"))
        except ValueError:
            raise QfitError(f"--size: cannot read '{args.size}' (expected HxW, e.g. 96x96)") from None
        overrides["size"] = (h, w)
    for key in ("color", "layout", "scale"):
        if getattr(args, key) is not None:
            overrides[key] = getattr(args, key)
    for key in ("mean", "std"):
        text = getattr(args, key)
        if text is not None:
            try:
                overrides[key] = tuple(float(v) for v in text.split(","))
            except ValueError:
                raise QfitError(f"--{key}: cannot read '{text}' as comma-separated numbers") from None
    if not overrides:
        return pre
    base = pre or Preprocess()
    for key, value in overrides.items():
        setattr(base, key, value)
    return base


def options_from(args) -> CheckOptions:
    if not os.path.exists(args.calib):
        raise QfitError(f"--calib: {args.calib}: no such folder")
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise QfitError(f"--out: {args.out} exists and is not a folder")
    return CheckOptions(
        model_path=args.model, calib_dir=args.calib, out_dir=args.out,
        flash_limit_bytes=parse_size(args.flash, "--flash"), sram_limit_bytes=parse_size(args.sram, "--sram"),
        eval_dir=args.eval, labels_csv=args.labels, flash_reserve_bytes=parse_size(args.flash_reserve, "--flash-reserve"),
        method=args.method, percentile=args.percentile, input_shapes=parse_input_shapes(args.input_shape),
        preprocess=preprocess_from(args), limit=args.limit, eval_limit=args.eval_limit, seed=args.seed,
        batch_size=max(1, args.batch), threads=args.threads, arithmetic=args.arithmetic, rounding=args.rounding,
        per_channel=not args.per_tensor,
        symmetric_activations=args.symmetric, max_drop_pt=args.max_drop, accuracy_gate=not args.no_accuracy_gate,
        gate_upper_bound=args.gate_upper_bound, expect_float_pt=args.expect_float,
        expect_float_tolerance_pt=args.expect_float_tolerance,
        class_order=read_class_order(args.class_order) if args.class_order is not None else None,
        threshold=args.threshold,
        skip_bad=args.skip_bad, progress=not args.quiet and sys.stderr.isatty(), equalize=args.equalize,
        bias_correction=args.bias_correction, isolated_samples=args.isolated_samples, repair=not args.no_repair,
        repair_layers=args.repair_layers, repair_steps=args.repair_steps, repair_samples=args.repair_samples)


def run(args) -> int:
    options = options_from(args)
    boundary.check_check_outputs(args)
    export_options = export_command.export_options_from(args) if args.export else None
    if not args.export:
        given = [flag for flag, value, default in (("--prefix", args.prefix, ExportOptions.prefix),
                                                   ("--export-alignment", args.export_alignment,
                                                    ExportOptions.alignment)) if value != default]
        if given:
            raise QfitError(f"{given[0]}: applies to the C export only; add --export DIR")
    if args.export:
        files.check_output_folder(args.export, "--export", inputs=[args.calib, args.eval])
    result = check(options)
    paths = result.paths
    report_bytes = files.json_bytes(build_report(result))
    # Every view is rendered from report.json's own bytes (it cannot show another figure), and
    # everything is written in one staged step, so a refusal or an interrupt at any point leaves
    # --out as it was (the folder is only created now).
    report = json.loads(report_bytes)
    contents = {paths.model: result.quantized.model.SerializeToString(),
                paths.report_md: files.text_bytes(markdown(report)),
                paths.report_json: report_bytes,
                paths.report_html: files.text_bytes(render_html(report))}
    exported = {}
    if args.export:   # the budget the report holds: the export's offsets are the report's arena plan
        exported = export_command.export_files(result.quantized.model, paths.model, args.export, export_options,
                                budget_result=result.final.budget.result)
        files.ensure_writable_dir(args.export, "--export")
    files.ensure_writable_dir(args.out)
    files.write_files({**contents, **exported})
    print(summary_text(report))
    print(f"\nWrote {paths.model}, {paths.report_json}, {paths.report_md}, {paths.report_html}")
    if exported:
        print(export_command.summary_line(exported, caution=False))
    return result.exit_code
