"""html: the report dict -> one self-contained HTML page (inline CSS and SVG, no script, no network).

`render_html(report)` takes the dict that report.json holds (from `qfit check`) or the memory-only dict
that `qfit budget` writes, and returns the page as a string. Same dict -> same bytes.

One source of truth: every figure on the page is looked up by its JSON path in that dict, and the
element showing it carries the path in `data-key`, the raw JSON value in `data-value` and how it was
displayed in `data-format` (see FORMATS), so a test can check the page against the JSON figure by
figure. Chart marks (bars, lines, points) carry the same three attributes; their length along the
value axis follows the `data-axis-*` attributes of the enclosing <svg>.

Paths are the JSON keys and list indices joined by "."; a "." or "~" inside a key is written "~1" or
"~0" (as JSON Pointer escapes "/"). Axis tick labels of the error chart are scale marks, not figures.
"""
from __future__ import annotations

import json
import math
from html import escape

from qfit.measure.compare import SQNR_CAP_DB
from qfit.sizes import format_size

WORST_LAYERS_MARKED = 5
TILING_ROWS_SHOWN = 8
MARK_LETTERS = "ABCDEFGHJK"
MISSING = "—"


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

def _headroom(value) -> str:
    return f"{format_size(value)} left" if value >= 0 else f"{format_size(-value)} over"


def _mapped(words: dict):
    return lambda value: words[value]


# data-format name -> how a JSON value is shown. tests/test_html.py checks each one independently.
FORMATS = {
    "size": format_size,
    "headroom": _headroom,
    "int": lambda v: f"{int(v):,}",
    "pct": lambda v: f"{v:.2f} %",
    "pct1": lambda v: f"{v:.1f} %",
    "pt": lambda v: f"{v:+.2f} pt",
    "pt_abs": lambda v: f"{v:.2f} pt",
    "db": lambda v: f"{v:.1f} dB",
    "ratio": lambda v: f"{v:.2f}×",
    "num": lambda v: f"{v:.3f}",
    "cos": lambda v: f"{v:.4f}",
    "g": lambda v: f"{v:g}",
    "seconds": lambda v: f"{v:g} s",
    "text": str,
    "list": lambda v: ", ".join(str(x) for x in v) if v else "none",
    "dims": lambda v: "×".join(str(x) for x in v),
    "fits": _mapped({True: "fits", False: "does not fit"}),
    "yesno": _mapped({True: "yes", False: "no"}),
    "gate": _mapped({True: "within the gate", False: "over the gate"}),
    "verdict": _mapped({True: "Passes", False: "Does not pass"}),     # a fits flag
    "exit": lambda v: "Passes" if v == 0 else "Does not pass",       # an exit code
}


def display(value, fmt: str) -> str:
    if value is None:
        return MISSING
    return FORMATS[fmt](value)


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
        for suffix, fmt in _UNIT_FORMATS:
            if key.endswith(suffix):
                return fmt
    return "int" if isinstance(value, int) else "num"


def _px(value: float) -> str:
    return f"{value:.2f}"


def _attr(value) -> str:
    return escape(str(value), quote=True)


# ---- figures --------------------------------------------------------------------------------------

class _Figures:
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
        return f' data-key="{_attr(path)}" data-value="{_attr(raw)}" data-format="{fmt}"'

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


class _Axis:
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


def _svg_open(width: float, height: float, label: str, axis: _Axis | None, css: str = "chart") -> str:
    axis_attrs = axis.attrs() if axis else ""
    return (f'<svg class="{css}" width="{_px(width)}" height="{_px(height)}" '
            f'viewBox="0 0 {_px(width)} {_px(height)}" role="img" aria-label="{_attr(label)}"{axis_attrs}>')


# ---- the page -------------------------------------------------------------------------------------

STYLE = """
:root{--ink:#1d2327;--paper:#fbf9f4;--muted:#58606b;--rule:#d8d2c4;--panel:#ffffff;
--int8:#2a6b68;--float:#c9b27c;--over:#a4432b;--iso:#5a4a8a;--mark:#1d2327}
*{box-sizing:border-box}
html{-webkit-print-color-adjust:exact;print-color-adjust:exact}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.5 system-ui,-apple-system,"Segoe UI",
"DejaVu Sans",Roboto,sans-serif;font-variant-numeric:tabular-nums}
main{max-width:980px;margin:0 auto;padding:0 18px 48px}
header.top{border-left:10px solid var(--int8);padding:18px 18px 10px;margin:18px 0 8px;background:var(--panel)}
header.top h1{font-size:21px;margin:0 0 4px;word-break:break-all}
header.top p{margin:0;color:var(--muted)}
nav{margin:8px 0 4px;font-size:13px}
nav a{color:var(--ink);margin-right:14px;text-decoration:none;border-bottom:1px dotted var(--muted)}
section{overflow-x:auto;background:var(--panel);border-top:3px solid var(--ink);margin:22px 0;padding:6px 18px 14px}
h2{font-size:18px;margin:10px 0 6px;letter-spacing:.01em}
h3{font-size:15px;margin:16px 0 6px}
p{margin:6px 0}
.headline{font-size:22px;font-weight:700;margin:6px 0 10px}
.headline .fail::before{content:"✗ "}.headline .pass::before{content:"✓ "}
.cards{display:flex;flex-wrap:wrap;gap:12px}
.card{flex:1 1 280px;border:1px solid var(--rule);padding:10px 12px;background:var(--paper)}
.card h3{margin:0 0 6px;display:flex;justify-content:space-between;gap:8px;align-items:baseline}
.badge{font-size:12px;font-weight:700;padding:1px 8px;border:2px solid var(--ink);white-space:nowrap}
.badge.ok{border-style:solid;color:var(--int8);border-color:var(--int8)}
.badge.ok::before{content:"✓ "}
.badge.bad{border-style:double;border-width:4px;color:var(--over);border-color:var(--over);text-transform:uppercase}
.badge.bad::before{content:"✗ "}
.badge.none{border-style:dotted}
.small{font-size:13px;color:var(--muted)}
.caution{border:1px dashed var(--ink);padding:8px 12px;margin:12px 0 4px;background:var(--paper)}
.caution strong::after{content:" "}
.note{border-left:4px solid var(--over);padding:4px 10px;background:var(--paper)}
.note::before{content:"Note: ";font-weight:700}
table{border-collapse:collapse;width:100%;font-size:13px;margin:6px 0}
th,td{text-align:left;padding:3px 8px;border-bottom:1px solid var(--rule);vertical-align:middle}
th{font-weight:600;border-bottom:2px solid var(--ink)}
td.num,th.num{text-align:right;white-space:nowrap}
tbody tr:nth-child(even){background:#f4f1ea}
td.name{word-break:break-word;min-width:7em}
.scroll{overflow-x:auto}
table.flashmap td{padding:1px 8px}
svg.chart{display:block;max-width:100%;height:auto;margin:6px 0}
svg.bars{display:block}
svg text{font:12px system-ui,"DejaVu Sans",sans-serif;fill:var(--ink)}
svg .tick{fill:var(--muted);font-size:11px}
.bar{fill:var(--int8)}
.bar.over{fill:url(#qf-over)}
.bar.peak{stroke:var(--mark);stroke-width:1.5}
.limit{stroke:var(--ink);stroke-width:1.5;stroke-dasharray:7 4}
.arena{stroke:var(--int8);stroke-width:1.2;stroke-dasharray:1.5 2.5}
.gauge-limit{fill:none;stroke:var(--ink);stroke-width:1;stroke-dasharray:3 2}
.gauge-used{fill:var(--int8)}
.gauge-used.over{fill:url(#qf-over);stroke:var(--over)}
.floatbar{fill:url(#qf-float);stroke:#8d7a4d;stroke-width:.6}
.int8bar{fill:var(--int8)}
.axis{stroke:var(--ink);stroke-width:1}
.grid{stroke:var(--rule);stroke-width:1}
.acc-line{fill:none;stroke:var(--int8);stroke-width:1.5}
.iso-line{fill:none;stroke:var(--iso);stroke-width:1.2;stroke-dasharray:4 3}
circle.acc{fill:var(--int8);stroke:var(--paper);stroke-width:.8}
circle.acc.float{fill:var(--paper);stroke:var(--int8);stroke-width:1.5}
rect.iso{fill:var(--iso)}
.guide{stroke:var(--over);stroke-width:1;stroke-dasharray:2 3}
.ring{fill:none;stroke:var(--over);stroke-width:1.6}
.letter{font-weight:700;fill:var(--over)}
.legend{display:flex;flex-wrap:wrap;gap:16px;font-size:12px;color:var(--muted);margin:2px 0 6px}
.legend span{display:inline-flex;align-items:center;gap:5px}
details{margin:8px 0}
summary{cursor:pointer;font-size:13px}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px;font-size:13px;margin:6px 0}
dl.facts dt{color:var(--muted)}
dl.facts dd{margin:0;word-break:break-word}
footer{font-size:12px;color:var(--muted);margin-top:20px}
@media print{
 body{background:#fff;font-size:10.5pt}
 main{max-width:none;padding:0}
 nav,summary{display:none}
 section{border-top:2px solid #000;margin:10px 0;padding:4px 0;break-inside:auto}
 .card,figure,svg.chart,tr,.caution{break-inside:avoid}
 h2,h3{break-after:avoid}
 header.top{margin-top:0}
}
@page{margin:14mm}
"""

