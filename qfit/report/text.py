"""report: the check result dict -> terminal summary and Markdown.

Everything printed here is read from the same dict that report.json holds, so the three views
cannot disagree.
"""
from __future__ import annotations

from tabulate import tabulate

from qfit.sizes import format_size

WORST_LAYERS_SHOWN = 8


def _fmt_pct(value) -> str:
    return "-" if value is None else f"{value:.2f} %"


def _headroom(used: int, limit: int) -> str:
    left = limit - used
    return f"{format_size(left)} left" if left >= 0 else f"{format_size(-left)} over"


def verdict_rows(report: dict) -> list[list[str]]:
    flash, sram, acc = report["flash"], report["sram"], report.get("accuracy", {})
    rows = [
        ["flash", format_size(flash["total_bytes"]), format_size(flash["limit_bytes"]),
         _headroom(flash["total_bytes"], flash["limit_bytes"]), "fits" if flash["fits"] else "DOES NOT FIT"],
        ["SRAM (peak live)", format_size(sram["peak_bytes"]), format_size(sram["limit_bytes"]),
         _headroom(sram["peak_bytes"], sram["limit_bytes"]), "fits" if sram["fits"] else "DOES NOT FIT"],
    ]
    if acc:
        rows.append(accuracy_row(report))
    return rows


def accuracy_row(report: dict) -> list[str]:
    acc = report["accuracy"]
    verdict = report["verdict"]
    gate = "-" if verdict.get("max_drop_pt") is None else (
        "within gate" if verdict["accuracy_ok"] else "OVER GATE")
    if acc.get("metric") == "top1":
        lo, hi = acc["drop_ci95_pt"]
        return ["top-1 accuracy", f"int8 {acc['int8']:.2f} %", f"float {acc['float']:.2f} %",
                f"drop {acc['drop_pt']:+.2f} pt (95 % CI {lo:+.2f} .. {hi:+.2f}), n={acc['samples']}", gate]
    if acc.get("metric") == "agreement":
        return ["argmax agreement", f"{acc['int8']:.2f} %", "-",
                f"output SQNR {acc['output_sqnr_db']:.1f} dB, n={acc['samples']}", gate]
    extra = f", decision flips {acc['decision_flips_pct']:.2f} %" if "decision_flips_pct" in acc else ""
    return ["output SQNR", f"{acc['output_sqnr_db']:.1f} dB", "-", f"n={acc['samples']}{extra}", "-"]


def worst_layers(report: dict, count: int = WORST_LAYERS_SHOWN) -> list[dict]:
    rows = [r for r in report.get("layers", []) if r.get("precision") != "float"]
    return sorted(rows, key=lambda r: r.get("sqnr_db", 0.0))[:count]


def _layer_table(rows: list[dict]) -> list[list]:
    return [[r["name"], r["op_type"], r["precision"], r.get("weight_bytes_int8", 0),
             f"{r.get('sqnr_db', 0):.1f}", f"{r.get('cosine', 1):.4f}"] for r in rows]


_LAYER_HEADERS = ["layer", "op", "stored as", "int8 weight B", "SQNR dB", "cosine"]


def summary_text(report: dict, extra_sections: list[str] | None = None) -> str:
    """The short terminal summary printed by `qfit check`."""
    verdict = report["verdict"]
    lines = [f"qfit {report['tool_version']}  model {report['model']['path']}  "
             f"({report['model']['params']:,} params, {report['model']['macs']:,} MACs)", ""]
    lines.append(tabulate(verdict_rows(report), headers=["", "used", "limit", "margin", "result"],
                          tablefmt="simple"))
    lines.append("")
    lines.append(f"Sizes: flash int8 {format_size(report['flash']['int8_bytes'])} vs float "
                 f"{format_size(report['flash']['float_bytes'])} (x{report['flash']['shrink_ratio']:.2f} smaller); "
                 f"SRAM peak at step {report['sram'].get('peak_step')} ({report['sram']['peak_node']}).")
    lines.append(f"Accuracy from: {report['evaluation_path']}.")
    if report["evaluation"].get("reused_calibration_data"):
        lines.append("Note: evaluated on the calibration data itself (no separate --eval folder): "
                     "figures are optimistic.")
    skipped = {role: report[role].get("skipped", 0) for role in ("calibration", "evaluation")}
    if any(skipped.values()):
        # a skipped file changes what the figures measure: say so where the user looks
        lines.append(f"Note: --skip-bad skipped {skipped['calibration']} calibration and "
                     f"{skipped['evaluation']} evaluation files as unreadable (listed in report.json).")
    worst = worst_layers(report, 5)
    if worst:
        lines += ["", "Lowest-SQNR layers (int8 model vs float, accumulated):",
                  tabulate(_layer_table(worst), headers=_LAYER_HEADERS, tablefmt="simple")]
    lines += analysis_text(report)
    for section in extra_sections or []:
        lines += ["", section]
    lines.append("")
    if verdict["failed"]:
        lines.append("RESULT: does not pass: " + ", ".join(verdict["failed"]) + " (exit 1)")
    else:
        lines.append("RESULT: passes: fits flash and SRAM" +
                     (" and the accuracy gate" if verdict.get("max_drop_pt") is not None else ""))
    lines.append("Caution: " + report["caution"])
    return "\n".join(lines)


