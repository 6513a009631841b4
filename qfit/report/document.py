"""document: the report dict -> sections of prose lines and tables, shared by the terminal and report.md.

`sections(report, compact)` reads only the dict; qfit.report.text and qfit.report.markdown lay the same
sections out (compact: the terminal shows the head of the long tables). Headings come from
format.HEADINGS, figures from the format functions, so the two views say the same thing.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from qfit.report import format as fmt

WORST_LAYERS_SHOWN = 5       # terminal: the lowest-SQNR layers
RANKED_LAYERS_SHOWN = 8      # terminal: the head of the sensitivity ranking
FLASH_LAYERS_SHOWN = 12
MAC_LAYERS_SHOWN = 8
TILING_OPTIONS_SHOWN = 8


@dataclass
class Table:
    headers: list[str]
    rows: list[list[str]]


@dataclass
class Section:
    key: str                       # a key of format.HEADINGS
    lines: list[str] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)

    @property
    def heading(self) -> str:
        return fmt.HEADINGS[self.key]


def sections(report: dict, compact: bool = False) -> list[Section]:
    """Every section the dict holds, in reading order (a `qfit check` or a `qfit budget` dict)."""
    out = [verdict_section(report), model_section(report)]
    if "quantization" in report:
        out += [quantization_section(report), accuracy_section(report), layers_section(report, compact)]
        if any((report.get(k) or {}).get("enabled") for k in ("equalization", "bias_correction")):
            out.append(improvements_section(report))
        out += [sensitivity_section(report, compact), repair_section(report)]
    out += [flash_section(report), sram_section(report), order_section(report), macs_section(report)]
    if report.get("what_if"):
        out.append(what_if_section(report))
    if report.get("caution"):
        out.append(Section("caution", [report["caution"]]))
    return out


def result_line(report: dict) -> str:
    """The one-line outcome: the same words as report.html's headline."""
    verdict = report["verdict"]
    failed = verdict.get("failed") or []
    if failed:
        return f"RESULT: {fmt.verdict_word(1)}: {', '.join(failed)} (exit {verdict['exit_code']})"
    gates = "flash and SRAM" + (" and the accuracy gate" if verdict.get("max_drop_pt") is not None else "")
    return f"RESULT: {fmt.verdict_word(0)}: fits {gates}"


# ---- verdict, model ------------------------------------------------------------------------------

def _memory_row(label: str, used: int, limit: int | None, fits) -> list[str]:
    margin = fmt.headroom(limit - used) if limit is not None else fmt.MISSING
    return [label, fmt.size(used), fmt.size(limit), margin, fmt.fits(fits)]


ACCURACY_HEADERS = ["metric", "int8", "float", "drop", "95 % CI of the drop", "samples", "gate"]


def _gate_word(report: dict) -> str:
    verdict = report["verdict"]
    return fmt.MISSING if verdict.get("max_drop_pt") is None else fmt.GATE_WORDS[verdict["accuracy_ok"]]


def accuracy_row(report: dict) -> list[str]:
    """One row under ACCURACY_HEADERS: top-1 with labels, argmax agreement without, output SQNR for scores."""
    acc = report["accuracy"]
    interval = acc.get("drop_ci95_pt")
    ci = f"{fmt.pt(interval[0])} to {fmt.pt(interval[1])}" if interval else fmt.MISSING
    if acc.get("metric") == "top1":
        return ["top-1", fmt.pct(acc["int8"]), fmt.pct(acc["float"]), fmt.pt(acc["drop_pt"]), ci,
                str(acc["samples"]), _gate_word(report)]
    if acc.get("metric") == "agreement":
        return ["argmax agreement", fmt.pct(acc["int8"]), fmt.MISSING, fmt.pt(acc.get("drop_pt")), ci,
                str(acc["samples"]), _gate_word(report)]
    return ["output SQNR", fmt.db(acc["output_sqnr_db"]), fmt.MISSING, fmt.MISSING, fmt.MISSING,
            str(acc["samples"]), fmt.MISSING]