# Fill patterns are defined once; charts refer to them by id. Hatching keeps "over the limit" and
# "float32" legible in greyscale print.
PATTERNS = """<svg class="defs" width="0" height="0" style="position:absolute" aria-hidden="true"><defs>
<pattern id="qf-over" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">
<rect width="6" height="6" fill="#e9c7bb"></rect><rect width="2.6" height="6" fill="#a4432b"></rect></pattern>
<pattern id="qf-float" width="5" height="5" patternUnits="userSpaceOnUse" patternTransform="rotate(-45)">
<rect width="5" height="5" fill="#f3ead3"></rect><rect width="1.4" height="5" fill="#c9b27c"></rect></pattern>
</defs></svg>"""


def render_html(report: dict) -> str:
    """The whole report as one self-contained HTML page."""
    f = _Figures(report)
    is_check = "verdict" in report
    title = f.get("model.path") if f.has("model.path") else f.get("model_file", "model")
    body = [_header(f), _verdict(f, is_check)]
    if f.has("sram.timeline"):
        body.append(_sram_section(f))
    if f.has("flash.layers"):
        body.append(_flash_section(f))
    if f.get("layers"):
        body.append(_error_section(f))
    if f.get("what_if"):
        body.append(_what_if_section(f))
    body.append(_details_section(f, is_check))
    body.append("<footer>Rendered from the same result as report.json; each figure carries its JSON path "
                "(data-key). No script, no external resources: this file reads the same offline.</footer>")
    head = ('<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; style-src \'unsafe-inline\'; '
            'img-src data:">'
            '<meta name="color-scheme" content="light">'
            f"<title>qfit report: {escape(str(title))}</title><style>{STYLE}</style></head>\n<body>\n")
    return head + PATTERNS + "\n<main>\n" + "\n".join(body) + "\n</main>\n</body></html>\n"


def _header(f: _Figures) -> str:
    if f.has("model.path"):
        name = f.text("model.path", "text")
        sub = f"qfit {f.text('tool_version', 'text')}" if f.has("tool_version") else "qfit"
    else:
        name = f.maybe("model_file", "text")
        sub = "qfit budget: memory only" + (f": {f.text('model_kind', 'text')}" if f.has("model_kind") else "")
    links = [("verdict", "Verdict"), ("sram", "SRAM timeline"), ("flash", "Flash map"),
             ("errors", "Layer errors"), ("whatif", "What would fit"), ("details", "Model and data")]
    present = {"verdict": True, "sram": f.has("sram.timeline"), "flash": f.has("flash.layers"),
               "errors": bool(f.get("layers")), "whatif": bool(f.get("what_if")), "details": True}
    nav = "".join(f'<a href="#{key}">{label}</a>' for key, label in links if present[key])
    return (f'<header class="top"><h1>qfit report: {name}</h1><p>{sub}</p>'
            f"<nav>{nav}</nav></header>")


# ---- verdict --------------------------------------------------------------------------------------

def _gauge(f: _Figures, used_path: str, limit_path: str, label: str) -> str:
    """Used against limit as two horizontal bars: the limit as a dashed outline, usage solid (hatched
    when over)."""
    used, limit = f.get(used_path), f.get(limit_path)
    if used is None or limit is None:
        return ""
    width, height = 260.0, 20.0
    axis = _Axis(0.0, 0.0, width / max(used, limit, 1), float(max(used, limit, 1)))
    over = " over" if used > limit else ""
    return (_svg_open(width, height, label, axis, "chart gauge")
            + f'<rect class="gauge-limit"{f.tag_attrs(limit_path, "bar-x")} x="0.00" y="1.00" '
              f'width="{_px(axis.length(limit))}" height="18.00"></rect>'
            + f'<rect class="gauge-used{over}"{f.tag_attrs(used_path, "bar-x")} x="0.00" y="5.00" '
              f'width="{_px(axis.length(used))}" height="10.00"></rect></svg>')


