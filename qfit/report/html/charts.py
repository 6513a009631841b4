"""charts: the SVG charts of report.html — memory gauges, the SRAM timeline, flash bars, the per-layer
error chart. Every mark carries its figure's JSON path (qfit.report.html.figures) and its length
follows the `data-axis-*` attributes of its <svg>.
"""
from __future__ import annotations

import math
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


def sram_chart(f: Figures) -> str:
    # Over 60 lines: one chart drawn top to bottom (bars, limit lines, labels, ticks) on shared coordinates.
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
    axis = Axis(base, 0.0, plot_h / top_value, float(top_value))
    slot = plot_w / len(timeline)
    bar_w = max(slot * 0.78, 0.6)
    parts = [svg_open(width, height, "live SRAM bytes per execution step", axis)]
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
        tip = (f"step {row['step']}: {row['node']} ({row['op_type']}), {fmt.size(value)} live"
               + (f": {tensors}" if tensors else ""))
        parts.append(f'<rect class="{css}"{f.tag_attrs(path_join("sram", "timeline", i, "live_bytes"), "bar-y")} '
                     f'data-unit="bytes" x="{px(left + i * slot + (slot - bar_w) / 2)}" y="{px(base - length)}" '
                     f'width="{px(bar_w)}" height="{px(length)}"><title>{escape(tip)}</title></rect>')
    parts.append(f'<line class="axis" x1="{px(left)}" y1="{px(base)}" x2="{px(left + plot_w)}" y2="{px(base)}"></line>')
    peak_x = left + (peak_index + 0.5) * slot if peak_index is not None else left
    # Line labels go at the end farther from the peak label; the lower line's label sits under it.
    anchor, label_x = ("end", left + plot_w) if peak_x < left + plot_w / 2 else ("start", left)
    lines = [(path, value, css, word) for path, value, css, word in
             (("sram.limit_bytes", limit, "limit", "limit"), ("arena.bytes", arena, "arena", "arena plan"))
             if value is not None]
    for path, value, css, word in lines:
        y = base - axis.length(value)
        below = len(lines) == 2 and value == min(v for _, v, _, _ in lines) and value != max(v for _, v, _, _ in lines)
        parts.append(f'<line class="{css}"{f.tag_attrs(path, "mark-y")} x1="{px(left)}" '
                     f'y1="{px(y)}" x2="{px(left + plot_w)}" y2="{px(y)}"></line>')
        parts.append(f'<text x="{px(label_x)}" y="{px(y + 14 if below else y - 5)}" text-anchor="{anchor}">'
                     f'{word} {f.text(path, "size", tag="tspan")}</text>')
    if peak_index is not None:
        bar_top = base - axis.length(timeline[peak_index]["live_bytes"])
        anchor = "start" if peak_x < left + plot_w / 3 else ("end" if peak_x > left + 2 * plot_w / 3 else "middle")
        label_y = max(bar_top - 8, 14.0)
        parts.append(f'<path class="peakmark" d="M{px(peak_x - 5)} {px(bar_top - 6)} L{px(peak_x + 5)} '
                     f'{px(bar_top - 6)} L{px(peak_x)} {px(bar_top - 1)} Z"></path>')
        parts.append(f'<text x="{px(peak_x)}" y="{px(label_y - 6)}" text-anchor="{anchor}" font-weight="700">'
                     f'peak {f.text("sram.peak_bytes", "size", tag="tspan")} at step '
                     f'{f.text("sram.peak_step", "int", tag="tspan")} '
                     f'({f.text("sram.peak_node", "text", tag="tspan")})</text>')
    last = len(timeline) - 1
    parts.append(f'<text class="tick" x="{px(left)}" y="{px(base + 18)}">step '
                 f'{f.text(path_join("sram", "timeline", 0, "step"), "int", tag="tspan")}</text>')
    parts.append(f'<text class="tick" x="{px(left + plot_w)}" y="{px(base + 18)}" text-anchor="end">step '
                 f'{f.text(path_join("sram", "timeline", last, "step"), "int", tag="tspan")}</text>')
    parts.append(f'<text class="tick" x="{px(left + plot_w / 2)}" y="{px(base + 18)}" text-anchor="middle">'
                 'execution order →</text>')
    parts.append("</svg>")
    return "".join(parts)


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
    # Over 60 lines: one chart drawn top to bottom (grid, marks, lines, points, ticks) on shared coordinates.
    layers = f.get("layers")
    acc = [(i, row["sqnr_db"]) for i, row in enumerate(layers) if row.get("sqnr_db") is not None]
    iso = [(i, row["sqnr_isolated_db"]) for i, row in enumerate(layers) if row.get("sqnr_isolated_db") is not None]
    bottom, top_db, step = _db_range([v for _, v in acc + iso])
    width, height = 920.0, 300.0
    left, right, top, bottom_margin = 52.0, 14.0, 34.0, 34.0
    plot_w, plot_h = width - left - right, height - top - bottom_margin
    base = top + plot_h
    axis = Axis(base, bottom, plot_h / (top_db - bottom), top_db)
    slot = plot_w / max(len(layers), 1)
    x_of = lambda i: left + (i + 0.5) * slot
    parts = [svg_open(width, height, "SQNR per layer in network order", axis)]
    tick = bottom
    while tick <= top_db + 1e-9:
        y = base - axis.length(tick)
        parts.append(f'<line class="grid" x1="{px(left)}" y1="{px(y)}" x2="{px(left + plot_w)}" y2="{px(y)}"></line>'
                     f'<text class="tick" x="{px(left - 6)}" y="{px(y + 4)}" text-anchor="end">{tick:g} dB</text>')
        tick += step
    # Letters of neighbouring marks alternate between two rows so they do not overprint.
    label_row, previous = {}, None
    for i in sorted(marked):
        close = previous is not None and x_of(i) - x_of(previous) < 14
        label_row[i] = 1 - label_row[previous] if close else 0
        previous = i
    for rank, i in enumerate(marked):
        x = x_of(i)
        parts.append(f'<line class="guide" x1="{px(x)}" y1="{px(top - 2)}" x2="{px(x)}" y2="{px(base)}"></line>'
                     f'<text class="letter" x="{px(x)}" y="{px(top - 8 - 12 * label_row[i])}" '
                     f'text-anchor="middle">{MARK_LETTERS[rank]}</text>')
    for series, css in ((iso, "iso-line"), (acc, "acc-line")):
        if len(series) > 1:
            points = " ".join(f"{px(x_of(i))},{px(base - axis.length(v))}" for i, v in series)
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
                     f'data-unit="db" x="{px(x_of(i) - 3)}" y="{px(y - 3)}" width="6.00" height="6.00">'
                     f"<title>{escape(tip(i))}</title></rect>")
    for i, value in acc:
        y = base - axis.length(value)
        css = "acc float" if layers[i].get("precision") == "float" else "acc"
        parts.append(f'<circle class="{css}"{f.tag_attrs(path_join("layers", i, "sqnr_db"), "point-y")} '
                     f'data-unit="db" cx="{px(x_of(i))}" cy="{px(y)}" r="3.20"><title>{escape(tip(i))}</title></circle>')
        if i in marked:
            parts.append(f'<circle class="ring" cx="{px(x_of(i))}" cy="{px(y)}" r="7.00"></circle>')
    parts.append(f'<line class="axis" x1="{px(left)}" y1="{px(base)}" x2="{px(left + plot_w)}" y2="{px(base)}"></line>')
    last = len(layers) - 1
    parts.append(f'<text class="tick" x="{px(left)}" y="{px(base + 18)}">'
                 f'{f.text(path_join("layers", 0, "name"), "text", tag="tspan")}</text>')
    if last > 0:
        parts.append(f'<text class="tick" x="{px(left + plot_w)}" y="{px(base + 18)}" text-anchor="end">'
                     f'{f.text(path_join("layers", last, "name"), "text", tag="tspan")}</text>')
    parts.append(f'<text class="tick" x="{px(left + plot_w / 2)}" y="{px(base + 18)}" text-anchor="middle">'
                 "network order →</text></svg>")
    return "".join(parts)


# (key, heading, format) of the per-layer tables; a column appears when some row has the key.