def accuracy_line(report: dict) -> str:
    """The accuracy outcome in one sentence, for the verdict."""
    metric, int8, float_, drop, ci, samples, gate = accuracy_row(report)
    if report["accuracy"].get("metric") == "top1":
        text = f"top-1 accuracy: int8 {int8}, float {float_}, drop {drop} (95 % CI {ci}), {samples} samples"
    elif report["accuracy"].get("metric") == "agreement":
        text = f"argmax agreement of int8 with float: {int8}, {samples} samples"
    else:
        text = f"output SQNR of int8 against float: {int8}, {samples} samples"
    return text + ("" if gate == fmt.MISSING else f"; accuracy gate: {gate}")


def gate_lines(verdict: dict) -> list[str]:
    """What the accuracy gate compared (and whether its limit is the default), a failed expected float
    accuracy, and the warnings (qfit.measure.gate; docs/report.md)."""
    lines = []
    gate = verdict.get("accuracy_gate") or {}
    if gate.get("reason"):  # the reason says "default limit" when no --max-drop was given
        lines.append(f"Accuracy gate: {gate['reason']}.")
    message = (verdict.get("float_check") or {}).get("message")
    if message:
        lines.append(f"Float accuracy: {message}.")
    lines += [f"Warning: {warning}." for warning in verdict.get("warnings") or []]
    return lines


def verdict_section(report: dict) -> Section:
    flash, sram = report["flash"], report["sram"]
    rows = [_memory_row("flash", flash["total_bytes"], flash["limit_bytes"], flash["fits"]),
            _memory_row("SRAM (arena plan)", sram["required_bytes"], sram["limit_bytes"], sram["fits"])]
    lines = [result_line(report)]
    if report.get("accuracy"):
        lines.append(accuracy_line(report))
    lines += gate_lines(report.get("verdict") or {})
    if report.get("model_kind"):
        kind = ("QDQ model, figures as quantized" if report["model_kind"] == "qdq" else
                "float model, figures as if quantized to int8")
        lines.append(f"{report['model_file']}: {kind}; memory only, no data was run.")
    if (report.get("evaluation") or {}).get("reused_calibration_data"):
        lines.append("Note: evaluated on the calibration data itself (no separate --eval folder): "
                     "figures are optimistic.")
    skipped = {role: (report.get(role) or {}).get("skipped", 0) for role in ("calibration", "evaluation")}
    if any(skipped.values()):
        # a skipped file changes what the figures measure: say so where the user looks
        lines.append(f"Note: skipped {skipped['calibration']} calibration and {skipped['evaluation']} evaluation "
                     f"files: unreadable (--skip-bad) or not regular files (listed in report.json).")
    return Section("verdict", lines, [Table(["", "used", "limit", "margin", "result"], rows)])


def model_section(report: dict) -> Section:
    m, macs = report["model"], report["macs"]
    lines = []
    if m.get("path"):
        lines.append(f"file: {m['path']}")
    lines.append(f"parameters: {fmt.count(m['params'])}; MACs: {fmt.count(m['macs'])}; "
                 f"element operations: {fmt.count(macs['elementwise_ops'])}")
    if "latency_ms" in macs:
        lines.append(f"latency estimate {macs['latency_ms']} ms ({macs['cycles_per_mac']} cycles/MAC at "
                     f"{macs['clock_mhz']} MHz)")
    if "energy_mj" in macs:
        lines.append(f"energy estimate {macs['energy_mj']} mJ ({macs['energy_per_mac_pj']} pJ/MAC)")
    for group in ("inputs", "outputs"):
        if m.get(group):
            lines.append(f"{group}: " + ", ".join(f"{name} {fmt.dims(shape)}" for name, shape in m[group].items()))
    if m.get("opset") is not None:
        lines.append(f"opset of the file: {m['opset']}")
    lines += [f"loader note: {note}" for note in m.get("notes") or []]
    lines += [f"note: {note}" for note in report.get("notes") or []]
    if m.get("float_nodes"):
        lines.append("kept float (unsupported op): " + ", ".join(m["float_nodes"]))
    return Section("model", lines)