def _verdict(f: _Figures, is_check: bool) -> str:
    out = ['<section id="verdict"><h2>Verdict</h2>']
    if is_check:
        passed = f.get("verdict.exit_code") == 0
        head = f.text("verdict.exit_code", "exit", css="pass" if passed else "fail")
        failed = f.get("verdict.failed") or []
        detail = f" (failed: {f.text('verdict.failed', 'list')})" if failed else ""
        out.append(f'<p class="headline">{head}{detail}</p>')
    elif f.has("fits"):
        css = "pass" if f.get("fits") else "fail"
        out.append(f'<p class="headline">{f.text("fits", "verdict", css=css)}</p>')
        out.append("<p>Memory only: no data was run, so there are no accuracy figures.</p>")
    cards = []
    if f.has("flash.total_bytes"):
        cards.append(
            f'<div class="card"><h3>Flash {f.badge("flash.fits")}</h3>'
            f'<p>Uses {f.text("flash.total_bytes", "size")} of {f.maybe("flash.limit_bytes", "size")}: '
            f'{f.maybe("flash.headroom_bytes", "headroom")}.</p>'
            + _gauge(f, "flash.total_bytes", "flash.limit_bytes", "flash used against the limit")
            + f'<p class="small">Weights, int32 biases and scales {f.text("flash.int8_bytes", "size")}, '
              f'activation scales and zero points {f.maybe("flash.activation_param_bytes", "size")}, '
              f'reserve for code and runtime {f.maybe("flash.reserve_bytes", "size")} (given), '
              f'per-layer metadata {f.maybe("flash.meta_bytes", "size")} (estimate).</p></div>')
    if f.has("sram.peak_bytes"):
        cards.append(
            f'<div class="card"><h3>SRAM {f.badge("sram.fits")}</h3>'
            f'<p>Needs {f.text("sram.required_bytes", "size")} of {f.maybe("sram.limit_bytes", "size")}: '
            f'{f.maybe("sram.headroom_bytes", "headroom")}.</p>'
            + _gauge(f, "sram.required_bytes", "sram.limit_bytes", "SRAM needed against the limit")
            + f'<p class="small">The arena plan needs {f.text("sram.required_bytes", "size")}; the tensors '
              f'live at one time peak at {f.text("sram.peak_bytes", "size")}, at step '
              f'{f.text("sram.peak_step", "int")} ({f.maybe("sram.peak_node", "text")}).</p></div>')
    if f.get("accuracy"):
        cards.append(_accuracy_card(f))
    out.append('<div class="cards">' + "".join(cards) + "</div>")
    if f.has("evaluation_path"):
        out.append(f'<p class="small">Accuracy and per-layer figures come from: '
                   f'{f.text("evaluation_path", "text")}.</p>')
    if f.get("evaluation.reused_calibration_data"):
        out.append('<p class="note">No separate evaluation folder was given: the figures were measured on '
                   'the calibration data itself and are optimistic.</p>')
    if f.has("caution"):
        out.append(f'<div class="caution"><strong>Caution.</strong>{f.text("caution", "text")}</div>')
    out.append("</section>")
    return "\n".join(out)


def _accuracy_card(f: _Figures) -> str:
    metric = f.get("accuracy.metric")
    gate = ""
    if f.get("verdict.max_drop_pt") is not None:
        gate = (f'<p>Gate: a drop of at most {f.text("verdict.max_drop_pt", "pt_abs")}: '
                f'{f.text("verdict.accuracy_ok", "gate", css="badge " + ("ok" if f.get("verdict.accuracy_ok") else "bad"))}.</p>')
    samples = f.maybe("accuracy.samples", "int")
    if metric == "top1":
        interval = ""
        if f.has("accuracy.drop_ci95_pt"):
            interval = (f" (95 % interval {f.text('accuracy.drop_ci95_pt.0', 'pt')} to "
                        f"{f.text('accuracy.drop_ci95_pt.1', 'pt')})")
        lines = [f'<p>Top-1 on {samples} evaluation samples: float {f.text("accuracy.float", "pct")}, '
                 f'int8 {f.text("accuracy.int8", "pct")}.</p>',
                 f'<p>Drop {f.text("accuracy.drop_pt", "pt")}{interval}; a positive drop means int8 is worse.</p>']
        if f.has("accuracy.top5.float"):
            lines.append(f'<p class="small">Top-5: float {f.text("accuracy.top5.float", "pct")}, int8 '
                         f'{f.text("accuracy.top5.int8", "pct")}, drop {f.text("accuracy.top5.drop_pt", "pt")}.</p>')
        if f.has("accuracy.output_sqnr_db"):
            lines.append(f'<p class="small">Output SQNR {f.text("accuracy.output_sqnr_db", "db")}.</p>')
        title = "Accuracy"
    elif metric == "agreement":
        lines = [f'<p>No labels: float and int8 pick the same class for {f.text("accuracy.int8", "pct")} of '
                 f'{samples} samples.</p>']
        if f.has("accuracy.output_sqnr_db"):
            lines.append(f'<p class="small">Output SQNR {f.text("accuracy.output_sqnr_db", "db")}.</p>')
        title = "Agreement"
    else:
        lines = [f'<p>Output SQNR {f.maybe("accuracy.output_sqnr_db", "db")} over {samples} samples.</p>']
        if f.has("accuracy.decision_flips_pct"):
            lines.append(f'<p>Decisions flipped at threshold {f.text("accuracy.threshold", "num")}: '
                         f'{f.text("accuracy.decision_flips_pct", "pct")} of samples.</p>')
        title = "Output error"
    return f'<div class="card"><h3>{title}</h3>' + "".join(lines) + gate + "</div>"


# ---- SRAM timeline --------------------------------------------------------------------------------

