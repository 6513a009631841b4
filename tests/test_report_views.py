"""The four views of one result agree: report.json, the terminal summary, report.md and report.html.

Source of truth: report.json itself (the views are rendered from it). Every size, percentage, point and
dB figure printed in the terminal or in report.md must be the JSON's own value in the one format all
views use (qfit.report.format); headings are the same words in the same order; lines stay within
120 characters. Checked on the demo as it passes and as it fails (--flash 64KiB).
"""
from __future__ import annotations

import contextlib
import io
import json
import os
import re
from html.parser import HTMLParser

import pytest

from qfit.cli import main
from qfit.sizes import format_size

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "calib_demo")
LINE_LIMIT = 120
SIZE = re.compile(r"(?<![\w.])(\d+(?:\.\d+)?) (B|KiB|MiB|GiB)\b")
PERCENT = re.compile(r"(?<![\w.])(-?\d+\.\d+) %")
POINTS = re.compile(r"(?<![\w.])([+-]\d+\.\d+) pt\b")
DECIBELS = re.compile(r"(?<![\w.])(-?\d+\.\d) dB\b")
OTHER_RATIO = re.compile(r"(?<![\w.])x\d+\.\d+|\d+\.\d+x\b")   # a ratio written another way than "3.67×"


def _demo_args(out, *extra):
    return ["check", os.path.join(DEMO, "model.onnx"), "--calib", os.path.join(DEMO, "calib"),
            "--eval", os.path.join(DEMO, "eval"), "--preprocess", os.path.join(DEMO, "preprocess.json"),
            "--flash", "1MiB", "--sram", "256KiB", "--out", str(out), "--quiet", *extra]


def _run(args) -> tuple[int, str]:
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        code = main(args)
    return code, buffer.getvalue()


@pytest.fixture(scope="module")
def views(tmp_path_factory):
    runs = {}
    for name, extra in (("passing", ()), ("failing", ("--flash", "64KiB"))):
        out = tmp_path_factory.mktemp(f"views_{name}")
        code, terminal = _run(_demo_args(out, *extra))
        runs[name] = {"code": code, "terminal": terminal.split("\nWrote ")[0],
                      "markdown": (out / "report.md").read_text(encoding="utf-8"),
                      "html": (out / "report.html").read_text(encoding="utf-8"),
                      "report": json.loads((out / "report.json").read_text(encoding="utf-8"))}
    return runs


class _Page(HTMLParser):
    """Headings (h2, h3) and the text of every tagged figure (data-key) of report.html."""

    def __init__(self, text: str):
        super().__init__()
        self.headings: list[str] = []
        self.figures: dict[str, list[str]] = {}
        self._open: list[tuple[str, str | None, list[str]]] = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag in ("h2", "h3") or "data-key" in attrs:
            self._open.append((tag, attrs.get("data-key"), []))

    def handle_endtag(self, tag):
        if self._open and self._open[-1][0] == tag:
            _, key, text = self._open.pop()
            joined = "".join(text).strip()
            if key is None:
                self.headings.append(joined)
            else:
                self.figures.setdefault(key, []).append(joined)
            if self._open:
                self._open[-1][2].append(joined)

    def handle_data(self, data):
        if self._open:
            self._open[-1][2].append(data)


def _numbers(node) -> list[float]:
    """Every number in the report dict (booleans are not numbers)."""
    if isinstance(node, dict):
        return [v for value in node.values() for v in _numbers(value)]
    if isinstance(node, list):
        return [v for value in node for v in _numbers(value)]
    if isinstance(node, (int, float)) and not isinstance(node, bool):
        return [node]
    return []


def _terminal_headings(text: str) -> list[str]:
    lines = text.splitlines()
    return [lines[i] for i in range(len(lines) - 1)
            if lines[i] and set(lines[i + 1]) == {"-"} and len(lines[i + 1]) == len(lines[i])]


RUNS = ["passing", "failing"]


@pytest.mark.parametrize("run", RUNS)
def test_terminal_and_markdown_lines_stay_within_120_characters(views, run):
    for view in ("terminal", "markdown"):
        long = [line for line in views[run][view].splitlines() if len(line) > LINE_LIMIT]
        assert not long, f"{run} {view}: {len(long)} lines over {LINE_LIMIT}, e.g. {long[0]!r}"


@pytest.mark.parametrize("run", RUNS)
def test_every_printed_figure_is_a_json_value_in_the_one_format(views, run):
    report = views[run]["report"]
    values = _numbers(report)
    sizes = {format_size(abs(v)) for v in values if float(v).is_integer()}
    percents = {f"{v:.2f}" for v in values} | {f"{v:.1f}" for v in values}
    points = {f"{v:+.2f}" for v in values}
    decibels = {f"{v:.1f}" for v in values}
    for view in ("terminal", "markdown"):
        text = views[run][view]
        for number, unit in SIZE.findall(text):
            assert f"{number} {unit}" in sizes, f"{run} {view}: {number} {unit} is no size in report.json"
        for number in PERCENT.findall(text):
            assert number in percents, f"{run} {view}: {number} % is no figure in report.json"
        for number in POINTS.findall(text):
            assert number in points, f"{run} {view}: {number} pt is no figure in report.json"
        for number in DECIBELS.findall(text):
            assert number in decibels, f"{run} {view}: {number} dB is no figure in report.json"
        assert not OTHER_RATIO.findall(text), f"{run} {view}: a ratio not written as N.NN×"


