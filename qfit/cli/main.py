"""cli: argparse over the library. `qfit check` runs the whole job; `qfit budget` the memory part."""
from __future__ import annotations

import argparse
import json
import os
import signal
import sys

from qfit import __version__
from qfit.errors import QfitError
from qfit.sizes import parse_size

EXIT_OK, EXIT_FAIL, EXIT_BAD_INPUT = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line on stderr and exit 2."""

    def error(self, message):
        raise QfitError(f"{self.prog}: {message}")


def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("model", help="float ONNX model")
    p.add_argument("--flash", required=True, help="flash available for the model, e.g. 1MiB")
    p.add_argument("--sram", required=True, help="SRAM available for activations, e.g. 256KiB")
    p.add_argument("--flash-reserve", default="0", help="flash kept for code and runtime (estimate)")
    p.add_argument("--input-shape", action="append", metavar="NAME=1x3x96x96",
                   help="fix the dimensions of an input (repeatable)")


def _check_parser(sub) -> None:
    p = sub.add_parser("check", help="quantize to int8, measure the accuracy cost, check flash and SRAM")
    _add_common(p)
    p.add_argument("--calib", required=True, help="folder of representative inputs (images or .npy/.npz)")
    p.add_argument("--eval", help="folder of evaluation inputs (class subfolders give labels)")
    p.add_argument("--labels", help="CSV of file,label for the evaluation folder")
    p.add_argument("--out", required=True, help="output folder for the int8 model and the reports")
    p.add_argument("--method", default="percentile", help="calibration: minmax, percentile, mse, entropy")
    p.add_argument("--percentile", type=float, default=99.99, help="for --method percentile")
    p.add_argument("--per-tensor", action="store_true", help="per-tensor weight scales (for comparison)")
    p.add_argument("--symmetric", action="store_true", help="symmetric activations (zero point 0)")
    p.add_argument("--max-drop", type=float, metavar="PT", help="accuracy gate: largest allowed drop, in points")
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
    p.add_argument("--seed", type=int, default=0, help="seed for --limit sampling")
    p.add_argument("--batch", type=int, default=16, help="samples per onnxruntime run")
    p.add_argument("--threads", type=int, default=0, help="onnxruntime threads (0 = its default)")
    p.add_argument("--skip-bad", action="store_true", help="skip unreadable data files (counted in the report)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    p.add_argument("--equalize", action="store_true",
                   help="cross-layer equalization + bias absorption before quantizing (Nagel et al. 2019)")
    p.add_argument("--bias-correction", action="store_true",
                   help="correct each layer's bias for its weight rounding, from the calibration data")
    p.add_argument("--isolated-samples", type=int, default=64, metavar="N",
                   help="evaluation samples for the one-layer-at-a-time sweep (0 = skip it)")
    p.add_argument("--no-repair", action="store_true", help="do not search repairs when the drop exceeds --max-drop")
    p.add_argument("--repair-layers", type=int, default=8, metavar="N", help="most sensitive layers the repair tries")
    p.add_argument("--repair-steps", type=int, default=12, metavar="N", help="repair steps accepted at most")
    p.add_argument("--repair-samples", type=int, default=1000, metavar="N",
                   help="evaluation samples the repair search measures on")


def _preprocess_from(args):
    from qfit.data import Preprocess, load_preprocess

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


def _run_check(args) -> int:
    from qfit import files
    from qfit.report import html
    from qfit import check as pipeline
    from qfit.report import text as report_module
    from qfit.memory import budget
    from qfit.graph.load import parse_input_shapes
    from qfit.runtime.sessions import set_threads

    flash = parse_size(args.flash, "--flash")
    sram = parse_size(args.sram, "--sram")
    reserve = parse_size(args.flash_reserve, "--flash-reserve")
    if not os.path.exists(args.calib):
        raise QfitError(f"--calib: {args.calib}: no such folder")
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise QfitError(f"--out: {args.out} exists and is not a folder")
    set_threads(args.threads)
    options = pipeline.CheckOptions(
        model_path=args.model, calib_dir=args.calib, out_dir=args.out, flash_limit_bytes=flash,
        sram_limit_bytes=sram, eval_dir=args.eval, labels_csv=args.labels, flash_reserve_bytes=reserve,
        method=args.method, percentile=args.percentile, input_shapes=parse_input_shapes(args.input_shape),
        preprocess=_preprocess_from(args), limit=args.limit, eval_limit=args.eval_limit, seed=args.seed,
        batch_size=max(1, args.batch), per_channel=not args.per_tensor, symmetric_activations=args.symmetric,
        max_drop_pt=args.max_drop, threshold=args.threshold, skip_bad=args.skip_bad,
        progress=not args.quiet and sys.stderr.isatty(), equalize=args.equalize,
        bias_correction=args.bias_correction, isolated_samples=args.isolated_samples, repair=not args.no_repair,
        repair_layers=args.repair_layers, repair_steps=args.repair_steps, repair_samples=args.repair_samples)
    files.check_output_dir(args.out)
    result = pipeline.check(options)
    sections = {"text": [budget.render_text(result.budget)], "markdown": [budget.render_markdown(result.budget)]}
    # Everything is rendered first and written in one staged step, so a refusal or an interrupt at
    # any point leaves --out as it was (the folder is only created now).
    contents = {result.model_file: result.quantized.model.SerializeToString(),
                os.path.join(args.out, "report.md"):
                    report_module.markdown(result.report, sections["markdown"]).encode("utf-8"),
                os.path.join(args.out, "report.json"): files.json_bytes(result.report)}
    # report.html is rendered from report.json's own bytes: the page cannot show another figure.
    report_json = json.loads(contents[os.path.join(args.out, "report.json")])
    contents[os.path.join(args.out, "report.html")] = html.render_html(report_json).encode("utf-8")
    files.ensure_writable_dir(args.out)
    files.write_files(contents)
    print(report_module.summary_text(result.report, sections["text"]))
    print(f"\nWrote {result.model_file}, {os.path.join(args.out, 'report.json')}, "
          f"{os.path.join(args.out, 'report.md')}, {os.path.join(args.out, 'report.html')}")
    return result.exit_code


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="qfit", description="int8 post-training quantization with a microcontroller fit verdict")
    parser.add_argument("--version", action="version", version=f"qfit {__version__}")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser)
    _check_parser(sub)
    try:
        from qfit.cli import budget as budget_cli
        budget_cli.add_parser(sub)
    except ImportError:
        pass
    return parser


def _one_line(message: str) -> str:
    """Escape what would break the line or drive the terminal: a quoted value or file name can hold
    a line break (also \x85, \u2028) or an escape sequence."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in message)


def _on_signal(signum, frame):
    raise KeyboardInterrupt


def main(argv: list[str] | None = None) -> int:
    # A shell starting qfit as a background job (as CI does) ignores SIGINT for it; install the
    # handler explicitly so an interrupt always ends the run cleanly.
    signal.signal(signal.SIGTERM, _on_signal)
    signal.signal(signal.SIGINT, _on_signal)
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if args.command == "check":
            return _run_check(args)
        if args.command == "budget":
            from qfit.cli import budget as budget_cli
            return budget_cli.run(args)
        parser.print_help()
        return EXIT_BAD_INPUT
    except QfitError as e:
        print(f"qfit: error: {_one_line(str(e))}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("qfit: interrupted; no partial output was left", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