def _sram_chart(f: _Figures) -> str:
    timeline = f.get("sram.timeline") or []
    if not timeline:
        return '<p>No execution steps.</p>'
    limit = f.get("sram.limit_bytes")
    peak_step = f.get("sram.peak_step")
    width, height = 920.0, 290.0
    left, right, top, bottom = 14.0, 14.0, 40.0, 34.0
    plot_w, plot_h = width - left - right, height - top - bottom
    base = top + plot_h
    arena = f.get("arena.bytes")
    highest = max([row["live_bytes"] for row in timeline] + [limit or 0, arena or 0, 1])
    top_value = highest * 1.1
    axis = _Axis(base, 0.0, plot_h / top_value, float(top_value))
    slot = plot_w / len(timeline)
    bar_w = max(slot * 0.78, 0.6)
    parts = [_svg_open(width, height, "live SRAM bytes per execution step", axis)]
    peak_index = next((i for i, row in enumerate(timeline) if row["step"] == peak_step), None)
    for i, row in enumerate(timeline):
        value = row["live_bytes"]
        length = axis.length(value)
        css = "bar"
        if limit is not None and value > limit:
            css += " over"
        if i == peak_index:
            css += " peak"
        tensors = ", ".join(row.get("live_tensors", []))
        tip = (f"step {row['step']}: {row['node']} ({row['op_type']}), {format_size(value)} live"
               + (f": {tensors}" if tensors else ""))
        parts.append(f'<rect class="{css}"{f.tag_attrs(path_join("sram", "timeline", i, "live_bytes"), "bar-y")} '
                     f'data-unit="bytes" x="{_px(left + i * slot + (slot - bar_w) / 2)}" y="{_px(base - length)}" '
                     f'width="{_px(bar_w)}" height="{_px(length)}"><title>{escape(tip)}</title></rect>')
    parts.append(f'<line class="axis" x1="{_px(left)}" y1="{_px(base)}" x2="{_px(left + plot_w)}" y2="{_px(base)}"></line>')
    peak_x = left + (peak_index + 0.5) * slot if peak_index is not None else left
    # Line labels go at the end farther from the peak label; the lower line's label sits under it.
    anchor, label_x = ("end", left + plot_w) if peak_x < left + plot_w / 2 else ("start", left)
    lines = [(path, value, css, word) for path, value, css, word in
             (("sram.limit_bytes", limit, "limit", "limit"), ("arena.bytes", arena, "arena", "arena plan"))
             if value is not None]
    for path, value, css, word in lines:
        y = base - axis.length(value)
        below = len(lines) == 2 and value == min(v for _, v, _, _ in lines) and value != max(v for _, v, _, _ in lines)
        parts.append(f'<line class="{css}"{f.tag_attrs(path, "mark-y")} x1="{_px(left)}" '
                     f'y1="{_px(y)}" x2="{_px(left + plot_w)}" y2="{_px(y)}"></line>')
        parts.append(f'<text x="{_px(label_x)}" y="{_px(y + 14 if below else y - 5)}" text-anchor="{anchor}">'
                     f'{word} {f.text(path, "size", tag="tspan")}</text>')
    if peak_index is not None:
        bar_top = base - axis.length(timeline[peak_index]["live_bytes"])
        anchor = "start" if peak_x < left + plot_w / 3 else ("end" if peak_x > left + 2 * plot_w / 3 else "middle")
        label_y = max(bar_top - 8, 14.0)
        parts.append(f'<path class="peakmark" d="M{_px(peak_x - 5)} {_px(bar_top - 6)} L{_px(peak_x + 5)} '
                     f'{_px(bar_top - 6)} L{_px(peak_x)} {_px(bar_top - 1)} Z"></path>')
        parts.append(f'<text x="{_px(peak_x)}" y="{_px(label_y - 6)}" text-anchor="{anchor}" font-weight="700">'
                     f'peak {f.text("sram.peak_bytes", "size", tag="tspan")} at step '
                     f'{f.text("sram.peak_step", "int", tag="tspan")} '
                     f'({f.text("sram.peak_node", "text", tag="tspan")})</text>')
    last = len(timeline) - 1
    parts.append(f'<text class="tick" x="{_px(left)}" y="{_px(base + 18)}">step '
                 f'{f.text(path_join("sram", "timeline", 0, "step"), "int", tag="tspan")}</text>')
    parts.append(f'<text class="tick" x="{_px(left + plot_w)}" y="{_px(base + 18)}" text-anchor="end">step '
                 f'{f.text(path_join("sram", "timeline", last, "step"), "int", tag="tspan")}</text>')
    parts.append(f'<text class="tick" x="{_px(left + plot_w / 2)}" y="{_px(base + 18)}" text-anchor="middle">'
                 'execution order →</text>')
    parts.append("</svg>")
    return "".join(parts)


def _swatch(css: str) -> str:
    if css in ("limit", "arena"):
        return (f'<svg class="swatch" width="22" height="10" aria-hidden="true">'
                f'<line class="{css}" x1="0" y1="5" x2="22" y2="5"></line></svg>')
    return (f'<svg class="swatch" width="14" height="12" aria-hidden="true">'
            f'<rect class="{css}" x="0" y="0" width="14" height="12"></rect></svg>')


def _sram_section(f: _Figures) -> str:
    out = ['<section id="sram"><h2>SRAM over the execution order</h2>',
           f'<p>Each bar is the bytes of activation tensors live while one node runs, in the '
           f'{f.maybe("sram.order_used", "text")} execution order. Hover over a bar for its node and tensors.</p>',
           _sram_chart(f),
           '<div class="legend">'
           f'<span>{_swatch("bar")} live bytes</span>'
           f'<span>{_swatch("bar over")} above the limit (hatched)</span>'
           f'<span>{_swatch("limit")} SRAM limit</span>'
           f'<span>{_swatch("arena")} arena plan (what must fit)</span><span>▼ marks the peak step</span></div>']
    rows = f.get("sram.live_at_peak") or []
    out.append(f'<h3>Tensors live at the peak: step {f.text("sram.peak_step", "int")} '
               f'({f.maybe("sram.peak_node", "text")})</h3>')
    if rows:
        out.append('<table><thead><tr><th>tensor</th><th>stored as</th><th class="num">bytes</th>'
                   "<th>produced by</th><th>same buffer as</th></tr></thead><tbody>")
        for i, _ in enumerate(rows):
            p = lambda key: path_join("sram", "live_at_peak", i, key)
            out.append(f'<tr>{f.text(p("tensor"), "text", "td", "name")}{f.maybe(p("dtype"), "text", "td")}'
                       f'{f.text(p("bytes"), "size", "td", "num")}{f.maybe(p("producer"), "text", "td", "name")}'
                       f'{f.maybe(p("aliases"), "list", "td", "name")}</tr>')
        out.append("</tbody></table>")
    facts = []
    if f.has("arena.bytes"):
        facts.append(f'Arena plan: {f.text("arena.bytes", "size")} ({f.maybe("arena.ratio_to_peak", "ratio")} the '
                     f'peak) at {f.maybe("arena.alignment", "int")}-byte alignment; '
                     f'{f.maybe("arena.method", "text")}.')
    if f.has("order.best_peak_bytes"):
        facts.append(f'Execution order: {f.maybe("order.method", "text")} search; the graph\'s own order peaks at '
                     f'{f.text("order.default_peak_bytes", "size")}, the best order found at '
                     f'{f.text("order.best_peak_bytes", "size")} (saves {f.maybe("order.saved_bytes", "size")}).')
    if f.has("sram.conventions"):
        conv = f.get("sram.conventions")
        names = {"views": "reshapes share their input's bytes", "inplace": "elementwise ops overwrite their input",
                 "scratch": "convolution scratch counted"}
        items = [f'{label}: {f.text(path_join("sram", "conventions", key), "yesno")}'
                 for key, label in names.items() if key in conv]
        facts.append("Conventions: " + "; ".join(items) + ".")
    out += [f'<p class="small">{line}</p>' for line in facts]
    timeline = f.get("sram.timeline") or []
    if timeline:
        out.append(f"<details><summary>Every step</summary><table><thead><tr><th class=\"num\">step</th>"
                   "<th>node</th><th>op</th><th class=\"num\">live</th><th>live tensors</th></tr></thead><tbody>")
        for i, _ in enumerate(timeline):
            p = lambda key: path_join("sram", "timeline", i, key)
            out.append(f'<tr>{f.text(p("step"), "int", "td", "num")}{f.text(p("node"), "text", "td", "name")}'
                       f'{f.maybe(p("op_type"), "text", "td")}{f.text(p("live_bytes"), "size", "td", "num")}'
                       f'{f.maybe(p("live_tensors"), "list", "td", "name")}</tr>')
        out.append("</tbody></table></details>")
    out.append("</section>")
    return "\n".join(out)