@pytest.mark.parametrize("run", RUNS)
def test_headline_figures_read_the_same_in_every_view(views, run):
    report = views[run]["report"]
    page = _Page(views[run]["html"])
    acc = report["accuracy"]
    figures = {"flash.total_bytes": format_size(report["flash"]["total_bytes"]),
               "flash.limit_bytes": format_size(report["flash"]["limit_bytes"]),
               "flash.int8_bytes": format_size(report["flash"]["int8_bytes"]),
               "flash.float_bytes": format_size(report["flash"]["float_bytes"]),
               "flash.shrink_ratio": f"{report['flash']['shrink_ratio']:.2f}×",
               "sram.required_bytes": format_size(report["sram"]["required_bytes"]),
               "sram.peak_bytes": format_size(report["sram"]["peak_bytes"]),
               "sram.limit_bytes": format_size(report["sram"]["limit_bytes"]),
               "arena.ratio_to_peak": f"{report['arena']['ratio_to_peak']:.2f}×",
               "model.params": f"{report['model']['params']:,}",
               "model.macs": f"{report['model']['macs']:,}",
               "accuracy.float": f"{acc['float']:.2f} %", "accuracy.int8": f"{acc['int8']:.2f} %",
               "accuracy.drop_pt": f"{acc['drop_pt']:+.2f} pt",
               "accuracy.drop_ci95_pt.0": f"{acc['drop_ci95_pt'][0]:+.2f} pt",
               "accuracy.drop_ci95_pt.1": f"{acc['drop_ci95_pt'][1]:+.2f} pt"}
    for path, shown in figures.items():
        assert shown in views[run]["terminal"], f"{run} terminal lacks {path} = {shown}"
        assert shown in views[run]["markdown"], f"{run} report.md lacks {path} = {shown}"
        assert shown in page.figures.get(path, []), f"{run} report.html shows {path} as {page.figures.get(path)}"


@pytest.mark.parametrize("run", RUNS)
def test_headings_agree_and_none_repeats(views, run):
    markdown = views[run]["markdown"]
    sections = [line[3:] for line in markdown.splitlines() if line.startswith("## ")]
    assert not [line for line in markdown.splitlines() if line.startswith("###")], "no nested sections"
    assert len(sections) == len(set(sections)), f"{run}: a heading repeats in report.md: {sections}"
    assert sections.index("Model") < sections.index("Flash") < sections.index("Caution")
    assert _terminal_headings(views[run]["terminal"]) == sections
    page = _Page(views[run]["html"]).headings
    for heading in sections:
        if heading == "Caution":
            assert "Caution." in views[run]["html"]
        else:
            assert any(h == heading or h.startswith(heading + ":") for h in page), f"{run} html lacks '{heading}'"


@pytest.mark.parametrize("run", RUNS)
def test_the_verdict_reads_the_same_in_every_view(views, run):
    verdict = views[run]["report"]["verdict"]
    word = "Passes" if verdict["exit_code"] == 0 else "Does not pass"
    assert views[run]["code"] == verdict["exit_code"]
    result = [line for line in views[run]["terminal"].splitlines() if line.startswith("RESULT:")]
    assert result and all(line.startswith(f"RESULT: {word}") for line in result)
    assert f"RESULT: {word}" in views[run]["markdown"]
    assert word in _Page(views[run]["html"]).figures["verdict.exit_code"]
    for failed in verdict["failed"]:
        assert failed in result[-1]


def test_the_failing_run_fails_on_flash_and_advises_on_flash_only(views):
    report, terminal = views["failing"]["report"], views["failing"]["terminal"]
    assert report["verdict"]["failed"][:1] == ["flash"] and report["sram"]["fits"]
    for view in ("terminal", "markdown"):
        assert "What would make flash fit" in views["failing"][view]
        assert "What would make SRAM fit" not in views["failing"][view]
    assert "Does not pass: flash" in terminal


def test_outputs_list_every_file_written(views):
    outputs = views["passing"]["report"]["outputs"]
    assert outputs == {"model": "model_int8.onnx", "report_json": "report.json", "report_md": "report.md",
                       "report_html": "report.html"}


def test_top5_is_not_shown_for_six_classes(views):
    # Six classes: top-5 misses only when the true class is ranked last; it says nothing (common practice:
    # top-5 is quoted for many classes). The JSON keeps the figure; no view shows it.
    report = views["passing"]["report"]
    assert report["model"]["outputs"]["logits"][-1] == 6 and "top5" in report["accuracy"]
    for view in ("terminal", "markdown", "html"):
        assert "top-5" not in views["passing"][view].lower()


def test_budget_json_has_a_verdict_and_its_views_use_the_same_words(tmp_path):
    json_path, html_path = tmp_path / "budget.json", tmp_path / "budget.html"
    code, terminal = _run(["budget", os.path.join(DEMO, "model.onnx"), "--flash", "1MiB", "--sram", "64KiB",
                           "--json", str(json_path), "--html", str(html_path)])
    report = json.loads(json_path.read_text())
    assert code == 1 and report["verdict"] == {"fits_flash": True, "fits_sram": False, "failed": ["sram"],
                                               "exit_code": 1}
    assert "RESULT: Does not pass: sram" in terminal
    page = _Page(html_path.read_text())
    assert "Does not pass" in page.figures["fits"]
    assert "does not fit" in terminal and "does not fit" in page.figures["sram.fits"]
    assert all(len(line) <= LINE_LIMIT for line in terminal.splitlines())
