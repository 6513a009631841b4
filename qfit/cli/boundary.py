"""boundary: where the command line meets the user: options refused at the parser, one-line
messages, and a standard output that may be closed or full.

Numeric options. argparse's `type=float` accepts "nan", "inf" and "1e999"; none of them is a setting (a NaN percentile
or clock would reach report.json as a figure JSON cannot hold), so every float option must be finite.
The ranges below are those where an option means something; the maxima are stated in the messages
and in docs/bad-input.md.
"""
from __future__ import annotations

import argparse
import io
import math
import os
import re
import sys

from qfit.errors import QfitError
from qfit.runtime.sessions import MAX_THREADS

MAX_BATCH = 65536      # samples per onnxruntime run; more only multiplies memory


def _flag(dest: str) -> str:
    return "--" + dest.replace("_", "-")


def _positive(args, dest: str, maximum: float | None = None, strict: bool = True) -> None:
    value = getattr(args, dest, None)
    if value is None:
        return
    low_ok = value > 0 if strict else value >= 0
    if not low_ok or (maximum is not None and value > maximum):
        bound = f"{'more than' if strict else 'at least'} 0" + (f" and at most {maximum}" if maximum is not None else "")
        raise QfitError(f"{_flag(dest)}: must be {bound}, got {value}")


def check_options(args: argparse.Namespace) -> None:
    """One-line refusals for numeric options outside their meaning (see the module docstring)."""
    for dest, value in sorted(vars(args).items()):
        if isinstance(value, float) and not math.isfinite(value):
            raise QfitError(f"{_flag(dest)}: must be a finite number, got {value}")
    percentile = getattr(args, "percentile", None)
    if percentile is not None and not 0 < percentile <= 100:
        raise QfitError(f"--percentile: must be in (0, 100] (a percentage of values kept), got {percentile}")
    seed = getattr(args, "seed", None)
    if seed is not None and seed < 0:
        raise QfitError(f"--seed: must be 0 or a positive whole number, got {seed}")
    threads = getattr(args, "threads", None)
    if threads is not None and not 0 <= threads <= MAX_THREADS:
        raise QfitError(f"--threads: must be between 0 (onnxruntime's default) and {MAX_THREADS}, got {threads}")
    _positive(args, "batch", MAX_BATCH)
    for dest in ("cycles_per_mac", "clock_mhz", "energy_per_mac_pj"):
        _positive(args, dest)
    _positive(args, "order_time_limit", strict=False)
    for flag, dest in (("--flash", "flash"), ("--sram", "sram")):
        text = getattr(args, dest, None)
        if text is not None:
            from qfit.sizes import parse_size
            if parse_size(text, flag) == 0:
                raise QfitError(f"{flag}: must be more than 0 bytes, got '{text}'")


# ---- messages ---------------------------------------------------------------------------------------

MAX_MESSAGE_CHARS = 400  # one line a person reads; a 20 KB node list is not a message
_ADDRESS = re.compile(r"\s*\bat 0x[0-9a-fA-F]+|\b0x[0-9a-fA-F]{8,}\b")


def user_message(text: str) -> str:
    """A refusal as the user sees it: names spelled as in the reports, no memory addresses
    (`<object at 0x7f...>` says nothing to them and changes from run to run), capped in length with
    the cut marked."""
    from qfit.files import printable_text
    text = _ADDRESS.sub("", printable_text(text))  # a non-UTF-8 file name shows as \xff, as in the reports
    if len(text) > MAX_MESSAGE_CHARS:
        cut = f"... ({len(text)} characters)"
        text = text[:MAX_MESSAGE_CHARS - len(cut)] + cut
    return text


# ---- standard output --------------------------------------------------------------------------------

class GuardedStdout(io.TextIOBase):
    """sys.stdout for the CLI. Each write is flushed at once, so a failure surfaces inside `main`
    (not at interpreter exit, as an "Exception ignored" traceback):

    * the reader went away (`qfit ... | head -1`): the rest of the summary is dropped quietly and
      the run ends with its own exit code (its files are written before the summary is printed);
    * any other write error (`> /dev/full`): a one-line refusal, exit 2.

    Names from the file system that are not UTF-8 (surrogate escapes) are printed as \\xNN.
    """

    def __init__(self, inner):
        self.inner = inner
        self.closed_by_reader = False

    def writable(self) -> bool:
        return True

    def fileno(self) -> int:
        return self.inner.fileno()

    def isatty(self) -> bool:
        return self.inner.isatty()

    def write(self, text: str) -> int:
        if self.closed_by_reader:
            return len(text)
        from qfit.files import printable_text
        try:
            self.inner.write(printable_text(text))
            self.inner.flush()
        except BrokenPipeError:
            self._drop_output()
        except OSError as e:
            self._drop_output()
            raise QfitError(f"standard output: cannot write the summary ({e.strerror or e})") from None
        return len(text)

    def flush(self) -> None:
        if not self.closed_by_reader:
            try:
                self.inner.flush()
            except OSError:
                self._drop_output()

    def _drop_output(self) -> None:
        """Point file descriptor 1 at /dev/null, so that the data still buffered (and anything the
        interpreter flushes at exit) goes nowhere instead of raising again."""
        self.closed_by_reader = True
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, self.inner.fileno())
            os.close(devnull)
        except (OSError, ValueError, io.UnsupportedOperation):
            pass


def guard_stdout() -> None:
    """Install GuardedStdout over sys.stdout (once)."""
    if not isinstance(sys.stdout, GuardedStdout) and sys.stdout is not None:
        sys.stdout = GuardedStdout(sys.stdout)


# ---- output files -----------------------------------------------------------------------------------

def check_budget_outputs(args: argparse.Namespace) -> None:
    """`qfit budget --json/--html`: each must be a regular or new file, neither the model nor the
    other output (checked before the model is read, so a refusal changes nothing)."""
    from qfit import files

    wanted = [(flag, path) for flag, path in (("--json", getattr(args, "json", None)),
                                              ("--html", getattr(args, "html", None))) if path]
    for flag, path in wanted:
        files.check_output_file(path, flag, inputs=[args.model])
    if len(wanted) == 2 and os.path.abspath(wanted[0][1]) == os.path.abspath(wanted[1][1]):
        raise QfitError(f"--json and --html: both name {wanted[0][1]}; give two files")


REPORT_NAMES = ("report.json", "report.md", "report.html")
MODEL_SUFFIX = "_int8.onnx"


def check_check_outputs(args: argparse.Namespace) -> None:
    """`qfit check --out`: a folder that can be created or written, not inside a data folder, and
    holding no input file under a name qfit writes there (the model's int8 copy, the reports)."""
    from qfit import files

    data_folders = [getattr(args, "calib", None), getattr(args, "eval", None)]
    files.check_output_folder(args.out, "--out", inputs=data_folders)
    out_real = os.path.realpath(args.out)
    for flag in ("model", "labels", "preprocess", "class_order"):
        given = getattr(args, flag, None)
        if not given:
            continue
        real = os.path.realpath(given)
        name = os.path.basename(real)
        if os.path.dirname(real) == out_real and (name in REPORT_NAMES or name.endswith(MODEL_SUFFIX)):
            what = "model" if flag == "model" else f"file {given} (--{flag.replace('_', '-')})"
            raise QfitError(f"--out: writing {os.path.join(args.out, name)} would overwrite the input "
                            f"{what if flag != 'model' else 'model ' + given}")