# ---- flash map ------------------------------------------------------------------------------------

def _flash_section(f: _Figures) -> str:
    layers = f.get("flash.layers") or []
    out = ['<section id="flash"><h2>Flash, layer by layer</h2>',
           f'<p>Stored weights and constants {f.text("flash.int8_bytes", "size")} in place of '
           f'{f.text("flash.float_bytes", "size")} as float32 ({f.maybe("flash.shrink_ratio", "ratio")} smaller); '
           f'with activation parameters, reserve and metadata the total is {f.text("flash.total_bytes", "size")} '
           f'of {f.maybe("flash.limit_bytes", "size")}. Largest layers first.</p>',
           '<div class="legend">'
           f'<span>{_swatch("int8bar")} as stored (int8 weights, int32 bias, scales)</span>'
           f'<span>{_swatch("floatbar")} the same layer in float32 (hatched)</span></div>']
    order = sorted(range(len(layers)), key=lambda i: (-layers[i]["total_bytes"], layers[i]["name"]))
    widest = max([max(r["total_bytes"], r["float32_bytes"]) for r in layers] + [1])
    width, height = 240.0, 14.0
    axis = _Axis(0.0, 0.0, width / widest, float(widest))
    out.append('<table class="flashmap"><thead><tr><th>layer</th><th>op</th><th>stored as</th>'
               '<th class="num">bytes</th><th class="num">float32</th><th>stored vs float32</th></tr></thead><tbody>')
    for i in order:
        p = lambda key: path_join("flash", "layers", i, key)
        bar = (_svg_open(width, height, f"flash of layer {layers[i]['name']}", axis, "chart bars")
               + f'<rect class="floatbar"{f.tag_attrs(p("float32_bytes"), "bar-x")} x="0.00" y="0.50" '
                 f'width="{_px(axis.length(layers[i]["float32_bytes"]))}" height="13.00"></rect>'
               + f'<rect class="int8bar"{f.tag_attrs(p("total_bytes"), "bar-x")} x="0.00" y="3.50" '
                 f'width="{_px(axis.length(layers[i]["total_bytes"]))}" height="7.00"></rect></svg>')
        out.append(f'<tr>{f.text(p("name"), "text", "td", "name")}{f.maybe(p("op_type"), "text", "td")}'
                   f'{f.maybe(p("precision"), "text", "td")}{f.text(p("total_bytes"), "size", "td", "num")}'
                   f'{f.text(p("float32_bytes"), "size", "td", "num")}<td>{bar}</td></tr>')
    out.append("</tbody></table></section>")
    return "\n".join(out)


# ---- per-layer error ------------------------------------------------------------------------------

def marked_layers(report: dict) -> tuple[str, list[int]]:
    """(criterion in words, indices into report["layers"]) of the layers the error chart marks: the
    head of the pipeline's sensitivity ranking when there is one, else the lowest accumulated SQNR.
    Layers kept float are not candidates."""
    layers = report.get("layers") or []
    index = {row["name"]: i for i, row in enumerate(layers)}
    sensitivity = report.get("sensitivity") or {}
    ranking = [index[name] for name in sensitivity.get("ranking") or [] if name in index]
    if ranking:
        criterion = ("the highest sensitivity (isolated sweep)" if sensitivity.get("samples_used") else
                     "the lowest accumulated SQNR")
        return criterion, ranking[:WORST_LAYERS_MARKED]
    candidates = [i for i, row in enumerate(layers)
                  if row.get("precision") != "float" and row.get("sqnr_db") is not None]
    ranked = sorted(candidates, key=lambda i: (layers[i]["sqnr_db"], i))
    return "the lowest accumulated SQNR", ranked[:WORST_LAYERS_MARKED]


def _db_range(values: list[float]) -> tuple[float, float, float]:
    """(bottom, top, tick step) in dB for the chart; capped "exact" values do not stretch it."""
    shown = [v for v in values if v < SQNR_CAP_DB] or [0.0]
    bottom = min(0.0, math.floor(min(shown) / 10.0) * 10.0)
    top = max(math.ceil(max(shown) / 10.0) * 10.0, bottom + 10.0)
    step = 10.0 if top - bottom <= 120 else 20.0 * math.ceil((top - bottom) / 240.0)
    return bottom, top, step


