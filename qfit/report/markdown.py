"""markdown: the report dict -> report.md, the whole report for a person.

The same sections as the terminal summary (qfit.report.document), with every row of the long tables.
Prose lines are wrapped within format.LINE_WIDTH characters.
"""
from __future__ import annotations

from tabulate import tabulate

from qfit.report import format as fmt
from qfit.report.document import Section, sections


def _escape(text: str) -> str:
    """A table cell or a line that cannot break the Markdown around it, and in which a node or file
    name cannot inject HTML (Markdown renderers pass raw HTML through)."""
    return escape_html(text).replace("|", "\\|")


def escape_html(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")


def render_section(section: Section) -> list[str]:
    out = [f"## {section.heading}", ""]
    for line in section.lines:
        line = escape_html(line)
        out += fmt.wrap("- " + line if section.key != "caution" else line,
                        indent="  " if section.key != "caution" else "")
    for table in section.tables:
        if table.rows:
            rows = [[_escape(cell) for cell in row] for row in table.rows]
            out += ["", tabulate(rows, headers=table.headers, tablefmt="github", disable_numparse=True)]
    return out


def markdown(report: dict) -> str:
    m = report["model"]
    title = m.get("path") or report.get("model_file", "model")
    out = [f"# qfit report: {escape_html(str(title))}"]
    for section in sections(report, compact=False):
        out += [""] + render_section(section)
    return "\n".join(out) + "\n"