# ---- quantization, accuracy, layers --------------------------------------------------------------

def _data_line(role: str, data: dict, extra: str = "") -> str:
    skipped = f", {data['skipped']} skipped" if data.get("skipped") else ""
    return f"{role} data: {data['folder']} ({data['samples']} samples{skipped}{extra})"


def quantization_section(report: dict) -> Section:
    q = report["quantization"]
    method = q["method"] + (f" ({q['percentile']})" if q.get("percentile") else "")
    return Section("quantization", [f"weights: {q['weights']}; bias: {q['bias']}",
                                    f"activations: {q['activations']}; calibration method: {method}",
                                    _data_line("calibration", report["calibration"])])


def accuracy_section(report: dict) -> Section:
    ev = report["evaluation"]
    reused = ", the calibration data reused: optimistic" if ev.get("reused_calibration_data") else ""
    lines = [_data_line("evaluation", ev, reused), f"arithmetic: {report['evaluation_path']}"]
    preview = (report.get("arithmetic") or {}).get("float_preview")
    if preview and preview.get("prediction_changes") is not None:
        lines.append(f"integer path vs float preview: {preview['prediction_changes']} of {preview['samples']} "
                     f"evaluation samples change their prediction")
    if fmt.show_top5(report):
        top5 = report["accuracy"]["top5"]
        lines.append(f"top-5: float {fmt.pct(top5['float'])}, int8 {fmt.pct(top5['int8'])}, "
                     f"drop {fmt.pt(top5['drop_pt'])}")
    acc = report["accuracy"]
    if acc.get("output_sqnr_db") is not None and acc.get("metric") != "output_sqnr":
        lines.append(f"output SQNR of int8 against float: {fmt.db(acc['output_sqnr_db'])}")
    if acc.get("decision_flips_pct") is not None:
        lines.append(f"decisions flipped at the threshold: {fmt.pct(acc['decision_flips_pct'])}")
    return Section("accuracy", lines, [Table(ACCURACY_HEADERS, [accuracy_row(report)])])


def worst_layers(report: dict, count: int | None) -> list[dict]:
    rows = [r for r in report.get("layers", []) if r.get("precision") != "float"]
    return sorted(rows, key=lambda r: r.get("sqnr_db", 0.0))[:count]


def layers_section(report: dict, compact: bool) -> Section:
    if compact:
        rows = worst_layers(report, WORST_LAYERS_SHOWN)
        lines = [f"The {len(rows)} lowest-SQNR layers (int8 model vs float model, accumulated error); "
                 f"every layer is in report.md."]
    else:
        rows = report.get("layers", [])
        lines = ["Every layer in network order: int8 model vs float model, accumulated error."]
    table = [[fmt.short_name(r["name"]), r["op_type"], r["precision"], fmt.size(r.get("weight_bytes_int8", 0)),
              fmt.db(r.get("sqnr_db")), fmt.number(r.get("cosine"), 4)] for r in rows]
    return Section("layers", lines, [Table(["layer", "op", "stored as", "int8 weights", "SQNR", "cosine"], table)])


def improvements_section(report: dict) -> Section:
    lines = []
    for key, title in (("equalization", "Cross-layer equalization (Nagel et al. 2019)"),
                       ("bias_correction", "Bias correction (Nagel et al. 2019)")):
        section = report.get(key) or {}
        if not section.get("enabled"):
            continue
        before, after = section.get("before", {}), section.get("after", {})
        what = (f"{section.get('pairs_equalized', 0)} layer pairs rescaled, "
                f"{section.get('absorbed_channels', 0)} channel offsets absorbed" if key == "equalization"
                else f"{section.get('layers_corrected', 0)} layers corrected")
        lines.append(f"{title}: {what}; drop {fmt.pt(before.get('drop_pt'))} -> {fmt.pt(after.get('drop_pt'))}, "
                     f"output SQNR {fmt.db(before.get('output_sqnr_db'))} -> {fmt.db(after.get('output_sqnr_db'))}")
    return Section("improvements", lines)