def _error_chart(f: _Figures, marked: list[int]) -> str:
    layers = f.get("layers")
    acc = [(i, row["sqnr_db"]) for i, row in enumerate(layers) if row.get("sqnr_db") is not None]
    iso = [(i, row["sqnr_isolated_db"]) for i, row in enumerate(layers) if row.get("sqnr_isolated_db") is not None]
    bottom, top_db, step = _db_range([v for _, v in acc + iso])
    width, height = 920.0, 300.0
    left, right, top, bottom_margin = 52.0, 14.0, 34.0, 34.0
    plot_w, plot_h = width - left - right, height - top - bottom_margin
    base = top + plot_h
    axis = _Axis(base, bottom, plot_h / (top_db - bottom), top_db)
    slot = plot_w / max(len(layers), 1)
    x_of = lambda i: left + (i + 0.5) * slot
    parts = [_svg_open(width, height, "SQNR per layer in network order", axis)]
    tick = bottom
    while tick <= top_db + 1e-9:
        y = base - axis.length(tick)
        parts.append(f'<line class="grid" x1="{_px(left)}" y1="{_px(y)}" x2="{_px(left + plot_w)}" y2="{_px(y)}"></line>'
                     f'<text class="tick" x="{_px(left - 6)}" y="{_px(y + 4)}" text-anchor="end">{tick:g} dB</text>')
        tick += step
    # Letters of neighbouring marks alternate between two rows so they do not overprint.
    label_row, previous = {}, None
    for i in sorted(marked):
        close = previous is not None and x_of(i) - x_of(previous) < 14
        label_row[i] = 1 - label_row[previous] if close else 0
        previous = i
    for rank, i in enumerate(marked):
        x = x_of(i)
        parts.append(f'<line class="guide" x1="{_px(x)}" y1="{_px(top - 2)}" x2="{_px(x)}" y2="{_px(base)}"></line>'
                     f'<text class="letter" x="{_px(x)}" y="{_px(top - 8 - 12 * label_row[i])}" '
                     f'text-anchor="middle">{MARK_LETTERS[rank]}</text>')
    for series, css in ((iso, "iso-line"), (acc, "acc-line")):
        if len(series) > 1:
            points = " ".join(f"{_px(x_of(i))},{_px(base - axis.length(v))}" for i, v in series)
            parts.append(f'<polyline class="{css}" points="{points}" aria-hidden="true"></polyline>')

    def tip(i: int) -> str:
        row = layers[i]
        text = f"{row['name']} ({row['op_type']}, {row.get('precision', '')}): accumulated {row['sqnr_db']:.1f} dB"
        if row.get("sqnr_isolated_db") is not None:
            text += f", isolated {row['sqnr_isolated_db']:.1f} dB"
        if row["sqnr_db"] >= SQNR_CAP_DB:
            text += " (exact: no error measured)"
        return text

    for i, value in iso:
        y = base - axis.length(value)
        parts.append(f'<rect class="iso"{f.tag_attrs(path_join("layers", i, "sqnr_isolated_db"), "point-y")} '
                     f'data-unit="db" x="{_px(x_of(i) - 3)}" y="{_px(y - 3)}" width="6.00" height="6.00">'
                     f"<title>{escape(tip(i))}</title></rect>")
    for i, value in acc:
        y = base - axis.length(value)
        css = "acc float" if layers[i].get("precision") == "float" else "acc"
        parts.append(f'<circle class="{css}"{f.tag_attrs(path_join("layers", i, "sqnr_db"), "point-y")} '
                     f'data-unit="db" cx="{_px(x_of(i))}" cy="{_px(y)}" r="3.20"><title>{escape(tip(i))}</title></circle>')
        if i in marked:
            parts.append(f'<circle class="ring" cx="{_px(x_of(i))}" cy="{_px(y)}" r="7.00"></circle>')
    parts.append(f'<line class="axis" x1="{_px(left)}" y1="{_px(base)}" x2="{_px(left + plot_w)}" y2="{_px(base)}"></line>')
    last = len(layers) - 1
    parts.append(f'<text class="tick" x="{_px(left)}" y="{_px(base + 18)}">'
                 f'{f.text(path_join("layers", 0, "name"), "text", tag="tspan")}</text>')
    if last > 0:
        parts.append(f'<text class="tick" x="{_px(left + plot_w)}" y="{_px(base + 18)}" text-anchor="end">'
                     f'{f.text(path_join("layers", last, "name"), "text", tag="tspan")}</text>')
    parts.append(f'<text class="tick" x="{_px(left + plot_w / 2)}" y="{_px(base + 18)}" text-anchor="middle">'
                 "network order →</text></svg>")
    return "".join(parts)


# (key, heading, format) of the per-layer tables; a column appears when some row has the key.
_LAYER_COLUMNS = [("sqnr_db", "accumulated", "db"), ("sqnr_isolated_db", "isolated", "db"),
                  ("sensitivity_pt", "drop, alone int8", "pt"),
                  ("sensitivity_agreement_pt", "agreement lost, alone int8", "pt"),
                  ("float_recovery_pt", "recovered, kept float", "pt"),
                  ("float_recovery_agreement_pt", "agreement recovered, kept float", "pt"),
                  ("output_sqnr_if_float_db", "output SQNR, kept float", "db"),
                  ("fallback_cost_bytes", "extra bytes of a repair", "fallback")]
_ALL_LAYER_EXTRA = [("cosine", "cosine", "cos"), ("weight_bytes_int8", "int8 weights", "size")]
_FALLBACK_LABELS = (("float", "kept float"), ("int16", "int16 output"))


def _fallback_cell(f: _Figures, path: str) -> str:
    """Extra flash and SRAM of each repair of one layer ({"float": {"flash", "sram"}, "int16": ...})."""
    value = f.get(path)
    if not isinstance(value, dict):
        return f.maybe(path, "size", "td", "num")
    parts = []
    for key, label in _FALLBACK_LABELS:
        if key not in value:
            continue
        if not isinstance(value[key], dict):
            parts.append(f"{label}: n/a")
            continue
        sub = lambda k: path_join(*path_split(path), key, k)
        parts.append(f"{label}: flash {f.maybe(sub('flash'), 'size')}, SRAM {f.maybe(sub('sram'), 'size')}")
    return "<td>" + "<br>".join(parts) + "</td>"


def _layer_table(f: _Figures, indices: list[int], letters: dict[int, str] | None = None,
                 extra: list = ()) -> str:
    layers = f.get("layers")
    columns = [c for c in _LAYER_COLUMNS + list(extra) if any(c[0] in layers[i] for i in indices)]
    head = ("<th>mark</th>" if letters is not None else "") + "<th>layer</th><th>op</th><th>stored as</th>"
    head += "".join(f'<th class="num">{label}</th>' for _, label, _ in columns)
    rows = []
    for i in indices:
        p = lambda key: path_join("layers", i, key)
        mark = f"<td>{letters[i]}</td>" if letters is not None else ""
        cells = "".join(_fallback_cell(f, p(key)) if fmt == "fallback" else f.maybe(p(key), fmt, "td", "num")
                        for key, _, fmt in columns)
        rows.append(f'<tr>{mark}{f.text(p("name"), "text", "td", "name")}{f.maybe(p("op_type"), "text", "td")}'
                    f'{f.maybe(p("precision"), "text", "td")}{cells}</tr>')
    return (f'<div class="scroll"><table><thead><tr>{head}</tr></thead><tbody>' + "".join(rows)
            + "</tbody></table></div>")


