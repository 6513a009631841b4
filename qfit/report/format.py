"""format: how every view shows a figure and names a section — one function per kind of figure.

The terminal summary, report.md and report.html all format through these, so one figure never reads
two ways (a size is always `sizes.format_size`, a ratio always two decimals and "×").
"""
from __future__ import annotations

import textwrap

from qfit.sizes import format_size

LINE_WIDTH = 120            # terminal and Markdown lines stay within this
NAME_WIDTH = 48             # a longer layer or tensor name is shortened in a table cell (full in JSON/HTML)
TOP5_MIN_CLASSES = 10       # top-5 says little unless the classes are many more than 5 (common practice)
MISSING = "—"

# Section headings, the same words in every view (report.md "## ...", the terminal, report.html <h2>).
HEADINGS = {
    "verdict": "Verdict",
    "model": "Model",
    "quantization": "Quantization",
    "accuracy": "Accuracy",
    "layers": "Layers",
    "sensitivity": "Where the accuracy goes",
    "improvements": "Equalization and bias correction",
    "repair": "Repair",
    "flash": "Flash",
    "sram": "SRAM",
    "order": "Execution order",
    "macs": "MACs",
    "what_if": "What would make it fit",
    "caution": "Caution",
}

FITS_WORDS = {True: "fits", False: "does not fit", None: "no limit given"}
VERDICT_WORDS = {True: "Passes", False: "Does not pass"}
GATE_WORDS = {True: "within the gate", False: "over the gate"}
YES_NO = {True: "yes", False: "no"}


def size(n_bytes) -> str:
    return MISSING if n_bytes is None else format_size(n_bytes)


def signed_size(n_bytes) -> str:
    """A change in bytes: '+1.2 KiB', '-512 B', '0 B'."""
    if n_bytes is None:
        return MISSING
    if n_bytes == 0:
        return "0 B"
    return ("+" if n_bytes > 0 else "-") + format_size(abs(int(n_bytes)))


def headroom(n_bytes) -> str:
    return f"{format_size(n_bytes)} left" if n_bytes >= 0 else f"{format_size(-n_bytes)} over"


def ratio(value) -> str:
    return MISSING if value is None else f"{value:.2f}×"


def count(value) -> str:
    return MISSING if value is None else f"{int(value):,}"


def pct(value) -> str:
    return MISSING if value is None else f"{value:.2f} %"


def pct1(value) -> str:
    return MISSING if value is None else f"{value:.1f} %"


def pt(value) -> str:
    """A drop or a change in points, always signed."""
    return MISSING if value is None else f"{value:+.2f} pt"


def pt_abs(value) -> str:
    return MISSING if value is None else f"{value:.2f} pt"


def db(value) -> str:
    return MISSING if value is None else f"{value:.1f} dB"


def number(value, digits: int = 3) -> str:
    return MISSING if value is None else f"{value:.{digits}f}"


def dims(shape, sep: str = "x") -> str:
    return sep.join(str(d) for d in shape)


def fits(value) -> str:
    return FITS_WORDS[value]


def verdict_word(exit_code: int) -> str:
    return VERDICT_WORDS[exit_code == 0]


def short_name(name: str, width: int = NAME_WIDTH) -> str:
    """A name shortened in the middle for a fixed-width table ('/a/very/…/Conv')."""
    if len(name) <= width:
        return name
    keep = width - 1
    return name[:keep - keep // 2] + "…" + name[-(keep // 2):]


def wrap(text: str, width: int = LINE_WIDTH, indent: str = "") -> list[str]:
    """A paragraph as lines of at most `width` characters (continuation lines indented by `indent`)."""
    return textwrap.wrap(text, width=width, subsequent_indent=indent, break_long_words=True,
                         break_on_hyphens=False) or [""]


def show_top5(report: dict) -> bool:
    """Top-5 is shown only when the model has enough classes for it to mean something."""
    top5 = (report.get("accuracy") or {}).get("top5")
    shapes = list(((report.get("model") or {}).get("outputs") or {}).values())
    classes = shapes[0][-1] if shapes and shapes[0] else 0
    return bool(top5) and classes >= TOP5_MIN_CLASSES
