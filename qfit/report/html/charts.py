"""charts: the SVG charts of report.html — memory gauges, the SRAM timeline, flash bars, the per-layer
error chart. Every mark carries its figure's JSON path (qfit.report.html.figures) and its length
follows the `data-axis-*` attributes of its <svg>.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from html import escape

from qfit.measure.compare import SQNR_CAP_DB
from qfit.report import format as fmt
from qfit.report.html.figures import Axis, Figures, path_join, px, svg_open

WORST_LAYERS_MARKED = 5
MARK_LETTERS = "ABCDEFGHJK"

def gauge(f: Figures, used_path: str, limit_path: str, label: str) -> str:
    """Used against limit as two horizontal bars: the limit as a dashed outline, usage solid (hatched
    when over)."""
    used, limit = f.get(used_path), f.get(limit_path)
    if used is None or limit is None:
        return ""
    width, height = 260.0, 20.0
    axis = Axis(0.0, 0.0, width / max(used, limit, 1), float(max(used, limit, 1)))
    over = " over" if used > limit else ""
    return (svg_open(width, height, label, axis, "chart gauge")
            + f'<rect class="gauge-limit"{f.tag_attrs(limit_path, "bar-x")} x="0.00" y="1.00" '
              f'width="{px(axis.length(limit))}" height="18.00"></rect>'
            + f'<rect class="gauge-used{over}"{f.tag_attrs(used_path, "bar-x")} x="0.00" y="5.00" '
              f'width="{px(axis.length(used))}" height="10.00"></rect></svg>')


@dataclass(frozen=True)
class _Plot:
    """A chart's plot area on its <svg>: x runs from `left` over `width`; values rise from `base`
    (the y of the axis line) along `axis`, up to `top`."""

    left: float
    width: float
    top: float
    base: float
    axis: Axis

    def y_of(self, value: float) -> float:
        return self.base - self.axis.length(value)

    def axis_line(self) -> str:
        return (f'<line class="axis" x1="{px(self.left)}" y1="{px(self.base)}" x2="{px(self.left + self.width)}" '
                f'y2="{px(self.base)}"></line>')

    def x_ticks(self, f: Figures, first_path: str, last_path: str | None, kind: str, prefix: str,
                caption: str) -> str:
        """The first and (when given) last x positions labelled from the report, a caption between."""
        y = px(self.base + 18)
        text = (f'<text class="tick" x="{px(self.left)}" y="{y}">{prefix}'
                f'{f.text(first_path, kind, tag="tspan")}</text>')
        if last_path is not None:
            text += (f'<text class="tick" x="{px(self.left + self.width)}" y="{y}" text-anchor="end">{prefix}'
                     f'{f.text(last_path, kind, tag="tspan")}</text>')
        return text + (f'<text class="tick" x="{px(self.left + self.width / 2)}" y="{y}" text-anchor="middle">'
                       f'{caption}</text>')


def sram_chart(f: Figures) -> str:
    """Live SRAM bytes per execution step as bars, the limit and the arena plan as lines, the peak marked."""
    timeline = f.get("sram.timeline") or []
    if not timeline:
        return '<p>No execution steps.</p>'
    limit = f.get("sram.limit_bytes")
    width, height = 920.0, 290.0
    left, right, top, bottom = 14.0, 14.0, 40.0, 34.0
    plot_w, plot_h = width - left - right, height - top - bottom
    arena = f.get("arena.bytes")
    highest = max([row["live_bytes"] for row in timeline] + [limit or 0, arena or 0, 1])
    top_value = highest * 1.1
    axis = Axis(top + plot_h, 0.0, plot_h / top_value, float(top_value))
    plot = _Plot(left, plot_w, top, top + plot_h, axis)
    slot = plot_w / len(timeline)
    peak_index = next((i for i, row in enumerate(timeline) if row["step"] == f.get("sram.peak_step")), None)
    peak_x = left + (peak_index + 0.5) * slot if peak_index is not None else left
    parts = [svg_open(width, height, "live SRAM bytes per execution step", axis)]
    parts += _sram_bars(f, timeline, plot, slot, limit, peak_index)
    parts.append(plot.axis_line())
    parts += _level_lines(f, plot, peak_x, limit, arena)
    if peak_index is not None:
        parts += _peak_label(f, plot, peak_x, timeline[peak_index]["live_bytes"])
    last = len(timeline) - 1
    parts.append(plot.x_ticks(f, path_join("sram", "timeline", 0, "step"), path_join("sram", "timeline", last, "step"),
                              "int", "step ", "execution order →"))
    parts.append("</svg>")
    return "".join(parts)


def _sram_bars(f: Figures, timeline: list[dict], plot: _Plot, slot: float, limit: int | None,
               peak_index: int | None) -> list[str]:
    """One bar per step, its tooltip naming the node and the tensors live there."""
    bar_w = max(slot * 0.78, 0.6)
    parts = []
    for i, row in enumerate(timeline):
        value = row["live_bytes"]
        length = plot.axis.length(value)
        css = "bar"
        if limit is not None and value > limit:
            css += " over"
        if i == peak_index:
            css += " peak"
        tensors = ", ".join(row.get("live_tensors", []))
        tip = (f"step {row['step']}: {row['node']} ({row['op_type']}), {fmt.size(value)} live"
               + (f": {tensors}" if tensors else ""))
        parts.append(f'<rect class="{css}"{f.tag_attrs(path_join("sram", "timeline", i, "live_bytes"), "bar-y")} '
                     f'data-unit="bytes" x="{px(plot.left + i * slot + (slot - bar_w) / 2)}" '
                     f'y="{px(plot.base - length)}" '
                     f'width="{px(bar_w)}" height="{px(length)}"><title>{escape(tip)}</title></rect>')
    return parts


def _level_lines(f: Figures, plot: _Plot, peak_x: float, limit: int | None, arena: int | None) -> list[str]:
    """The limit and arena-plan lines across the plot, each labelled with its size."""
    # Line labels go at the end farther from the peak label; the lower line's label sits under it.
    anchor, label_x = ("end", plot.left + plot.width) if peak_x < plot.left + plot.width / 2 else ("start", plot.left)
    lines = [(path, value, css, word) for path, value, css, word in
             (("sram.limit_bytes", limit, "limit", "limit"), ("arena.bytes", arena, "arena", "arena plan"))
             if value is not None]
    parts = []
    for path, value, css, word in lines:
        y = plot.y_of(value)
        below = len(lines) == 2 and value == min(v for _, v, _, _ in lines) and value != max(v for _, v, _, _ in lines)
        parts.append(f'<line class="{css}"{f.tag_attrs(path, "mark-y")} x1="{px(plot.left)}" '
                     f'y1="{px(y)}" x2="{px(plot.left + plot.width)}" y2="{px(y)}"></line>')
        parts.append(f'<text x="{px(label_x)}" y="{px(y + 14 if below else y - 5)}" text-anchor="{anchor}">'
                     f'{word} {f.text(path, "size", tag="tspan")}</text>')
    return parts


def _peak_label(f: Figures, plot: _Plot, peak_x: float, peak_bytes: int) -> list[str]:
    """A triangle over the peak bar and the peak's size, step and node above it."""
    bar_top = plot.y_of(peak_bytes)
    left, width = plot.left, plot.width
    anchor = "start" if peak_x < left + width / 3 else ("end" if peak_x > left + 2 * width / 3 else "middle")
    label_y = max(bar_top - 8, 14.0)
    return [f'<path class="peakmark" d="M{px(peak_x - 5)} {px(bar_top - 6)} L{px(peak_x + 5)} '
            f'{px(bar_top - 6)} L{px(peak_x)} {px(bar_top - 1)} Z"></path>',
            f'<text x="{px(peak_x)}" y="{px(label_y - 6)}" text-anchor="{anchor}" font-weight="700">'
            f'peak {f.text("sram.peak_bytes", "size", tag="tspan")} at step '
            f'{f.text("sram.peak_step", "int", tag="tspan")} '
            f'({f.text("sram.peak_node", "text", tag="tspan")})</text>']


