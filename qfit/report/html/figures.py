"""figures: how report.html finds and shows a figure — JSON paths, display formats, tagged elements.

Every figure on the page is looked up by its JSON path in the report dict, and the element showing it
carries the path in `data-key`, the raw JSON value in `data-value` and how it was displayed in
`data-format` (see FORMATS), so a test can check the page against the JSON figure by figure.
Paths are the JSON keys and list indices joined by "."; a "." or "~" inside a key is written "~1" or
"~0" (as JSON Pointer escapes "/"). The display formats are those of qfit.report.format, shared with
the terminal and report.md.
"""
from __future__ import annotations

import json
from html import escape

from qfit.report import format as fmt

MISSING = fmt.MISSING

# ---- JSON paths -----------------------------------------------------------------------------------

def path_join(*parts) -> str:
    return ".".join(str(p).replace("~", "~0").replace(".", "~1") for p in parts)


def path_split(path: str) -> list[str]:
    return [p.replace("~1", ".").replace("~0", "~") for p in path.split(".")]


def lookup(report: dict, path: str):
    """The value at `path` in `report`; raises KeyError/IndexError when the path does not exist."""
    node = report
    for part in path_split(path):
        node = node[int(part)] if isinstance(node, list) else node[part]
    return node


# ---- display formats ------------------------------------------------------------------------------

def _mapped(words: dict):
    return lambda value: words[value]


# data-format name -> how a JSON value is shown: the functions of qfit.report.format, which the
# terminal and report.md use too. tests/test_html.py checks each one independently.
FORMATS = {
    "size": fmt.size,
    "headroom": fmt.headroom,
    "int": fmt.count,
    "pct": fmt.pct,
    "pct1": fmt.pct1,
    "pt": fmt.pt,
    "pt_abs": fmt.pt_abs,
    "db": fmt.db,
    "ratio": fmt.ratio,
    "num": fmt.number,
    "cos": lambda v: fmt.number(v, 4),
    "g": lambda v: f"{v:g}",
    "seconds": lambda v: f"{v:g} s",
    "text": str,
    "list": lambda v: ", ".join(str(x) for x in v) if v else "none",
    "dims": lambda v: fmt.dims(v, "×"),
    "fits": fmt.fits,
    "yesno": _mapped(fmt.YES_NO),
    "gate": _mapped(fmt.GATE_WORDS),
    "verdict": _mapped(fmt.VERDICT_WORDS),     # a fits flag
    "exit": fmt.verdict_word,                  # an exit code
}


def display(value, name: str) -> str:
    if value is None:
        return MISSING
    return FORMATS[name](value)


_UNIT_FORMATS = (("_bytes", "size"), ("_pt", "pt"), ("_db", "db"), ("_pct", "pct"))


def format_for_path(path: str, value) -> str:
    """The display format for a value found at `path`: the unit suffix of the nearest key that has
    one (`..._bytes`, `_pt`, `_db`, `_pct`; a key named `bytes` too), so the members of a
    `fallback_cost_bytes` dict are shown as sizes."""
    if isinstance(value, bool):
        return "yesno"
    if isinstance(value, list):
        return "list"
    if isinstance(value, str) or value is None:
        return "text"
    for key in reversed(path_split(path)):
        if key == "bytes":
            return "size"
        for suffix, name in _UNIT_FORMATS:
            if key.endswith(suffix):
                return name
    return "int" if isinstance(value, int) else "num"


def px(value: float) -> str:
    return f"{value:.2f}"


def attr(value) -> str:
    return escape(str(value), quote=True)


# ---- figures --------------------------------------------------------------------------------------

class Figures:
    """Looks figures up by path and renders them tagged; the only way numbers reach the page."""

    def __init__(self, report: dict):
        self.report = report

    def has(self, path: str) -> bool:
        try:
            lookup(self.report, path)
            return True
        except (KeyError, IndexError, TypeError, ValueError):
            return False

    def get(self, path: str, default=None):
        return lookup(self.report, path) if self.has(path) else default

    def tag_attrs(self, path: str, fmt: str) -> str:
        value = lookup(self.report, path)
        raw = json.dumps(value, sort_keys=True, allow_nan=False, ensure_ascii=False)
        return f' data-key="{attr(path)}" data-value="{attr(raw)}" data-format="{fmt}"'

    def text(self, path: str, fmt: str, tag: str = "span", css: str = "") -> str:
        value = lookup(self.report, path)
        cls = f' class="{css}"' if css else ""
        return f"<{tag}{self.tag_attrs(path, fmt)}{cls}>{escape(display(value, fmt))}</{tag}>"

    def maybe(self, path: str, fmt: str, tag: str = "span", css: str = "") -> str:
        """The tagged figure, or an untagged dash when the report does not hold it."""
        if not self.has(path):
            return f"<{tag}>{MISSING}</{tag}>"
        return self.text(path, fmt, tag, css)

    def badge(self, path: str, fmt: str = "fits") -> str:
        value = lookup(self.report, path)
        state = {True: "ok", False: "bad"}.get(value, "none")
        return self.text(path, fmt, css=f"badge {state}")


class Axis:
    """Value axis of a chart: value v is drawn `(min(v, max_value) - origin_value) * px_per_unit`
    pixels from `origin_px`. Written onto the <svg> so a test can check every mark."""

    def __init__(self, origin_px: float, origin_value: float, px_per_unit: float, max_value: float):
        self.origin_px, self.origin_value = origin_px, origin_value
        self.px_per_unit, self.max_value = px_per_unit, max_value

    def length(self, value: float) -> float:
        return (min(value, self.max_value) - self.origin_value) * self.px_per_unit

    def attrs(self) -> str:
        return (f' data-axis-origin-px="{self.origin_px!r}" data-axis-origin-value="{self.origin_value!r}"'
                f' data-px-per-unit="{self.px_per_unit!r}" data-axis-max-value="{self.max_value!r}"')


def svg_open(width: float, height: float, label: str, axis: Axis | None, css: str = "chart") -> str:
    axis_attrs = axis.attrs() if axis else ""
    return (f'<svg class="{css}" width="{px(width)}" height="{px(height)}" '
            f'viewBox="0 0 {px(width)} {px(height)}" role="img" aria-label="{attr(label)}"{axis_attrs}>')