def _error_section(f: _Figures) -> str:
    criterion, marked = marked_layers(f.report)
    letters = {i: MARK_LETTERS[rank] for rank, i in enumerate(marked)}
    has_isolated = any("sqnr_isolated_db" in row for row in f.get("layers"))
    out = ['<section id="errors"><h2>Quantization error, layer by layer</h2>',
           "<p>Accumulated SQNR compares the int8 model's tensor with the float model's at the same point: "
           "where the error has grown to. "
           + ("Isolated SQNR quantizes only that layer: what the layer itself causes. " if has_isolated else
              "Isolated figures were not measured for this report. ")
           + "Higher is better.</p>",
           _error_chart(f, marked),
           '<div class="legend"><span>● accumulated (solid line; hollow: layer kept float)</span>'
           + ("<span>■ isolated (dashed line)</span>" if has_isolated else "")
           + f"<span>letters and rings: the layers with {criterion}</span></div>"]
    if f.get("sensitivity.samples_used"):
        out.append(f'<p class="small">Isolated sweep: {f.text("sensitivity.samples_used", "int")} samples, '
                   f'{f.maybe("sensitivity.layers_swept", "int")} layers, each quantized alone and each kept float '
                   "alone.</p>")
    elif f.get("sensitivity.skipped"):
        out.append(f'<p class="small">Isolated sweep: {f.text("sensitivity.skipped", "text")}.</p>')
    if marked:
        out.append(f"<h3>Worst layers: {criterion}</h3>")
        out.append(_layer_table(f, marked, letters))
    all_rows = list(range(len(f.get("layers"))))
    out.append("<details><summary>Every layer</summary>"
               + _layer_table(f, all_rows, extra=_ALL_LAYER_EXTRA) + "</details>")
    if f.get("repair") is not None:
        out.append(_repair_log(f))
    out.append("</section>")
    return "\n".join(out)


def _generic_cell(f: _Figures, path: str, tag: str = "td") -> str:
    value = f.get(path)
    if isinstance(value, dict):
        inner = "; ".join(f"{escape(str(k))}: {_generic_cell(f, path_join(*path_split(path), k), 'span')}"
                          for k in value)
        return f"<{tag}>{inner}</{tag}>"
    if isinstance(value, list) and any(isinstance(v, (dict, list)) for v in value):
        inner = "; ".join(_generic_cell(f, path_join(*path_split(path), k), "span") for k in range(len(value)))
        return f"<{tag}>{inner}</{tag}>"
    fmt = format_for_path(path, value)
    css = "num" if fmt not in ("text", "list", "yesno") else ""
    return f.text(path, fmt, tag, css)


def _repair_log(f: _Figures) -> str:
    """The repair log, whatever fields the repair search records: each value is shown in the format
    its key's unit suffix names."""
    repair = f.get("repair")
    out = ["<h3>Repair log</h3>"]
    if not isinstance(repair, dict):
        return out[0] + f"<p>{_generic_cell(f, 'repair', 'span')}</p>"
    facts = [k for k in repair if k != "steps"]
    if facts:
        out.append('<dl class="facts">' + "".join(
            f"<dt>{escape(k.replace('_', ' '))}</dt>{_generic_cell(f, path_join('repair', k), 'dd')}" for k in facts)
            + "</dl>")
    steps = repair.get("steps")
    if isinstance(steps, list):
        if not steps:
            out.append("<p>No repair step was taken.</p>")
        else:
            keys = list(dict.fromkeys(k for step in steps if isinstance(step, dict) for k in step))
            head = "".join(f"<th>{escape(k.replace('_', ' '))}</th>" for k in keys)
            rows = []
            for i, step in enumerate(steps):
                cells = "".join(_generic_cell(f, path_join("repair", "steps", i, k)) if k in step else
                                f"<td>{MISSING}</td>" for k in keys)
                rows.append(f"<tr>{cells}</tr>")
            out.append(f"<table><thead><tr>{head}</tr></thead><tbody>" + "".join(rows) + "</tbody></table>")
    return "\n".join(out)


# ---- what would make it fit -----------------------------------------------------------------------

def _what_if_section(f: _Figures) -> str:
    out = ['<section id="whatif"><h2>What would make it fit</h2>']
    if f.has("what_if.order.saves_bytes"):
        out.append(f'<p>Execution order: the best order found saves {f.text("what_if.order.saves_bytes", "size")} '
                   f'of peak (from {f.maybe("what_if.order.default_peak_bytes", "size")} to '
                   f'{f.maybe("what_if.order.best_peak_bytes", "size")}).</p>')
    out.append(_resolution_what_if(f))
    out.append(_tiling_what_if(f))
    out.append(_flash_what_if(f))
    out.append("</section>")
    return "\n".join(p for p in out if p)


def _resolution_what_if(f: _Figures) -> str:
    res = f.get("what_if.resolution")
    if res is None:
        return ""
    out = ["<h3>A smaller (or larger) input</h3>"]
    if "skipped" in res:
        return out[0] + f'<p>Not evaluated: {f.text("what_if.resolution.skipped", "text")}.</p>'
    out.append(f'<p>The input {f.maybe("what_if.resolution.input", "text")} is '
               f'{f.text("what_if.resolution.current.height", "int")}×{f.text("what_if.resolution.current.width", "int")} '
               f'now; its arena is {f.maybe("what_if.resolution.current.arena_bytes", "size")} '
               f'({f.maybe("what_if.resolution.current.fits", "fits")}). Searched {f.maybe("what_if.resolution.searched", "text")}; '
               f'criterion: {f.maybe("what_if.resolution.criterion", "text")}.</p>')
    answers = []
    for key, row in (res.get("largest_fitting") or {}).items():
        # The step is part of the key ("step_8"): shown as such, marked so a test can trace it.
        step = (f'<span class="keylabel" data-from-key="{_attr(path_join("what_if", "resolution", "largest_fitting", key))}">'
                f'{escape(key.split("_")[-1])}</span>')
        p = lambda k: path_join("what_if", "resolution", "largest_fitting", key, k)
        if row:
            answers.append(f'<li>Sides a multiple of {step}: {f.text(p("height"), "int")}×'
                           f'{f.text(p("width"), "int")}, arena {f.maybe(p("arena_bytes"), "size")}, '
                           f'{f.maybe(p("macs"), "int")} MACs.</li>')
        else:
            answers.append(f"<li>Sides a multiple of {step}: no other size found.</li>")
    if answers:
        out.append("<ul>" + "".join(answers) + "</ul>")
    tried = res.get("tried") or []
    if tried:
        out.append('<table><thead><tr><th>input</th><th class="num">arena</th><th class="num">peak</th>'
                   '<th class="num">MACs</th><th>fits</th></tr></thead><tbody>')
        for i, row in enumerate(tried):
            p = lambda k: path_join("what_if", "resolution", "tried", i, k)
            fits = f.maybe(p("fits"), "fits", "td") if row.get("fits") is not None else \
                f"<td>{f.maybe(p('note'), 'text')}</td>"
            out.append(f'<tr><td>{f.text(p("height"), "int")}×{f.text(p("width"), "int")}</td>'
                       f'{f.maybe(p("arena_bytes"), "size", "td", "num")}{f.maybe(p("peak_bytes"), "size", "td", "num")}'
                       f'{f.maybe(p("macs"), "int", "td", "num")}{fits}</tr>')
        out.append("</tbody></table>")
    return "\n".join(out)