FLASH_BAR_WIDTH, FLASH_BAR_HEIGHT = 240.0, 14.0


def flash_axis(layers: list[dict]) -> Axis:
    """One scale for every layer's flash bars: the widest bar fills the cell."""
    widest = max([max(r["total_bytes"], r["float32_bytes"]) for r in layers] + [1])
    return Axis(0.0, 0.0, FLASH_BAR_WIDTH / widest, float(widest))


def flash_bar(f: Figures, i: int, axis: Axis) -> str:
    """Layer i of the flash map: bytes as stored (solid) over the same layer in float32 (hatched)."""
    p = lambda key: path_join("flash", "layers", i, key)  # noqa: E731
    layer = f.get(path_join("flash", "layers", i))
    return (svg_open(FLASH_BAR_WIDTH, FLASH_BAR_HEIGHT, f"flash of layer {layer['name']}", axis, "chart bars")
            + f'<rect class="floatbar"{f.tag_attrs(p("float32_bytes"), "bar-x")} x="0.00" y="0.50" '
              f'width="{px(axis.length(layer["float32_bytes"]))}" height="13.00"></rect>'
            + f'<rect class="int8bar"{f.tag_attrs(p("total_bytes"), "bar-x")} x="0.00" y="3.50" '
              f'width="{px(axis.length(layer["total_bytes"]))}" height="7.00"></rect></svg>')


def swatch(css: str) -> str:
    if css in ("limit", "arena"):
        return (f'<svg class="swatch" width="22" height="10" aria-hidden="true">'
                f'<line class="{css}" x1="0" y1="5" x2="22" y2="5"></line></svg>')
    return (f'<svg class="swatch" width="14" height="12" aria-hidden="true">'
            f'<rect class="{css}" x="0" y="0" width="14" height="12"></rect></svg>')


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


