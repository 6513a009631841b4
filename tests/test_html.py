"""report.html (qfit/html.py): every figure on the page equals report.json's value at its path, the
page fetches nothing, and it renders in a real browser.

The figure check re-derives each displayed text from the JSON value with rules of its own (sizes with
qfit.sizes.format_size, the project's one size formatter; other numbers within half a unit of the
last digit shown; chart marks from the axis written on their <svg>), so it does not trust the
renderer's formatters. The reports come from the real CLI on a zoo model, plus hand-edited copies
for the branches one run cannot reach (repair steps, other accuracy metrics, hostile names).
"""
from __future__ import annotations

import base64
import copy
import json
import os
import pathlib
import re
import shutil
import sys
import tempfile
from html.parser import HTMLParser

import numpy as np
import onnx
import pytest

from qfit.cli import main
from qfit.report.html import render_html
from qfit.sizes import format_size

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))
import zoo  # noqa: E402

SRAM_TOO_SMALL = "16KiB"   # resnet_small peaks at 48 KiB: SRAM fails, so the what-if section exists


# ---- reports ---------------------------------------------------------------------------------------

def _write_arrays(folder: pathlib.Path, shape, count: int, rng) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(count):
        np.save(folder / f"sample_{i:02d}.npy", rng.standard_normal(shape).astype(np.float32))


@pytest.fixture(scope="module")
def check_run(tmp_path_factory):
    """`qfit check` on a small residual image classifier, a labelled evaluation folder, SRAM too small."""
    root = tmp_path_factory.mktemp("html_check")
    zm = zoo.resnet_small()
    model = root / "resnet_small.onnx"
    onnx.save(zm.model, str(model))
    rng = np.random.default_rng(0)
    _write_arrays(root / "calib", zm.input_shape[1:], 12, rng)
    for label in ("cat", "dog", "owl"):
        _write_arrays(root / "eval" / label, zm.input_shape[1:], 4, rng)
    out = root / "out"
    code = main(["check", str(model), "--calib", str(root / "calib"), "--eval", str(root / "eval"),
                 "--flash", "1MiB", "--sram", SRAM_TOO_SMALL, "--max-drop", "5", "--out", str(out), "--quiet"])
    with open(out / "report.json", encoding="utf-8") as f:
        report = json.load(f)
    return code, model, out, report


@pytest.fixture(scope="module")
def budget_run(check_run, tmp_path_factory):
    """`qfit budget` on the same model with room to spare: everything fits, no what-if."""
    _, model, _, _ = check_run
    out = tmp_path_factory.mktemp("html_budget")
    code = main(["budget", str(model), "--flash", "1MiB", "--sram", "1MiB", "--json", str(out / "budget.json"),
                 "--html", str(out / "budget.html")])
    with open(out / "budget.json", encoding="utf-8") as f:
        report = json.load(f)
    return code, out, report


def _with_repair_and_hostile_names(report: dict) -> dict:
    """A copy with the fields a real repair writes (qfit/repair.py step and refused entries), a layer
    and an input whose names need escaping, and a failed accuracy gate."""
    r = copy.deepcopy(report)
    first, last = r["layers"][0]["name"], r["layers"][-1]["name"]
    r["repair"] = {"target_drop_pt": 0.5, "drop_before_pt": 2.5, "final_drop_pt": 1.25, "reached": False,
                   "reason": "no repair of the 8 most sensitive layers lowers the drop further",
                   "steps": [{"layer": last, "action": "keep_float", "tensor": "t", "drop_before_pt": 2.5,
                              "drop_after_pt": 1.25, "flash_cost_bytes": 1800, "sram_cost_bytes": 0,
                              "flash_total_bytes": 90000, "sram_peak_bytes": 16000}],
                   "search": {"samples": 12, "drop_after_pt": 1.2345},
                   "refused": [{"layer": first, "action": "int16", "drop_after_pt": 0.3,
                                "breaks": [{"memory": "sram", "bytes": 70000, "limit_bytes": 16384}]}]}
    r["layers"][1]["name"] = '<script>alert("x")</script> & co'
    r["model"]["inputs"] = {"in.put~1": r["model"]["inputs"][next(iter(r["model"]["inputs"]))]}
    r["verdict"].update({"max_drop_pt": 0.5, "accuracy_ok": False, "failed": ["sram", "accuracy"]})
    r["accuracy"].update({"drop_pt": 2.5, "drop_ci95_pt": [-0.4123, 5.9876]})
    return r


