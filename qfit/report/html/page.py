"""page: the report dict -> one self-contained HTML page (inline CSS and SVG, no script, no network).

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

from html import escape

from qfit.report import format as fmt
from qfit.report.html.charts import (MARK_LETTERS, error_chart, flash_axis, flash_bar, gauge, marked_layers,
                                     sram_chart, swatch)
from qfit.report.html.figures import MISSING, Figures, attr, format_for_path, path_join, path_split
from qfit.report.html.style import PATTERNS, STYLE

TILING_ROWS_SHOWN = 8
MAC_LAYERS_SHOWN = 8


def render_html(report: dict) -> str:
    """The whole report as one self-contained HTML page."""
    f = Figures(report)
    is_check = "evaluation" in report   # a `qfit check` report; `qfit budget` has memory figures only
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


def _header(f: Figures) -> str:
    if f.has("model.path"):
        name = f.text("model.path", "text")
        sub = f"qfit {f.text('tool_version', 'text')}" if f.has("tool_version") else "qfit"
    else:
        name = f.maybe("model_file", "text")
        sub = "qfit budget: memory only" + (f": {f.text('model_kind', 'text')}" if f.has("model_kind") else "")
    h = fmt.HEADINGS
    links = [("verdict", h["verdict"]), ("sram", h["sram"]), ("flash", h["flash"]), ("errors", h["layers"]),
             ("whatif", h["what_if"]), ("details", h["model"])]
    present = {"verdict": True, "sram": f.has("sram.timeline"), "flash": f.has("flash.layers"),
               "errors": bool(f.get("layers")), "whatif": bool(f.get("what_if")), "details": True}
    nav = "".join(f'<a href="#{key}">{label}</a>' for key, label in links if present[key])
    return (f'<header class="top"><h1>qfit report: {name}</h1><p>{sub}</p>'
            f"<nav>{nav}</nav></header>")


def _verdict(f: Figures, is_check: bool) -> str:
    out = [f'<section id="verdict"><h2>{fmt.HEADINGS["verdict"]}</h2>']
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
            + gauge(f, "flash.total_bytes", "flash.limit_bytes", "flash used against the limit")
            + f'<p class="small">Weights, int32 biases and scales {f.text("flash.int8_bytes", "size")}, '
              f'activation scales and zero points {f.maybe("flash.activation_param_bytes", "size")}, '
              f'reserve for code and runtime {f.maybe("flash.reserve_bytes", "size")} (given), '
              f'per-layer metadata {f.maybe("flash.meta_bytes", "size")} (estimate).</p></div>')
    if f.has("sram.peak_bytes"):
        cards.append(
            f'<div class="card"><h3>SRAM {f.badge("sram.fits")}</h3>'
            f'<p>Needs {f.text("sram.required_bytes", "size")} of {f.maybe("sram.limit_bytes", "size")}: '
            f'{f.maybe("sram.headroom_bytes", "headroom")}.</p>'
            + gauge(f, "sram.required_bytes", "sram.limit_bytes", "SRAM needed against the limit")
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
    # the accuracy gate's comparison, a failed expected float accuracy, warnings (qfit.measure.gate)
    if f.has("verdict.accuracy_gate.reason"):
        out.append(f'<p>Accuracy gate: {f.text("verdict.accuracy_gate.reason", "text")}.</p>')
    if f.get("verdict.float_check.message"):
        out.append(f'<p><strong>Float accuracy.</strong> {f.text("verdict.float_check.message", "text")}.</p>')
    for i in range(len(f.get("verdict.warnings") or [])):
        out.append(f'<p><strong>Warning.</strong> {f.text(f"verdict.warnings.{i}", "text")}.</p>')
    if f.has("caution"):
        out.append(f'<div class="caution"><strong>Caution.</strong>{f.text("caution", "text")}</div>')
    out.append("</section>")
    return "\n".join(out)


def _accuracy_card(f: Figures) -> str:
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
        if f.has("accuracy.top5.float") and fmt.show_top5(f.report):
            lines.append(f'<p class="small">Top-5: float {f.text("accuracy.top5.float", "pct")}, int8 '
                         f'{f.text("accuracy.top5.int8", "pct")}, drop {f.text("accuracy.top5.drop_pt", "pt")}.</p>')
        if f.has("accuracy.output_sqnr_db"):
            lines.append(f'<p class="small">Output SQNR {f.text("accuracy.output_sqnr_db", "db")}.</p>')
        title = fmt.HEADINGS["accuracy"]
    elif metric == "agreement":
        lines = [f'<p>No labels: float and int8 pick the same class for {f.text("accuracy.int8", "pct")} of '
                 f'{samples} samples.</p>']
        if f.has("accuracy.output_sqnr_db"):
            lines.append(f'<p class="small">Output SQNR {f.text("accuracy.output_sqnr_db", "db")}.</p>')
        title = fmt.HEADINGS["accuracy"]
    else:
        lines = [f'<p>Output SQNR {f.maybe("accuracy.output_sqnr_db", "db")} over {samples} samples.</p>']
        if f.has("accuracy.decision_flips_pct"):
            lines.append(f'<p>Decisions flipped at threshold {f.text("accuracy.threshold", "num")}: '
                         f'{f.text("accuracy.decision_flips_pct", "pct")} of samples.</p>')
        title = fmt.HEADINGS["accuracy"]
    return f'<div class="card"><h3>{title}</h3>' + "".join(lines) + gate + "</div>"


# ---- SRAM timeline --------------------------------------------------------------------------------


def _sram_section(f: Figures) -> str:
    out = [f'<section id="sram"><h2>{fmt.HEADINGS["sram"]}</h2>',
           f'<p>Each bar is the bytes of activation tensors live while one node runs, in the '
           f'{f.maybe("sram.order_used", "text")} execution order. Hover over a bar for its node and tensors.</p>',
           sram_chart(f),
           '<div class="legend">'
           f'<span>{swatch("bar")} live bytes</span>'
           f'<span>{swatch("bar over")} above the limit (hatched)</span>'
           f'<span>{swatch("limit")} SRAM limit</span>'
           f'<span>{swatch("arena")} arena plan (what must fit)</span><span>▼ marks the peak step</span></div>']
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
    if f.has("sram.conventions"):
        conv = f.get("sram.conventions")
        names = {"views": "reshapes share their input's bytes", "inplace": "elementwise ops overwrite their input",
                 "scratch": "convolution scratch counted"}
        items = [f'{label}: {f.text(path_join("sram", "conventions", key), "yesno")}'
                 for key, label in names.items() if key in conv]
        facts.append("Conventions: " + "; ".join(items) + ".")
    out += [f'<p class="small">{line}</p>' for line in facts]
    if f.has("order.best_peak_bytes"):
        out.append(f'<h3>{fmt.HEADINGS["order"]}</h3><p class="small">{f.maybe("order.method", "text")} search; the '
                   f'graph\'s own order peaks at {f.text("order.default_peak_bytes", "size")}, the best order found at '
                   f'{f.text("order.best_peak_bytes", "size")} (saves {f.maybe("order.saved_bytes", "size")}).</p>')
    timeline = f.get("sram.timeline") or []
    if timeline:
        out.append("<details><summary>Every step</summary><table><thead><tr><th class=\"num\">step</th>"
                   "<th>node</th><th>op</th><th class=\"num\">live</th><th>live tensors</th></tr></thead><tbody>")
        for i, _ in enumerate(timeline):
            p = lambda key: path_join("sram", "timeline", i, key)
            out.append(f'<tr>{f.text(p("step"), "int", "td", "num")}{f.text(p("node"), "text", "td", "name")}'
                       f'{f.maybe(p("op_type"), "text", "td")}{f.text(p("live_bytes"), "size", "td", "num")}'
                       f'{f.maybe(p("live_tensors"), "list", "td", "name")}</tr>')
        out.append("</tbody></table></details>")
    out.append("</section>")
    return "\n".join(out)


def _flash_section(f: Figures) -> str:
    layers = f.get("flash.layers") or []
    out = [f'<section id="flash"><h2>{fmt.HEADINGS["flash"]}</h2>',
           f'<p>Stored weights and constants {f.text("flash.int8_bytes", "size")} in place of '
           f'{f.text("flash.float_bytes", "size")} as float32 ({f.maybe("flash.shrink_ratio", "ratio")} smaller); '
           f'with activation parameters, reserve and metadata the total is {f.text("flash.total_bytes", "size")} '
           f'of {f.maybe("flash.limit_bytes", "size")}. Largest layers first.</p>',
           '<div class="legend">'
           f'<span>{swatch("int8bar")} as stored (int8 weights, int32 bias, scales)</span>'
           f'<span>{swatch("floatbar")} the same layer in float32 (hatched)</span></div>']
    order = sorted(range(len(layers)), key=lambda i: (-layers[i]["total_bytes"], layers[i]["name"]))
    axis = flash_axis(layers)
    out.append('<table class="flashmap"><thead><tr><th>layer</th><th>op</th><th>stored as</th>'
               '<th class="num">bytes</th><th class="num">float32</th><th>stored vs float32</th></tr></thead><tbody>')
    for i in order:
        p = lambda key: path_join("flash", "layers", i, key)
        bar = flash_bar(f, i, axis)
        out.append(f'<tr>{f.text(p("name"), "text", "td", "name")}{f.maybe(p("op_type"), "text", "td")}'
                   f'{f.maybe(p("precision"), "text", "td")}{f.text(p("total_bytes"), "size", "td", "num")}'
                   f'{f.text(p("float32_bytes"), "size", "td", "num")}<td>{bar}</td></tr>')
    out.append("</tbody></table></section>")
    return "\n".join(out)


_LAYER_COLUMNS = [("sqnr_db", "accumulated", "db"), ("sqnr_isolated_db", "isolated", "db"),
                  ("isolated_output_sample_sqnr_db", "output SQNR, alone int8", "db"),
                  ("float_recovery_db", "output SQNR gain, kept float", "db"),
                  ("sensitivity_pt", "drop, alone int8", "pt"),
                  ("sensitivity_agreement_pt", "agreement lost, alone int8", "pt"),
                  ("float_recovery_pt", "recovered, kept float", "pt"),
                  ("float_recovery_agreement_pt", "agreement recovered, kept float", "pt"),
                  ("output_sqnr_if_float_db", "output SQNR, kept float", "db"),
                  ("fallback_cost_bytes", "extra bytes of a repair", "fallback")]
_ALL_LAYER_EXTRA = [("cosine", "cosine", "cos"), ("weight_bytes_int8", "int8 weights", "size")]
_FALLBACK_LABELS = (("float", "kept float"), ("int16", "int16 output"))


def _fallback_cell(f: Figures, path: str) -> str:
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
    return '<td class="cost">' + "<br>".join(parts) + "</td>"


def _layer_table(f: Figures, indices: list[int], letters: dict[int, str] | None = None,
                 extra: list = ()) -> str:
    layers = f.get("layers")
    # a column only where some row has a figure (the sweep leaves points it cannot resolve null)
    columns = [c for c in _LAYER_COLUMNS + list(extra) if any(layers[i].get(c[0]) is not None for i in indices)]
    head = ("<th>mark</th>" if letters is not None else "") + "<th>layer</th><th>op</th><th>stored as</th>"
    head += "".join(f'<th class="num">{label}</th>' for _, label, _ in columns)
    rows = []
    for i in indices:
        p = lambda key: path_join("layers", i, key)
        mark = f"<td>{letters[i]}</td>" if letters is not None else ""
        cells = "".join(_fallback_cell(f, p(key)) if shown == "fallback" else f.maybe(p(key), shown, "td", "num")
                        for key, _, shown in columns)
        rows.append(f'<tr>{mark}{f.text(p("name"), "text", "td", "name")}{f.maybe(p("op_type"), "text", "td")}'
                    f'{f.maybe(p("precision"), "text", "td")}{cells}</tr>')
    return (f'<div class="scroll"><table><thead><tr>{head}</tr></thead><tbody>' + "".join(rows)
            + "</tbody></table></div>")


def _error_section(f: Figures) -> str:
    criterion, marked = marked_layers(f.report)
    letters = {i: MARK_LETTERS[rank] for rank, i in enumerate(marked)}
    has_isolated = any("sqnr_isolated_db" in row for row in f.get("layers"))
    out = [f'<section id="errors"><h2>{fmt.HEADINGS["layers"]}</h2>',
           "<p>Accumulated SQNR compares the int8 model's tensor with the float model's at the same point: "
           "where the error has grown to. "
           + ("Isolated SQNR quantizes only that layer: what the layer itself causes. " if has_isolated else
              "Isolated figures were not measured for this report. ")
           + "Higher is better.</p>",
           error_chart(f, marked),
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
        out.append(f"<h3>{fmt.HEADINGS['sensitivity']}: the layers with {criterion}</h3>")
        out.append(_layer_table(f, marked, letters))
    all_rows = list(range(len(f.get("layers"))))
    out.append("<details><summary>Every layer</summary>"
               + _layer_table(f, all_rows, extra=_ALL_LAYER_EXTRA) + "</details>")
    if f.get("repair") is not None:
        out.append(_repair_log(f))
    out.append("</section>")
    return "\n".join(out)


def _generic_cell(f: Figures, path: str, tag: str = "td") -> str:
    value = f.get(path)
    if isinstance(value, dict):
        inner = "; ".join(f"{escape(str(k))}: {_generic_cell(f, path_join(*path_split(path), k), 'span')}"
                          for k in value)
        return f"<{tag}>{inner}</{tag}>"
    if isinstance(value, list) and any(isinstance(v, (dict, list)) for v in value):
        inner = "; ".join(_generic_cell(f, path_join(*path_split(path), k), "span") for k in range(len(value)))
        return f"<{tag}>{inner}</{tag}>"
    shown = format_for_path(path, value)
    css = "num" if shown not in ("text", "list", "yesno") else ""
    return f.text(path, shown, tag, css)


def _repair_log(f: Figures) -> str:
    """The repair log, whatever fields the repair search records: each value is shown in the format
    its key's unit suffix names."""
    repair = f.get("repair")
    out = [f"<h3>{fmt.HEADINGS['repair']}</h3>"]
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