def error_chart(f: Figures, marked: list[int]) -> str:
    """Accumulated (circles, one line) and isolated (squares, another) SQNR per layer in network order;
    the `marked` layers get a lettered guide and a ring."""
    layers = f.get("layers")
    acc = [(i, row["sqnr_db"]) for i, row in enumerate(layers) if row.get("sqnr_db") is not None]
    iso = [(i, row["sqnr_isolated_db"]) for i, row in enumerate(layers) if row.get("sqnr_isolated_db") is not None]
    bottom, top_db, step = _db_range([v for _, v in acc + iso])
    width, height = 920.0, 300.0
    left, right, top, bottom_margin = 52.0, 14.0, 34.0, 34.0
    plot_w, plot_h = width - left - right, height - top - bottom_margin
    axis = Axis(top + plot_h, bottom, plot_h / (top_db - bottom), top_db)
    plot = _Plot(left, plot_w, top, top + plot_h, axis)
    slot = plot_w / max(len(layers), 1)
    x_of = lambda i: left + (i + 0.5) * slot  # noqa: E731
    parts = [svg_open(width, height, "SQNR per layer in network order", axis)]
    parts += _db_grid(plot, bottom, top_db, step)
    parts += _mark_guides(plot, marked, x_of)
    for series, css in ((iso, "iso-line"), (acc, "acc-line")):
        if len(series) > 1:
            points = " ".join(f"{px(x_of(i))},{px(plot.y_of(v))}" for i, v in series)
            parts.append(f'<polyline class="{css}" points="{points}" aria-hidden="true"></polyline>')
    parts += _error_points(f, plot, layers, acc, iso, marked, x_of)
    parts.append(plot.axis_line())
    last = len(layers) - 1
    parts.append(plot.x_ticks(f, path_join("layers", 0, "name"),
                              path_join("layers", last, "name") if last > 0 else None,
                              "text", "", "network order →"))
    parts.append("</svg>")
    return "".join(parts)


def _db_grid(plot: _Plot, bottom: float, top_db: float, step: float) -> list[str]:
    """A grid line and a dB label every `step` from `bottom` to `top_db`."""
    parts = []
    tick = bottom
    while tick <= top_db + 1e-9:
        y = plot.y_of(tick)
        parts.append(f'<line class="grid" x1="{px(plot.left)}" y1="{px(y)}" x2="{px(plot.left + plot.width)}" '
                     f'y2="{px(y)}"></line>'
                     f'<text class="tick" x="{px(plot.left - 6)}" y="{px(y + 4)}" text-anchor="end">{tick:g} dB</text>')
        tick += step
    return parts


def _mark_guides(plot: _Plot, marked: list[int], x_of) -> list[str]:
    """A vertical guide and a letter (A, B, ... in `marked` order) over each marked layer."""
    # Letters of neighbouring marks alternate between two rows so they do not overprint.
    label_row, previous = {}, None
    for i in sorted(marked):
        close = previous is not None and x_of(i) - x_of(previous) < 14
        label_row[i] = 1 - label_row[previous] if close else 0
        previous = i
    parts = []
    for rank, i in enumerate(marked):
        x = x_of(i)
        parts.append(f'<line class="guide" x1="{px(x)}" y1="{px(plot.top - 2)}" x2="{px(x)}" y2="{px(plot.base)}"></line>'
                     f'<text class="letter" x="{px(x)}" y="{px(plot.top - 8 - 12 * label_row[i])}" '
                     f'text-anchor="middle">{MARK_LETTERS[rank]}</text>')
    return parts


def _error_points(f: Figures, plot: _Plot, layers: list[dict], acc: list[tuple[int, float]],
                  iso: list[tuple[int, float]], marked: list[int], x_of) -> list[str]:
    """Isolated squares, then accumulated circles (hollow for float layers, ringed when marked)."""
    parts = []
    for i, value in iso:
        y = plot.y_of(value)
        parts.append(f'<rect class="iso"{f.tag_attrs(path_join("layers", i, "sqnr_isolated_db"), "point-y")} '
                     f'data-unit="db" x="{px(x_of(i) - 3)}" y="{px(y - 3)}" width="6.00" height="6.00">'
                     f"<title>{escape(_layer_tip(layers[i]))}</title></rect>")
    for i, value in acc:
        y = plot.y_of(value)
        css = "acc float" if layers[i].get("precision") == "float" else "acc"
        parts.append(f'<circle class="{css}"{f.tag_attrs(path_join("layers", i, "sqnr_db"), "point-y")} '
                     f'data-unit="db" cx="{px(x_of(i))}" cy="{px(y)}" r="3.20">'
                     f'<title>{escape(_layer_tip(layers[i]))}</title></circle>')
        if i in marked:
            parts.append(f'<circle class="ring" cx="{px(x_of(i))}" cy="{px(y)}" r="7.00"></circle>')
    return parts


def _layer_tip(row: dict) -> str:
    text = f"{row['name']} ({row['op_type']}, {row.get('precision', '')}): accumulated {row['sqnr_db']:.1f} dB"
    if row.get("sqnr_isolated_db") is not None:
        text += f", isolated {row['sqnr_isolated_db']:.1f} dB"
    if row["sqnr_db"] >= SQNR_CAP_DB:
        text += " (exact: no error measured)"
    return text


# (key, heading, format) of the per-layer tables; a column appears when some row has the key.