# ---- sensitivity, repair --------------------------------------------------------------------------

def _cost(row: dict, which: str) -> str:
    cost = (row.get("fallback_cost_bytes") or {}).get(which)
    if not cost:
        return fmt.MISSING
    return f"{fmt.signed_size(cost['flash'])} / {fmt.signed_size(cost['sram'])}"


def ranked_layers(report: dict, count: int | None) -> list[dict]:
    rows = [r for r in report.get("layers", []) if r.get("sensitivity_rank") is not None]
    return sorted(rows, key=lambda r: r["sensitivity_rank"])[:count]


def _plus_minus(row: dict, key: str, unit: str, digits: int = 1, signed: bool = False) -> str:
    """A figure of the sensitivity sweep with its standard error (the row's `<key minus unit>_se_<unit>`)."""
    value = row.get(key)
    if value is None:
        return fmt.MISSING
    suffix = key.rsplit("_", 1)[1]
    se = row.get(f"{key[:-len(suffix) - 1]}_se_{suffix}")
    text = f"{value:+.{digits}f}" if signed else f"{value:.{digits}f}"
    return text + (f" ± {se:.{digits}f}" if se is not None else "") + f" {unit}"


def ranking_tables(report: dict, count: int | None) -> list[Table]:
    """The sensitivity ranking, worst layer first: what each layer does to the model output (with
    standard errors) and, where the samples resolve it, to the accuracy; then what each repair of it
    would cost in bytes."""
    section = report.get("sensitivity", {})
    isolated_key, float_key = section.get("isolated_key"), section.get("float_key")
    rows = ranked_layers(report, count)
    unit = " (agreement)" if isolated_key == "sensitivity_agreement_pt" else ""
    continuous = any(r.get("isolated_output_sample_sqnr_db") is not None for r in rows)
    kl = any(r.get("isolated_output_kl_mnats") is not None for r in rows)
    headers = ["#", "layer"]
    headers += (["output SQNR alone"] + (["KL alone"] if kl else []) + ["SQNR gain if float"] if continuous
                else ["output SQNR alone"])
    if isolated_key:
        headers.append(f"drop alone{unit}")
    if float_key:
        headers.append(f"drop saved if float{unit}" if float_key.endswith("_pt") else "output SQNR if float")
    headers.append("SQNR now")
    effects, costs = [], []
    for r in rows:
        name = [str(r["sensitivity_rank"]), fmt.short_name(r["name"])]
        cells = ([_plus_minus(r, "isolated_output_sample_sqnr_db", "dB")]
                 + ([_plus_minus(r, "isolated_output_kl_mnats", "mnat", 3)] if kl else [])
                 + [_plus_minus(r, "float_recovery_db", "dB", signed=True)] if continuous
                 else [fmt.db(r.get("isolated_output_sqnr_db"))])
        cells += [fmt.pt(r.get(key)) if key.endswith("_pt") else fmt.db(r.get(key))
                  for key in (isolated_key, float_key) if key]
        effects.append(name + cells + [fmt.db(r.get("sqnr_db"))])
        costs.append(name + [fmt.size(r.get("weight_bytes_int8", 0)), _cost(r, "float"), _cost(r, "int16")])
    return [Table(headers, effects),
            Table(["#", "layer", "int8 weights", "keep float: +flash / +SRAM", "int16 output: +flash / +SRAM"], costs)]