def markdown(report: dict, extra_sections: list[str] | None = None) -> str:
    """report.md: the whole report for a person."""
    m = report["model"]
    out = [f"# qfit report: {m['path']}", ""]
    out += ["## Verdict", "", tabulate(verdict_rows(report), headers=["", "used", "limit", "margin", "result"],
                                        tablefmt="github"), ""]
    failed = report["verdict"]["failed"]
    out.append("**Does not pass:** " + ", ".join(failed) if failed else "**Passes** every limit that was set.")
    out += ["", "## Model", "",
            f"- parameters: {m['params']:,}; MACs: {m['macs']:,}",
            f"- inputs: " + ", ".join(f"`{k}` {'x'.join(map(str, v))}" for k, v in m["inputs"].items()),
            f"- opset of the file: {m['opset']}"]
    for note in m.get("notes", []):
        out.append(f"- {note}")
    q = report["quantization"]
    out += ["", "## Quantization", "",
            f"- weights: {q['weights']}; bias: {q['bias']}",
            f"- activations: {q['activations']}; calibration method: {q['method']}"
            + (f" ({q['percentile']})" if q.get("percentile") else ""),
            f"- calibration data: {report['calibration']['folder']} ({report['calibration']['samples']} samples"
            + (f", {report['calibration']['skipped']} skipped" if report['calibration'].get('skipped') else "")
            + ")"]
    ev = report["evaluation"]
    out += ["", "## Accuracy", "",
            f"- evaluation data: {ev['folder']} ({ev['samples']} samples"
            + (", the calibration data reused: optimistic" if ev.get("reused_calibration_data") else "") + ")",
            f"- arithmetic: {report['evaluation_path']}", ""]
    out.append(tabulate([accuracy_row(report)], headers=["metric", "int8", "float", "detail", "gate"],
                        tablefmt="github"))
    out += ["", "## Layers (int8 model vs float model, accumulated error, network order)", "",
            tabulate(_layer_table(report.get("layers", [])), headers=_LAYER_HEADERS, tablefmt="github")]
    out += analysis_markdown(report)
    for section in extra_sections or []:
        out += ["", section]
    out += ["", "## Caution", "", report["caution"], ""]
    return "\n".join(out)


# ---- where the accuracy goes, repair, equalization (qfit.sensitivity, qfit.repair, qfit.equalize) ----

RANKED_LAYERS_SHOWN = 8


def _num(value, digits: int = 2, signed: bool = False) -> str:
    if value is None:
        return "-"
    return f"{value:+.{digits}f}" if signed else f"{value:.{digits}f}"


def _delta_bytes(value) -> str:
    if value is None:
        return "-"
    if value == 0:
        return "0 B"
    return ("+" if value > 0 else "-") + format_size(abs(int(value)))


def _cost(row: dict, which: str) -> str:
    cost = (row.get("fallback_cost_bytes") or {}).get(which)
    if not cost:
        return "-"
    return f"{_delta_bytes(cost['flash'])} / {_delta_bytes(cost['sram'])}"


def ranking_table(report: dict, count: int | None = RANKED_LAYERS_SHOWN, compact: bool = False
                  ) -> tuple[list[str], list[list[str]]]:
    """Headers and rows of the sensitivity ranking, worst layer first (`compact`: for a terminal)."""
    section = report.get("sensitivity", {})
    isolated_key, float_key = section.get("isolated_key"), section.get("float_key")
    rows = [r for r in report.get("layers", []) if r.get("sensitivity_rank") is not None]
    rows.sort(key=lambda r: r["sensitivity_rank"])
    if count is not None:
        rows = rows[:count]
    points = isolated_key is not None
    unit = "agree pt" if isolated_key == "sensitivity_agreement_pt" else "pt"
    headers = ["#", "layer", "op", "now"]
    if points:
        headers += [f"alone {unit}" if compact else f"drop, only it int8 ({unit})",
                    f"if float {unit}" if compact else f"drop saved, only it float ({unit})"]
    else:
        headers += ["if float out dB" if compact else "output SQNR, only it float (dB)"]
    headers += ["alone out dB" if compact else "output SQNR, only it int8 (dB)"]
    if not compact:
        headers += ["its tensor SQNR, only it int8 (dB)"]
    headers += ["now dB" if compact else "SQNR in the written model (dB)", "int8 weight B",
                "float +flash/+SRAM" if compact else "keep float: flash / SRAM",
                "int16 +flash/+SRAM" if compact else "int16 output: flash / SRAM"]
    table = []
    for r in rows:
        cells = [str(r["sensitivity_rank"]), r["name"], r["op_type"], r.get("precision", "")]
        if points:
            cells += [_num(r.get(isolated_key), signed=True), _num(r.get(float_key), signed=True)]
        else:
            cells.append(_num(r.get(float_key), 1))
        cells.append(_num(r.get("isolated_output_sqnr_db"), 1))
        if not compact:
            cells.append(_num(r.get("sqnr_isolated_db"), 1))
        cells += [_num(r.get("sqnr_db"), 1), str(r.get("weight_bytes_int8", 0)), _cost(r, "float"), _cost(r, "int16")]
        table.append(cells)
    return headers, table


