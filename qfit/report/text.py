"""text: the report dict -> the terminal summary printed by `qfit check` and `qfit budget`.

The same sections as report.md (qfit.report.document), compact: the long tables show their head.
Lines stay within format.LINE_WIDTH characters.
"""
from __future__ import annotations

from tabulate import tabulate

from qfit.report import format as fmt
from qfit.report.document import Section, result_line, sections


def render_section(section: Section) -> list[str]:
    lines = [section.heading, "-" * len(section.heading)]
    for line in section.lines:
        lines += fmt.wrap(line, indent="  ")
    for table in section.tables:
        if table.rows:
            lines += tabulate(table.rows, headers=table.headers, tablefmt="simple",
                              disable_numparse=True).splitlines()
    return lines


def summary_text(report: dict) -> str:
    """The terminal summary: every section, compact, then the result line again at the end."""
    m = report["model"]
    title = m.get("path") or report.get("model_file", "model")
    version = f"qfit {report['tool_version']}  " if report.get("tool_version") else "qfit  "
    lines = fmt.wrap(f"{version}model {title}", indent="  ")
    for section in sections(report, compact=True):
        lines += [""] + render_section(section)
    lines += ["", result_line(report)]
    return "\n".join(lines)