def sensitivity_section(report: dict, compact: bool) -> Section:
    section = report.get("sensitivity") or {}
    if not section.get("samples_used"):
        return Section("sensitivity", [section.get("skipped", "no isolated sweep")])
    lines = [f"\"alone\": only this layer int8, all others float; \"if float\": only this layer float, all others "
             f"int8; \"now\": the layer's accumulated SQNR in the written model. Measured on "
             f"{section['samples_used']} of {section['samples_available']} evaluation samples (cap "
             f"{section['sample_cap']}); byte costs against the all-int8 plan. Worst first."]
    lines += [text for text in (section.get("ranked_by") and f"Ranked by {section['ranked_by']}; ± one standard "
                                f"error over the samples.", section.get("samples_note") and
                                f"Sample count: {section['samples_note']}.", section.get("points_note")) if text]
    return Section("sensitivity", lines, ranking_tables(report, RANKED_LAYERS_SHOWN if compact else None))


_ACTION_TEXT = {"keep_float": "keep float", "int16_activations": "int16 activations"}


def _action_text(step: dict) -> str:
    action = step["action"]
    text = f"calibrate with {action.split(':', 1)[1]}" if action.startswith("method:") else \
        _ACTION_TEXT.get(action, action)
    if step.get("tensor") and action != "keep_float":
        text += f" ({fmt.short_name(step['tensor'], 32)})"
    return text


def repair_section(report: dict) -> Section:
    section = report.get("repair") or {}
    if section.get("target_drop_pt") is None:
        return Section("repair", [section.get("reason", "no repair")])
    lines = [f"Target drop {fmt.pt_abs(section['target_drop_pt'])}; int8 drop before repair "
             f"{fmt.pt(section.get('drop_before_pt'))}, written model {fmt.pt(section.get('final_drop_pt'))}: "
             + ("reached" if section.get("reached") else "NOT reached") + ".",
             f"Why: {section['reason']}."]
    search = section.get("search")
    if search:
        lines.append(f"Search: {search['candidates_screened']} candidates screened on up to "
                     f"{search['screen_samples']} at-risk samples, {search['candidates_verified']} measured on "
                     f"{search['samples']} samples, {search['layers_tried']} most sensitive layers tried.")
    steps = section.get("steps") or []
    tables = []
    if steps:
        rows = [[str(i), fmt.short_name(s["layer"], 32), _action_text(s), fmt.pt(s["drop_before_pt"]),
                 fmt.pt(s["drop_after_pt"]), fmt.signed_size(s["flash_cost_bytes"]),
                 fmt.signed_size(s["sram_cost_bytes"])] for i, s in enumerate(steps, 1)]
        tables.append(Table(["step", "layer", "change", "drop before", "drop after", "flash cost", "SRAM cost"], rows))
    return Section("repair", lines, tables)


# ---- memory ---------------------------------------------------------------------------------------

def flash_section(report: dict) -> Section:
    f = report["flash"]
    shown = sorted(f["layers"], key=lambda r: (-r["total_bytes"], r["name"]))[:FLASH_LAYERS_SHOWN]
    lines = [f"weights and constants as stored {fmt.size(f['int8_bytes'])}; as float32 {fmt.size(f['float_bytes'])} "
             f"({fmt.ratio(f['shrink_ratio'])} smaller)",
             f"activation scales and zero points {fmt.size(f['activation_param_bytes'])}; per-layer metadata "
             f"{fmt.size(f['meta_bytes'])} (estimate); reserve {fmt.size(f['reserve_bytes'])} (estimate, given)",
             f"total {fmt.size(f['total_bytes'])} of {fmt.size(f['limit_bytes'])}: {fmt.fits(f['fits'])}"]
    if len(f["layers"]) > len(shown):
        lines.append(f"largest {len(shown)} of {len(f['layers'])} layers shown")
    rows = [[fmt.short_name(r["name"]), r["op_type"], r["precision"], fmt.size(r["weight_bytes"]),
             fmt.size(r["bias_bytes"]), fmt.size(r["scale_bytes"]), fmt.size(r["float_bytes"] + r["other_bytes"]),
             fmt.size(r["total_bytes"])] for r in shown]
    headers = ["layer", "op", "stored as", "weights", "bias", "scales", "float/other", "total"]
    return Section("flash", lines, [Table(headers, rows)])