def _what_if_section(f: Figures) -> str:
    out = [f'<section id="whatif"><h2>{fmt.HEADINGS["what_if"]}</h2>']
    if f.has("what_if.order.saves_bytes"):
        out.append(f'<p>Execution order: the best order found saves {f.text("what_if.order.saves_bytes", "size")} '
                   f'of peak (from {f.maybe("what_if.order.default_peak_bytes", "size")} to '
                   f'{f.maybe("what_if.order.best_peak_bytes", "size")}).</p>')
    out.append(_resolution_what_if(f))
    out.append(_tiling_what_if(f))
    out.append(_flash_what_if(f))
    out.append("</section>")
    return "\n".join(p for p in out if p)


def _resolution_what_if(f: Figures) -> str:
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
        step = (f'<span class="keylabel" data-from-key="{attr(path_join("what_if", "resolution", "largest_fitting", key))}">'
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


def _tiling_what_if(f: Figures) -> str:
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


def _flash_what_if(f: Figures) -> str:
    rows = f.get("what_if.flash.largest_layers") or []
    if not rows:
        return ""
    out = ["<h3>Flash: the layers that dominate</h3>"]
    over = bool(f.get("what_if.flash.over_limit_bytes"))
    if over:
        out.append(f'<p>Flash is {f.text("what_if.flash.over_limit_bytes", "size")} over the limit.</p>')
        fit = f.get("what_if.flash.fit_at_4bit") or {}
        if fit.get("layers"):
            out.append(f'<p>4-bit weights in {len(fit["layers"])} layer(s) would free '
                       f'{f.text("what_if.flash.fit_at_4bit.frees_bytes", "size")}'
                       f'{"" if fit.get("enough") else ": not enough on their own"} (estimate).</p>')
        if f.has("what_if.flash.estimate_note"):
            out.append(f'<p class="small">{f.text("what_if.flash.estimate_note", "text")}.</p>')
    # over the limit, what would shrink each layer replaces what a float fallback would cost
    last = ('<th class="num">4-bit frees (est.)</th><th class="num">half width frees (est.)</th>' if over
            else "<th>change</th>")
    out.append('<table><thead><tr><th>layer</th><th>op</th><th>stored as</th><th class="num">bytes</th>'
               f'<th class="num">share</th>{last}</tr></thead><tbody>')
    for i, row in enumerate(rows):
        p = lambda k: path_join("what_if", "flash", "largest_layers", i, k)
        if over:
            change = (f.maybe(p("if_4bit_frees_bytes"), "size", "td", "num")
                      + f.maybe(p("if_half_width_frees_bytes"), "size", "td", "num"))
        elif "if_int8_saves_bytes" in row:
            change = f'<td>as int8 saves {f.text(p("if_int8_saves_bytes"), "size")}</td>'
        elif "if_float_costs_bytes" in row:
            change = f'<td>kept float costs {f.text(p("if_float_costs_bytes"), "size")}</td>'
        else:
            change = f"<td>{MISSING}</td>"
        out.append(f'<tr>{f.text(p("name"), "text", "td", "name")}{f.maybe(p("op_type"), "text", "td")}'
                   f'{f.maybe(p("precision"), "text", "td")}{f.text(p("total_bytes"), "size", "td", "num")}'
                   f'{f.maybe(p("share_pct"), "pct1", "td", "num")}{change}</tr>')
    out.append("</tbody></table>")
    return "\n".join(out)


# ---- model and data -------------------------------------------------------------------------------

def _details_section(f: Figures, is_check: bool) -> str:
    """Model facts, then (for a check) quantization and data, improvements, and the largest MAC layers;
    each group under the heading report.md gives it."""
    groups: list[tuple[str | None, list[tuple[str, str]]]] = [(None, [])]   # (heading, [(label, figure)])

    def add(label: str, path: str, shown: str, key_html: str = "") -> None:
        if f.has(path) and f.get(path) is not None:
            groups[-1][1].append((escape(label) + key_html, f.text(path, shown)))

    add("parameters", "model.params", "int")
    add("MACs", "model.macs", "int")
    add("element operations", "macs.elementwise_ops", "int")
    add("latency estimate (ms)", "macs.latency_ms", "num")
    add("energy estimate (mJ)", "macs.energy_mj", "num")
    for group in ("inputs", "outputs"):
        for name in f.get(f"model.{group}") or {}:
            path = path_join("model", group, name)
            add(f"{group[:-1]} ", path, "dims",
                f'<span class="keylabel" data-from-key="{attr(path)}">{escape(name)}</span>')
    add("opset of the file", "model.opset", "int")
    for i, _ in enumerate(f.get("model.notes") or []):
        add("loader note", path_join("model", "notes", i), "text")
    for i, _ in enumerate(f.get("notes") or []):
        add("note", path_join("notes", i), "text")
    if f.get("model.float_nodes"):
        add("kept float (unsupported op)", "model.float_nodes", "list")
    if is_check:
        groups.append((fmt.HEADINGS["quantization"], []))
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
    if any((f.get(section) or {}).get("enabled") for section in ("equalization", "bias_correction")):
        groups.append((fmt.HEADINGS["improvements"], []))
        for section in ("equalization", "bias_correction"):
            for key in f.get(section) or {}:
                groups[-1][1].append((escape(f"{section.replace('_', ' ')}: {key.replace('_', ' ')}"),
                                      _generic_cell(f, path_join(section, key), "span")))
    out = [f'<section id="details"><h2>{fmt.HEADINGS["model"]}</h2>']
    for heading, facts in groups:
        if heading:
            out.append(f"<h3>{heading}</h3>")
        out.append('<dl class="facts">' + "".join(f"<dt>{label}</dt><dd>{value}</dd>" for label, value in facts)
                   + "</dl>")
    out.append(_macs_table(f))
    out.append("</section>")
    return "\n".join(out)


def _macs_table(f: Figures) -> str:
    layers = f.get("macs.layers") or []
    if not layers:
        return ""
    order = sorted(range(len(layers)), key=lambda i: (-layers[i]["macs"], -layers[i]["elementwise_ops"],
                                                      layers[i]["name"]))[:MAC_LAYERS_SHOWN]
    rows = []
    for i in order:
        p = lambda key: path_join("macs", "layers", i, key)  # noqa: E731
        rows.append(f'<tr>{f.text(p("name"), "text", "td", "name")}{f.maybe(p("op_type"), "text", "td")}'
                    f'{f.text(p("macs"), "int", "td", "num")}{f.text(p("elementwise_ops"), "int", "td", "num")}</tr>')
    return (f'<h3>{fmt.HEADINGS["macs"]}</h3><p class="small">The layers with the most MACs, largest first.</p>'
            '<table><thead><tr><th>layer</th><th>op</th><th class="num">MACs</th><th class="num">element ops</th>'
            "</tr></thead><tbody>" + "".join(rows) + "</tbody></table>")