def _tiling_what_if(f: _Figures) -> str:
    tiling = f.get("what_if.tiling")
    if tiling is None:
        return ""
    out = ["<h3>Tiled execution of the first layers</h3>"]
    if tiling.get("skipped"):
        return out[0] + f'<p>Not possible here: {f.text("what_if.tiling.skipped", "text")}.</p>'
    if f.has("what_if.tiling.method"):
        out.append(f'<p class="small">Method: {f.text("what_if.tiling.method", "text")}. Overlapping tile borders '
                   "are computed twice: that is the MAC overhead.</p>")
    if tiling.get("best"):
        p = lambda k: path_join("what_if", "tiling", "best", k)
        out.append(f'<p>Cheapest option that fits: {f.text(p("tiles"), "text")} tiles over the first '
                   f'{f.text(p("layers_tiled"), "int")} layers (up to {f.text(p("split_after"), "text")}): peak '
                   f'{f.text(p("peak_bytes"), "size")}, {f.text(p("extra_macs"), "int")} extra MACs '
                   f'({f.text(p("extra_macs_pct"), "pct")} more).</p>')
    elif tiling.get("options"):
        out.append("<p>No tiling option brings the peak under the limit; the options tried are below.</p>")
    options = tiling.get("options") or []
    if options:
        # Fitting options cheapest first; then the rest, lowest peak first.
        order = sorted(range(len(options)), key=lambda i: (
            (0, options[i]["extra_macs"], options[i]["peak_bytes"], i) if options[i].get("fits") else
            (1, options[i]["peak_bytes"], options[i]["extra_macs"], i)))
        head = ('<table><thead><tr><th>tiles</th><th>split after</th><th>split tensor</th>'
                '<th class="num">layers tiled</th><th class="num">peak</th><th class="num">extra MACs</th>'
                '<th class="num">more MACs</th><th>fits</th></tr></thead><tbody>')

        def rows(indices):
            for i in indices:
                p = lambda k: path_join("what_if", "tiling", "options", i, k)
                yield (f'<tr>{f.text(p("tiles"), "text", "td")}{f.text(p("split_after"), "text", "td", "name")}'
                       f'{f.maybe(p("split_shape"), "dims", "td")}{f.maybe(p("layers_tiled"), "int", "td", "num")}'
                       f'{f.text(p("peak_bytes"), "size", "td", "num")}{f.text(p("extra_macs"), "int", "td", "num")}'
                       f'{f.maybe(p("extra_macs_pct"), "pct", "td", "num")}{f.maybe(p("fits"), "fits", "td")}</tr>')

        out.append(head + "".join(rows(order[:TILING_ROWS_SHOWN])) + "</tbody></table>")
        if len(order) > TILING_ROWS_SHOWN:
            out.append("<details><summary>More tiling options</summary>" + head
                       + "".join(rows(order[TILING_ROWS_SHOWN:])) + "</tbody></table></details>")
    return "\n".join(out)


def _flash_what_if(f: _Figures) -> str:
    rows = f.get("what_if.flash.largest_layers") or []
    if not rows:
        return ""
    out = ["<h3>Flash: the layers that dominate</h3>"]
    if f.get("what_if.flash.over_limit_bytes"):
        out.append(f'<p>Flash is {f.text("what_if.flash.over_limit_bytes", "size")} over the limit.</p>')
    out.append('<table><thead><tr><th>layer</th><th>op</th><th>stored as</th><th class="num">bytes</th>'
               '<th class="num">share</th><th>change</th></tr></thead><tbody>')
    for i, row in enumerate(rows):
        p = lambda k: path_join("what_if", "flash", "largest_layers", i, k)
        if "if_int8_saves_bytes" in row:
            change = f'as int8 saves {f.text(p("if_int8_saves_bytes"), "size")}'
        elif "if_float_costs_bytes" in row:
            change = f'kept float costs {f.text(p("if_float_costs_bytes"), "size")}'
        else:
            change = MISSING
        out.append(f'<tr>{f.text(p("name"), "text", "td", "name")}{f.maybe(p("op_type"), "text", "td")}'
                   f'{f.maybe(p("precision"), "text", "td")}{f.text(p("total_bytes"), "size", "td", "num")}'
                   f'{f.maybe(p("share_pct"), "pct1", "td", "num")}<td>{change}</td></tr>')
    out.append("</tbody></table>")
    return "\n".join(out)


# ---- model and data -------------------------------------------------------------------------------

def _details_section(f: _Figures, is_check: bool) -> str:
    facts: list[tuple[str, str]] = []   # (label as HTML, figure as HTML)

    def add(label: str, path: str, fmt: str, key_html: str = "") -> None:
        if f.has(path) and f.get(path) is not None:
            facts.append((escape(label) + key_html, f.text(path, fmt)))

    add("parameters", "model.params", "int")
    add("MACs", "model.macs", "int")
    add("element operations", "macs.elementwise_ops", "int")
    add("latency estimate (ms)", "macs.latency_ms", "num")
    add("energy estimate (mJ)", "macs.energy_mj", "num")
    for group in ("inputs", "outputs"):
        for name in f.get(f"model.{group}") or {}:
            path = path_join("model", group, name)
            add(f"{group[:-1]} ", path, "dims",
                f'<span class="keylabel" data-from-key="{_attr(path)}">{escape(name)}</span>')
    add("opset of the file", "model.opset", "int")
    for i, _ in enumerate(f.get("model.notes") or []):
        add("loader note", path_join("model", "notes", i), "text")
    for i, _ in enumerate(f.get("notes") or []):
        add("note", path_join("notes", i), "text")
    if f.get("model.float_nodes"):
        add("kept float (unsupported op)", "model.float_nodes", "list")
    for key in ("weights", "activations", "bias", "method"):
        add(f"quantization: {key}", f"quantization.{key}", "text")
    add("percentile", "quantization.percentile", "g")
    for role in ("calibration", "evaluation"):
        add(f"{role} folder", f"{role}.folder", "text")
        add(f"{role} samples", f"{role}.samples", "int")
        if f.get(f"{role}.skipped"):
            add(f"{role} files skipped", f"{role}.skipped", "int")
    add("labels from", "evaluation.labels", "text")
    if f.get("evaluation.class_names"):
        add("classes", "evaluation.class_names", "list")
    for section in ("equalization", "bias_correction"):
        for key in f.get(section) or {}:
            facts.append((escape(f"{section.replace('_', ' ')}: {key.replace('_', ' ')}"),
                          _generic_cell(f, path_join(section, key), "span")))
    rows = "".join(f"<dt>{label}</dt><dd>{value}</dd>" for label, value in facts)
    return f'<section id="details"><h2>Model and data</h2><dl class="facts">{rows}</dl></section>'