def sram_section(report: dict) -> Section:
    s, a = report["sram"], report["arena"]
    conventions = ", ".join(f"{k} {'on' if v else 'off'}" for k, v in s["conventions"].items() if k != "alignment")
    lines = [f"arena plan {fmt.size(a['bytes'])} ({fmt.ratio(a['ratio_to_peak'])} the peak, {a['alignment']}-byte "
             f"alignment) of {fmt.size(s['limit_bytes'])}: {fmt.fits(s['fits'])}",
             f"peak of live tensors {fmt.size(s['peak_bytes'])} at step {s['peak_step']} ({s['peak_node']}), "
             f"{s['order_used']} order",
             f"conventions: {conventions}",
             "tensors live at the peak:"]
    rows = [[fmt.short_name(t["tensor"]), t["dtype"], fmt.size(t["bytes"]), fmt.short_name(t["producer"] or "")]
            for t in s["live_at_peak"]]
    return Section("sram", lines, [Table(["tensor", "stored as", "bytes", "produced by"], rows)])


def order_section(report: dict) -> Section:
    o = report["order"]
    kept = "order changed" if o["changed"] else "default order kept"
    return Section("order", [f"default order peak {fmt.size(o['default_peak_bytes'])}, best order peak "
                             f"{fmt.size(o['best_peak_bytes'])} ({o['method']}, {kept})"])


def macs_section(report: dict) -> Section:
    m = report["macs"]
    top = sorted(m["layers"], key=lambda r: (-r["macs"], -r["elementwise_ops"], r["name"]))[:MAC_LAYERS_SHOWN]
    rows = [[fmt.short_name(r["name"]), r["op_type"], fmt.count(r["macs"]), fmt.count(r["elementwise_ops"])]
            for r in top]
    return Section("macs", [f"total {fmt.count(m['total'])} MACs; the {len(rows)} largest layers:"],
                   [Table(["layer", "op", "MACs", "element ops"], rows)])


def what_if_section(report: dict) -> Section:
    """What would make it fit: SRAM advice only when SRAM does not fit (or under a line that says it
    fits already), flash advice when flash does not fit."""
    what_if, lines, tables = report["what_if"], [], []
    sram_fits = report["sram"]["fits"]
    sram_lines, tiling_table = _sram_what_if(what_if, report["sram"])
    if sram_lines:
        lines.append("SRAM fits already; for reference:" if sram_fits else "What would make SRAM fit:")
        lines += sram_lines
        if tiling_table:
            tables.append(tiling_table)
    flash = what_if.get("flash") or {}
    if flash.get("largest_layers"):
        over = flash.get("over_limit_bytes")
        if over:
            lines.append(f"What would make flash fit: it is {fmt.size(over)} over the limit.")
            lines += _flash_fit_lines(flash)
        lines.append("The layers that dominate flash:" if over else "Flash fits already; the layers that dominate it:")
        rows = []
        for r in flash["largest_layers"]:
            change = (f"as int8 saves {fmt.size(r['if_int8_saves_bytes'])}" if "if_int8_saves_bytes" in r else
                      f"kept float costs {fmt.size(r['if_float_costs_bytes'])}" if "if_float_costs_bytes" in r
                      else fmt.MISSING)
            # over the limit, what would shrink it replaces what a float fallback would cost
            shrink = [_size_or_missing(r.get(key)) for key in ("if_4bit_frees_bytes", "if_half_width_frees_bytes")]
            shrink = shrink if over else [change]
            rows.append([fmt.short_name(r["name"]), r["op_type"], r["precision"], fmt.size(r["total_bytes"]),
                         fmt.pct1(r["share_pct"]), *shrink])
        tables.append(Table(["layer", "op", "stored as", "bytes", "share",
                             *(["4-bit frees (est.)", "half width frees (est.)"] if over else ["change"])], rows))
    return Section("what_if", lines, tables)