def _with_agreement(report: dict) -> dict:
    r = copy.deepcopy(report)
    r["accuracy"] = {"metric": "agreement", "float": 100.0, "int8": 91.66666666666667, "drop_pt": 8.333333333333329,
                     "samples": 12, "agreement_pct": 91.66666666666667, "output_sqnr_db": 21.37}
    return r


def _with_score_output(report: dict) -> dict:
    r = copy.deepcopy(report)
    r["accuracy"] = {"metric": "output_sqnr", "output_sqnr_db": 27.04, "samples": 12,
                     "decision_flips_pct": 8.333333333333332, "threshold": 0.125}
    return r


@pytest.fixture(scope="module")
def reports(check_run, budget_run):
    check = check_run[3]
    return {"check": check, "budget": budget_run[2], "repair": _with_repair_and_hostile_names(check),
            "agreement": _with_agreement(check), "score": _with_score_output(check)}


# ---- reading the page back -------------------------------------------------------------------------

VOID = {"meta", "br", "hr", "img", "input", "link", "col", "area", "base", "wbr", "source", "embed", "param"}


class Page(HTMLParser):
    """Every element with data-key (its attributes, text, <title> child, nearest <svg> ancestor), every
    tag and attribute seen, and the text outside tagged elements."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tagged: list[dict] = []
        self.tags: list[tuple[str, dict]] = []
        self.untagged_text: list[str] = []
        self.styles: list[str] = []
        self._stack: list[dict] = []
        self.feed(text)
        self.close()

    def _element(self, tag, attrs) -> dict:
        attrs = dict(attrs)
        svg = next((e["attrs"] for e in reversed(self._stack) if e["tag"] == "svg"), None)
        return {"tag": tag, "attrs": attrs, "text": [], "title": [], "svg": svg,
                "exempt": tag in ("title", "style") or "keylabel" in attrs.get("class", "").split()
                or "tick" in attrs.get("class", "").split()}

    def handle_starttag(self, tag, attrs):
        element = self._element(tag, attrs)
        self.tags.append((tag, element["attrs"]))
        if "data-key" in element["attrs"]:
            self.tagged.append(element)
        if tag not in VOID:
            self._stack.append(element)

    def handle_startendtag(self, tag, attrs):
        element = self._element(tag, attrs)
        self.tags.append((tag, element["attrs"]))
        if "data-key" in element["attrs"]:
            self.tagged.append(element)

    def handle_endtag(self, tag):
        while self._stack:
            element = self._stack.pop()
            if element["tag"] == "title" and self._stack:
                self._stack[-1]["title"].append("".join(element["text"]))
            if element["tag"] == "style":
                self.styles.append("".join(element["text"]))
            if element["tag"] == tag:
                break

    def handle_data(self, data):
        for element in self._stack:
            element["text"].append(data)
        inside_tagged = any("data-key" in e["attrs"] for e in self._stack)
        exempt = any(e["exempt"] for e in self._stack)
        if not inside_tagged and not exempt:
            self.untagged_text.append(data)


def resolve(report: dict, path: str):
    """The test's own reading of the path syntax: keys and indices joined by '.', with '~1' for '.'
    and '~0' for '~' inside a key (JSON Pointer's escapes)."""
    node = report
    for part in path.split("."):
        part = part.replace("~1", ".").replace("~0", "~")
        node = node[int(part)] if isinstance(node, list) else node[part]
    return node


NUMBER = re.compile(r"^([+-]?)(\d{1,3}(?:,\d{3})*|\d+)(?:\.(\d+))?(.*)$")
UNITS = {"pct": " %", "pct1": " %", "pt": " pt", "pt_abs": " pt", "db": " dB", "ratio": "×", "num": "",
         "cos": "", "g": "", "seconds": " s"}
WORDS = {"fits": {True: "fits", False: "does not fit"}, "yesno": {True: "yes", False: "no"},
         "gate": {True: "within the gate", False: "over the gate"},
         "verdict": {True: "Passes", False: "Does not pass"}}
COORDINATE_TOLERANCE = 0.011   # coordinates are written with two decimals


def _check_number(text: str, value, fmt: str, where: str) -> None:
    assert isinstance(value, (int, float)) and not isinstance(value, bool), where
    match = NUMBER.match(text)
    assert match, f"{where}: '{text}' is not a number"
    sign, whole, decimals, unit = match.groups()
    assert unit == UNITS[fmt], f"{where}: unit '{unit}' in '{text}', expected '{UNITS[fmt]}'"
    if fmt == "pt":
        assert sign, f"{where}: a drop is shown with its sign, got '{text}'"
    shown = float(whole.replace(",", "") + ("." + decimals if decimals else ""))
    shown = -shown if sign == "-" else shown
    half_unit = 0.5 * 10.0 ** -(len(decimals) if decimals else 0)
    assert abs(shown - value) <= half_unit + 1e-9 * max(1.0, abs(value)), f"{where}: shows {text}, JSON has {value}"


def _axis_length(svg: dict, value: float) -> float:
    top = float(svg["data-axis-max-value"])
    return (min(value, top) - float(svg["data-axis-origin-value"])) * float(svg["data-px-per-unit"])


def _close(a: float, b: float, where: str) -> None:
    assert abs(a - b) <= COORDINATE_TOLERANCE, f"{where}: drawn at {a}, expected {b}"


def _check_mark(element: dict, value, fmt: str, where: str) -> None:
    attrs, svg = element["attrs"], element["svg"]
    assert svg is not None and "data-px-per-unit" in svg, f"{where}: a chart mark outside a chart with an axis"
    length = _axis_length(svg, value)
    origin = float(svg["data-axis-origin-px"])
    if fmt == "bar-x":
        _close(float(attrs["width"]), length, where)
        _close(float(attrs["x"]), origin, where)
    elif fmt == "bar-y":
        _close(float(attrs["height"]), length, where)
        _close(float(attrs["y"]), origin - length, where)
    elif fmt == "mark-y":
        _close(float(attrs["y1"]), origin - length, where)
        _close(float(attrs["y2"]), origin - length, where)
    elif fmt == "point-y":
        y = float(attrs["cy"]) if "cy" in attrs else float(attrs["y"]) + float(attrs["height"]) / 2
        _close(y, origin - length, where)
    else:
        raise AssertionError(f"{where}: unknown chart format {fmt}")
    # The tooltip of a mark states its own value.
    if element["title"]:
        expected = {"bytes": format_size(value), "db": f"{value:.1f} dB"}[attrs["data-unit"]]
        assert expected in element["title"][0], f"{where}: tooltip '{element['title'][0]}' lacks {expected}"


def check_display(element: dict, value, where: str) -> None:
    fmt = element["attrs"]["data-format"]
    text = "".join(element["text"])
    if fmt in ("bar-x", "bar-y", "mark-y", "point-y"):
        return _check_mark(element, value, fmt, where)
    if value is None:
        assert text == "—", f"{where}: a missing value shows '{text}'"
    elif fmt == "size":
        assert text == format_size(value), f"{where}: shows '{text}', JSON has {value} bytes"
    elif fmt == "headroom":
        expected = f"{format_size(value)} left" if value >= 0 else f"{format_size(-value)} over"
        assert text == expected, f"{where}: shows '{text}', JSON has {value} bytes"
    elif fmt == "int":
        assert isinstance(value, int) and text.replace(",", "") == str(value), f"{where}: '{text}' vs {value}"
    elif fmt in UNITS:
        _check_number(text, value, fmt, where)
    elif fmt == "text":
        assert isinstance(value, str) and text == value, f"{where}: shows '{text}', JSON has '{value}'"
    elif fmt == "list":
        assert text == (", ".join(str(v) for v in value) if value else "none"), f"{where}: '{text}' vs {value}"
    elif fmt == "dims":
        assert text == "×".join(str(v) for v in value), f"{where}: '{text}' vs {value}"
    elif fmt == "exit":
        assert text == ("Passes" if value == 0 else "Does not pass"), f"{where}: '{text}' for exit code {value}"
    elif fmt in WORDS:
        assert isinstance(value, bool) and text == WORDS[fmt][value], f"{where}: '{text}' for {value}"
    else:
        raise AssertionError(f"{where}: unknown data-format '{fmt}'")


def check_figures(page_text: str, report: dict) -> Page:
    """Assert that every tagged figure equals the JSON's value at its path and is shown consistently."""
    page = Page(page_text)
    for element in page.tagged:
        path = element["attrs"]["data-key"]
        where = f"{element['tag']} data-key={path}"
        try:
            value = resolve(report, path)
        except (KeyError, IndexError, ValueError, TypeError):
            raise AssertionError(f"{where}: no such path in the report") from None
        raw = json.loads(element["attrs"]["data-value"])
        assert raw == value and type(raw) is type(value), f"{where}: data-value {raw!r}, JSON has {value!r}"
        check_display(element, value, where)
    return page


def tagged_paths(page: Page, fmt: str | None = None) -> set[str]:
    return {e["attrs"]["data-key"] for e in page.tagged if fmt is None or e["attrs"]["data-format"] == fmt}


# ---- the figure-equality test ------------------------------------------------------------------

@pytest.mark.parametrize("name", ["check", "budget", "repair", "agreement", "score"])
def test_every_figure_on_the_page_equals_the_json_at_its_path(reports, name):
    report = reports[name]
    page = check_figures(render_html(report), report)
    assert len(page.tagged) > 100


def test_the_written_report_html_is_rendered_from_report_json(check_run):
    code, _, out, report = check_run
    assert code == 1  # SRAM does not fit
    written = (out / "report.html").read_text(encoding="utf-8")
    assert written == render_html(report)
    check_figures(written, report)


def test_qfit_budget_writes_html_from_its_json(budget_run):
    code, out, report = budget_run
    assert code == 0
    written = (out / "budget.html").read_text(encoding="utf-8")
    assert written == render_html(report)
    check_figures(written, report)


def test_the_headline_figures_are_on_the_page(reports):
    report = reports["check"]
    page = check_figures(render_html(report), report)
    paths = tagged_paths(page)
    for path in ("flash.total_bytes", "flash.limit_bytes", "flash.headroom_bytes", "sram.required_bytes",
                 "sram.peak_bytes", "sram.peak_step", "sram.peak_node", "sram.limit_bytes", "sram.headroom_bytes",
                 "accuracy.float", "accuracy.int8", "accuracy.drop_pt", "accuracy.drop_ci95_pt.0",
                 "accuracy.drop_ci95_pt.1", "accuracy.samples", "evaluation_path", "caution",
                 "verdict.exit_code", "what_if.tiling.options.0.extra_macs",
                 "what_if.resolution.current.arena_bytes"):
        assert path in paths, path
    # one bar per execution step, one point per layer, one flash row per layer with weights
    bars = tagged_paths(page, "bar-y")
    assert bars == {f"sram.timeline.{i}.live_bytes" for i in range(len(report["sram"]["timeline"]))}
    points = tagged_paths(page, "point-y")
    assert {f"layers.{i}.sqnr_db" for i in range(len(report["layers"]))} <= points
    assert {f"layers.{i}.sqnr_isolated_db" for i, row in enumerate(report["layers"])
            if row.get("sqnr_isolated_db") is not None} <= points
    widths = tagged_paths(page, "bar-x")
    assert {f"flash.layers.{i}.total_bytes" for i in range(len(report["flash"]["layers"]))} <= widths
    assert {"sram.limit_bytes", "arena.bytes"} <= tagged_paths(page, "mark-y")
    for i in range(len(report["sram"]["live_at_peak"])):
        assert f"sram.live_at_peak.{i}.bytes" in paths


def test_the_repair_log_shows_every_step_field(reports):
    report = reports["repair"]
    page = check_figures(render_html(report), report)
    paths = tagged_paths(page)
    for key in report["repair"]["steps"][0]:
        assert f"repair.steps.0.{key}" in paths
    assert "repair.refused.0.breaks.0.limit_bytes" in paths
    assert "verdict.max_drop_pt" in paths and "verdict.accuracy_ok" in paths


def test_flash_rows_are_sorted_largest_first(reports):
    report = reports["check"]
    page = Page(render_html(report))
    rows = [int(e["attrs"]["data-key"].split(".")[2]) for e in page.tagged
            if e["attrs"]["data-format"] == "bar-x" and e["attrs"]["data-key"].startswith("flash.layers.")
            and e["attrs"]["data-key"].endswith(".total_bytes")]
    shown = [report["flash"]["layers"][i]["total_bytes"] for i in rows]
    assert len(rows) == len(report["flash"]["layers"]) and shown == sorted(shown, reverse=True)


def test_every_number_in_the_text_is_a_tagged_figure(reports):
    """Digits outside tagged elements are only type and metric names (int8, Top-1), the 95 % of the
    interval, axis ticks and keys of the report (a resolution step "step_8")."""
    for name, report in reports.items():
        page = Page(render_html(report))
        text = " ".join(page.untagged_text)
        text = re.sub(r"\b(int8|int16|int32|float32|Top-1|Top-5)\b|95 %", "", text)
        found = re.findall(r".{0,30}\d.{0,30}", text)
        assert not found, f"{name}: untagged numbers in: {found[:3]}"
        for tag, attrs in page.tags:
            if "data-from-key" in attrs:
                resolve(report, attrs["data-from-key"])


# ---- the checker itself fails on a wrong page ---------------------------------------------------

def test_figure_check_catches_a_wrong_value_text_or_bar(reports):
    report = reports["check"]
    page = render_html(report)
    peak = report["sram"]["peak_bytes"]
    wrong_value = page.replace(f'data-key="sram.peak_bytes" data-value="{peak}"',
                               f'data-key="sram.peak_bytes" data-value="{peak + 1}"', 1)
    wrong_text = page.replace(f'data-format="size">{format_size(peak)}</span>',
                              f'data-format="size">{format_size(peak * 2)}</span>', 1)
    wrong_path = page.replace('data-key="sram.peak_bytes"', 'data-key="sram.peak_byte"', 1)
    bar = re.search(r'data-key="sram\.timeline\.0\.live_bytes"[^>]*height="([0-9.]+)"', page)
    wrong_bar = page.replace(bar.group(0), bar.group(0)[:bar.start(1) - bar.start(0)] + '1.00"', 1)
    for what, broken in (("value", wrong_value), ("text", wrong_text), ("path", wrong_path), ("bar", wrong_bar)):
        assert broken != page, what
        with pytest.raises(AssertionError):
            check_figures(broken, report)


# ---- self-contained, deterministic, readable without colour -----------------------------------

def test_the_page_loads_nothing_from_outside(reports):
    for name, report in reports.items():
        text = render_html(report)
        page = Page(text)
        assert "http://" not in text and "https://" not in text, name
        forbidden = {"script", "link", "iframe", "object", "embed", "img", "base", "frame", "audio", "video", "source"}
        assert not [tag for tag, _ in page.tags if tag in forbidden], name
        for tag, attrs in page.tags:
            assert "src" not in attrs, (name, tag)
            assert all(not k.startswith("on") for k in attrs), (name, tag)   # no inline handlers either
            if "href" in attrs:
                assert attrs["href"].startswith("#"), (name, tag, attrs["href"])
        css = " ".join(page.styles)
        assert "@import" not in css and not re.search(r"url\((?!#)", css), name
        csp = [a for t, a in page.tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
        assert csp and "default-src 'none'" in csp[0]["content"], name


def test_same_report_gives_the_same_bytes(reports):
    report = reports["check"]
    first = render_html(report)
    assert render_html(copy.deepcopy(report)) == first
    assert render_html(json.loads(json.dumps(report))) == first


def test_a_hostile_layer_name_is_text_not_markup(reports):
    report = reports["repair"]
    page = check_figures(render_html(report), report)
    assert not [tag for tag, _ in page.tags if tag == "script"]
    names = [("".join(e["text"])) for e in page.tagged if e["attrs"]["data-key"] == "layers.1.name"]
    assert names and all(n == '<script>alert("x")</script> & co' for n in names)
    assert "model.inputs.in~1put~01" in tagged_paths(page)


def test_failures_are_said_in_words_and_marked_by_pattern(reports):
    report = reports["check"]
    text = render_html(report)
    page = Page(text)
    words = {e["attrs"]["data-key"]: "".join(e["text"]) for e in page.tagged}
    assert words["sram.fits"] == "does not fit" and words["flash.fits"] == "fits"
    assert words["verdict.exit_code"] == "Does not pass"
    limit = report["sram"]["limit_bytes"]
    over = [e for e in page.tagged if e["attrs"]["data-format"] == "bar-y"
            and json.loads(e["attrs"]["data-value"]) > limit]
    assert over and all("over" in e["attrs"]["class"].split() for e in over)
    under = [e for e in page.tagged if e["attrs"]["data-format"] == "bar-y"
             and json.loads(e["attrs"]["data-value"]) <= limit]
    assert all("over" not in e["attrs"]["class"].split() for e in under)
    # "over" bars are filled with a hatch pattern defined in the page, not a flat colour
    assert re.search(r"\.bar\.over\{fill:url\(#qf-over\)\}", text)
    assert any(tag == "pattern" and attrs.get("id") == "qf-over" for tag, attrs in page.tags)
    assert [e for e in page.tagged if e["attrs"]["data-key"] == "sram.peak_step"]


def test_sections_follow_the_verdict(reports):
    def ids(report):
        return [a["id"] for t, a in Page(render_html(report)).tags if t == "section"]

    assert ids(reports["check"]) == ["verdict", "sram", "flash", "errors", "whatif", "details"]
    # everything fits in the budget run: no what-if, and no accuracy without data
    assert ids(reports["budget"]) == ["verdict", "sram", "flash", "details"]


def test_print_styles_are_part_of_the_page(reports):
    text = render_html(reports["check"])
    assert "@media print" in text and "print-color-adjust:exact" in text


# ---- in a real browser ------------------------------------------------------------------------

def _browser_paths() -> tuple[str | None, str | None]:
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    driver = shutil.which("chromedriver")
    return chromium, driver


@pytest.mark.browser
def test_report_renders_in_headless_chromium(check_run, tmp_path, monkeypatch):
    chromium, chromedriver = _browser_paths()
    if not chromium or not chromedriver:
        pytest.skip("needs the Debian packages chromium and chromium-driver (.ci/run installs them)")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service
    from selenium.webdriver.common.by import By

    monkeypatch.setenv("SE_OFFLINE", "true")   # selenium-manager must never download a driver
    _, _, out, report = check_run
    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for arg in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                "--disable-background-networking", "--disable-component-update", "--disable-sync",
                f"--user-data-dir={tempfile.mkdtemp(dir=tmp_path)}", "--window-size=1200,1600"):
        options.add_argument(arg)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(chromedriver), options=options)
    try:
        driver.get((out / "report.html").resolve().as_uri())
        assert driver.title.startswith("qfit report")
        shot = tmp_path / "report.png"
        assert driver.save_screenshot(str(shot))
        assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        severe = [entry for entry in driver.get_log("browser") if entry["level"] == "SEVERE"]
        assert not severe, severe
        charts = driver.find_elements(By.CSS_SELECTOR, "svg.chart")
        expected = [a for t, a in Page((out / "report.html").read_text(encoding="utf-8")).tags
                    if t == "svg" and "chart" in a.get("class", "").split()]
        assert len(charts) == len(expected) > 3
        for chart in charts:
            assert chart.size["width"] > 0 and chart.size["height"] > 0, chart.get_attribute("aria-label")
        for section in ("verdict", "sram", "flash", "errors", "whatif"):
            assert driver.find_element(By.ID, section).is_displayed()
        peak = driver.find_element(By.CSS_SELECTOR, '[data-key="sram.peak_bytes"]')
        assert peak.text == format_size(report["sram"]["peak_bytes"])
        pdf = base64.b64decode(driver.print_page())
        assert pdf[:5] == b"%PDF-"
    finally:
        driver.quit()
