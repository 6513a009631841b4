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
    for section in extra_sections or []:
        out += ["", section]
    out += ["", "## Caution", "", report["caution"], ""]
    return "\n".join(out)