def _size_or_missing(value) -> str:
    return fmt.MISSING if value is None else fmt.size(value)


def _flash_fit_lines(flash: dict) -> list[str]:
    """The fewest layers whose weights at 4 bits remove the excess, and what the estimates assume."""
    lines = []
    fit = flash.get("fit_at_4bit")
    if fit and fit["layers"]:
        names = ", ".join(fmt.short_name(n) for n in fit["layers"][:6]) + (", ..." if len(fit["layers"]) > 6 else "")
        lines.append(f"4-bit weights in {len(fit['layers'])} layer(s) ({names}) would free "
                     f"{fmt.size(fit['frees_bytes'])}{'' if fit['enough'] else ': not enough on their own'} "
                     f"(estimate).")
    if flash.get("estimate_note"):
        lines.append(f"Estimates: {flash['estimate_note'].removeprefix('estimates: ')}.")
    return lines


def _sram_what_if(what_if: dict, sram: dict) -> tuple[list[str], Table | None]:
    lines = []
    order = what_if.get("order") or {}
    if order.get("saves_bytes"):
        lines.append(f"run the nodes in the best order found: saves {fmt.size(order['saves_bytes'])} of peak")
    res = what_if.get("resolution")
    if res and "skipped" not in res:
        cur = res["current"]
        for key, row in res["largest_fitting"].items():
            step = key.split("_")[1]
            if row:
                verb = "fits" if res["searched"] == "smaller sizes" else "still fits"
                lines.append(f"input {row['height']}x{row['width']} (multiple of {step}) {verb}: "
                             f"arena {fmt.size(row['arena_bytes'])}, peak {fmt.size(row['peak_bytes'])}")
            elif res["searched"] == "smaller sizes":
                lines.append(f"no input size that is a multiple of {step} below {cur['height']}x{cur['width']} fits")
    elif res:
        lines.append(f"resolution: {res['skipped']}")
    tiling = what_if.get("tiling") or {}
    if tiling.get("best"):
        b = tiling["best"]
        lines.append(f"tile the first {b['layers_tiled']} layers {b['tiles']} (up to {b['split_after']}): peak "
                     f"{fmt.size(b['peak_bytes'])}, +{fmt.count(b['extra_macs'])} MACs "
                     f"({fmt.pct(b['extra_macs_pct'])} more)")
    elif tiling.get("options"):
        b = min(tiling["options"], key=lambda r: (r["peak_bytes"], r["extra_macs"]))
        lines.append(f"no tiling option fits; lowest: {b['tiles']} up to {b['split_after']}, peak "
                     f"{fmt.size(b['peak_bytes'])} (the untiled rest peaks at {fmt.size(b['rest_peak_bytes'])})")
    elif tiling.get("skipped"):
        lines.append(f"tiling: {tiling['skipped']}")
    options = tiling.get("options") or []
    if not options:
        return lines, None
    shown = sorted(options, key=lambda r: (not r["fits"], r["peak_bytes"] if not r["fits"] else r["extra_macs"],
                                           r["layers_tiled"], r["n"]))[:TILING_OPTIONS_SHOWN]
    rows = [[r["tiles"], fmt.short_name(r["split_after"], 32), fmt.dims(r["split_shape"][1:]),
             fmt.size(r["peak_bytes"]), "+" + fmt.count(r["extra_macs"]), fmt.pct(r["extra_macs_pct"]),
             fmt.YES_NO.get(r["fits"], fmt.MISSING)] for r in shown]
    lines.append(f"tiled first layers: {len(options)} options evaluated, best {len(shown)} shown")
    return lines, Table(["tiles", "split after", "split CxHxW", "peak", "extra MACs", "of total", "fits"], rows)