def _ranking_intro(report: dict) -> str | None:
    section = report.get("sensitivity")
    if not section:
        return None
    if not section.get("samples_used"):
        return section.get("skipped", "no isolated sweep")
    return (f"\"alone\": only this layer int8, all others float; \"if float\": only this layer float, all "
            f"others int8. Measured on {section['samples_used']} of {section['samples_available']} evaluation "
            f"samples (cap {section['sample_cap']}); byte costs against the all-int8 plan.")


_ACTION_TEXT = {"keep_float": "keep float", "int16_activations": "int16 activations"}


def _action_text(step: dict) -> str:
    action = step["action"]
    if action.startswith("method:"):
        text = f"calibrate with {action.split(':', 1)[1]}"
    else:
        text = _ACTION_TEXT.get(action, action)
    if step.get("tensor") and action != "keep_float":
        text += f" ({step['tensor']})"
    return text


def repair_table(report: dict) -> tuple[list[str], list[list[str]]]:
    steps = report.get("repair", {}).get("steps", [])
    headers = ["step", "layer", "change", "drop before pt", "drop after pt", "flash cost", "SRAM cost"]
    return headers, [[str(i), s["layer"], _action_text(s), _num(s["drop_before_pt"], signed=True),
                      _num(s["drop_after_pt"], signed=True), _delta_bytes(s["flash_cost_bytes"]),
                      _delta_bytes(s["sram_cost_bytes"])] for i, s in enumerate(steps, 1)]


def _repair_summary(report: dict) -> list[str]:
    section = report.get("repair")
    if not section:
        return []
    if section.get("target_drop_pt") is None:
        return [section["reason"]]
    lines = [f"Target drop {section['target_drop_pt']:.2f} pt; int8 drop before repair "
             f"{_num(section.get('drop_before_pt'), signed=True)} pt, written model "
             f"{_num(section.get('final_drop_pt'), signed=True)} pt: "
             + ("reached" if section.get("reached") else "NOT reached") + "."]
    lines.append(f"Why: {section['reason']}.")
    search = section.get("search")
    if search:
        lines.append(f"Search: {search['candidates_screened']} candidates screened on up to "
                     f"{search['screen_samples']} at-risk samples, {search['candidates_verified']} measured on "
                     f"{search['samples']} samples, {search['layers_tried']} most sensitive layers tried.")
    return lines


def _improvement_lines(report: dict) -> list[str]:
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
        lines.append(f"{title}: {what}; drop {_num(before.get('drop_pt'), signed=True)} -> "
                     f"{_num(after.get('drop_pt'), signed=True)} pt, output SQNR "
                     f"{_num(before.get('output_sqnr_db'), 1)} -> {_num(after.get('output_sqnr_db'), 1)} dB")
    return lines


def analysis_text(report: dict) -> list[str]:
    """Terminal lines: improvements, the ranking (worst layers), the repair log."""
    lines = []
    improvements = _improvement_lines(report)
    if improvements:
        lines += [""] + improvements
    headers, rows = ranking_table(report, compact=True)
    intro = _ranking_intro(report)
    if rows:
        lines += ["", "Where the accuracy goes (worst first):", intro or "",
                  tabulate(rows, headers=headers, tablefmt="simple", disable_numparse=True)]
    elif intro:
        lines += ["", "Where the accuracy goes: " + intro]
    if report.get("repair"):
        lines += ["", "Repair:"] + _repair_summary(report)
        headers, rows = repair_table(report)
        if rows:
            lines.append(tabulate(rows, headers=headers, tablefmt="simple", disable_numparse=True))
    return lines


def analysis_markdown(report: dict) -> list[str]:
    out = []
    improvements = _improvement_lines(report)
    if improvements:
        out += ["", "## Equalization and bias correction", ""] + [f"- {line}" for line in improvements]
    headers, rows = ranking_table(report, count=None)
    intro = _ranking_intro(report)
    out += ["", "## Where the accuracy goes", ""]
    if intro:
        out += [intro, ""]
    if rows:
        out.append(tabulate(rows, headers=headers, tablefmt="github", disable_numparse=True))
    if report.get("repair"):
        out += ["", "## Repair", ""] + _repair_summary(report)
        headers, rows = repair_table(report)
        if rows:
            out += ["", tabulate(rows, headers=headers, tablefmt="github", disable_numparse=True)]
    return out
