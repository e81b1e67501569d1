"""The report in a real headless Chromium (Debian's package; `make browser-deps`).

Checks what only a browser can: no console errors, every figure drawn with data, the verdict
visible, the `<script>` mark shown as text and never run, linked time axes, a screenshot.
"""

from __future__ import annotations

import datetime as dt
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import polars as pl
import pytest

from tests.report.synthetic import SCRIPT_MARK, build_dataset
from tracelab import workflow

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
CHROMIUM_ARGS = ["--no-sandbox", "--headless", "--disable-gpu", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--disable-quic"]

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(),
                       reason="needs Debian's chromium at /usr/bin/chromium (make browser-deps)"),
]


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    sync_api = pytest.importorskip("playwright.sync_api")
    with tempfile.TemporaryDirectory() as profile, sync_api.sync_playwright() as p:
        context = p.chromium.launch_persistent_context(
            profile, executable_path=str(CHROMIUM), args=CHROMIUM_ARGS, headless=True,
            viewport={"width": 1280, "height": 900})
        yield context
        context.close()


def open_report(browser: Any, path: Path) -> tuple[Any, list[str]]:
    problems: list[str] = []
    page = browser.new_page()
    page.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: problems.append(str(e)))
    page.on("dialog", lambda d: (problems.append(f"dialog: {d.message}"), d.dismiss()))
    page.goto(path.as_uri())
    page.wait_for_function("document.querySelectorAll('.fig .main-svg').length >= "
                           "document.querySelectorAll('.fig').length")
    return page, problems


def check_report(page: Any, problems: list[str], shot: str) -> None:
    assert problems == []
    # charts said in words instead sit in closed disclosures: open them all first
    page.evaluate("() => document.querySelectorAll('details').forEach(d => { d.open = true; })")
    drawn = page.evaluate("""() => Array.from(document.querySelectorAll('.fig')).map(el => ({
        id: el.id, svg: !!el.querySelector('svg.main-svg'),
        traces: (el._fullData || []).filter(t => t.visible === true &&
            ((t.x && t.x.length) || (t.z && t.z.length))).length}))""")
    assert {"fig-load", "fig-errors", "fig-counters"} <= {f["id"] for f in drawn}
    for fig in drawn:
        assert fig["svg"] and fig["traces"] > 0, fig
    assert page.locator("#verdict-line").is_visible()
    assert "degraded first" in page.locator("#verdict-line").inner_text()
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / shot))
    assert (ARTIFACTS / shot).stat().st_size > 10_000


@pytest.fixture(scope="module")
def report_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    base = tmp_path_factory.mktemp("browser")
    (path,) = workflow.report(build_dataset(base / "ds", duration_s=60.0), base / "run.html")
    return path


def test_report_renders_in_chromium(browser: Any, report_path: Path) -> None:
    page, problems = open_report(browser, report_path)
    check_report(page, problems, "report-top.png")
    # the mark was shown as text and never executed
    assert page.evaluate("typeof window.__tl_injected") == "undefined"
    labels = page.locator("#fig-load .annotation-text").all_text_contents()
    assert any(label.startswith(SCRIPT_MARK[:20]) for label in labels)
    # zooming one time axis zooms the others
    page.evaluate("Plotly.relayout('fig-errors', {'xaxis.range': [10, 20]})")
    page.wait_for_function(
        "document.getElementById('fig-counters').layout.xaxis3.range[0] === 10")
    ranges = page.evaluate("""() => ['fig-load', 'fig-gaps', 'fig-counters'].map(
        id => document.getElementById(id).layout.xaxis.range)""")
    assert ranges == [[10, 20]] * 3
    # the window buttons: "1 s" shows the 1 s traces only
    def visible() -> list[int]:
        return page.evaluate("""() => document.getElementById('fig-load')._fullData
            .filter(t => t.visible === true).map(t => t.x.length)""")

    before = visible()
    page.locator("#fig-load .updatemenu-button").nth(1).click()
    page.wait_for_function("""() => document.getElementById('fig-load')._fullData
        .filter(t => t.visible === true && t.x.length === 60).length > 0""")
    after = visible()
    assert len(after) == len(before) and max(after) == 60 < max(before)  # 60 s of 1 s windows
    # the sortable table: a click on "missing" puts the most missing frames first
    heads = page.locator("#timing-table th")
    column = heads.all_text_contents().index("missing")
    heads.nth(column).click()
    first = page.locator("#timing-table tbody tr").first.locator("td").nth(column)
    assert int(first.inner_text().replace(",", "")) > 0
    page.close()


def test_demo_report_renders_in_chromium(browser: Any, tmp_path: Path) -> None:
    """The bundled demo end to end (about 10 s): its scenario marks a test step with
    ``<script>alert(1)</script>``; a dialog would be reported as a problem."""
    text = workflow.demo(tmp_path / "demo", quiet=True)
    assert text.startswith("verdict: ")
    path = Path(next(line for line in text.splitlines() if line.startswith("report: "))
                .removeprefix("report: "))
    assert text.splitlines()[-4] == "next:"  # three commands to try next end the output
    assert os.path.getsize(path) < 10_000_000
    page, problems = open_report(browser, path)
    check_report(page, problems, "demo-report-top.png")
    labels = page.locator("#fig-errors .annotation-text").all_text_contents()
    assert any("<scr" in label for label in labels)  # drawn as text
    # the demo catalog's signals: overview and the window around the first degradation;
    # the overview follows a zoom of the other time axes
    assert page.locator("#signals .fig").count() == 2
    page.evaluate("Plotly.relayout('fig-errors', {'xaxis.range': [300, 400]})")
    page.wait_for_function(
        "document.getElementById('fig-signals').layout.xaxis.range[0] === 300")
    check_report_v2(page, tmp_path)
    page.close()


def check_report_v2(page: Any, tmp_path: Path) -> None:
    """Table of contents, the disclosed technical detail, pagination, CSV download, and a
    greyscale screenshot (the categories must still read without colour)."""
    toc = page.locator("#toc a").all_text_contents()
    assert toc[:2] == ["Verdict", "Bus load"] and "Data quality" in toc
    assert page.locator("#verdict-line").count() == 1  # the verdict is stated once
    detail = page.locator("#verdict-detail")
    detail.evaluate("d => { d.open = false; }")
    assert not page.locator("#verdict-detail table").first.is_visible()
    detail.locator("summary").click()
    assert page.locator("#verdict-detail table").first.is_visible()
    # 54 messages: 25 rows a page, the header sticks, no inner scroll box
    rows = page.locator("#timing-table tbody tr")
    total = rows.count()
    assert total > 25

    def shown() -> int:
        return int(page.evaluate("""() => Array.from(document.querySelectorAll(
            '#timing-table tbody tr')).filter(r => r.style.display !== 'none').length"""))

    assert shown() == 25
    page.locator(".pager button", has_text="2").first.click()
    assert shown() == min(25, total - 25)
    page.locator(".pager button", has_text="all").first.click()
    assert shown() == total
    sticky = page.evaluate("getComputedStyle(document.querySelector('#timing-table th'))"
                           ".position")
    assert sticky == "sticky"
    with page.expect_download() as info:
        page.locator("button.csv[data-table='timing-table']").click()
    target = tmp_path / "timing.csv"
    info.value.save_as(str(target))
    lines = target.read_text().splitlines()
    assert len(lines) == total + 1 and lines[0].startswith("message")
    # greyscale: each error type keeps a pattern of its own, each node a dash of its own
    patterns = page.evaluate("""() => document.getElementById('fig-errors')._fullData
        .filter(t => t.type === 'bar').map(t => t.marker.pattern.shape)""")
    assert len(set(patterns)) == len(patterns) > 1
    page.evaluate("document.documentElement.style.filter = 'grayscale(1)'")
    page.screenshot(path=str(ARTIFACTS / "demo-report-greyscale.png"), full_page=True)
    page.evaluate("document.documentElement.style.filter = ''")
    page.screenshot(path=str(ARTIFACTS / "demo-report-full.png"), full_page=True)


def test_comparison_page_renders_in_chromium(browser: Any, tmp_path: Path) -> None:
    from tests.analyses.test_compare import _scenario

    logs = []
    for scenario in (_scenario(tmp_path / "a.toml", "night-a", 1, False, "10ms"),
                     _scenario(tmp_path / "b.toml", "night-b", 2, True, "12ms")):
        log = tmp_path / f"{scenario.stem}.frames"
        workflow.simulate(scenario, log, duration="6s", quiet=True)
        logs.append(log)
    workflow.ingest(logs, tmp_path / "ds", quiet=True)
    workflow.timing(tmp_path / "ds", catalog=tmp_path / "a.toml")
    page_path = tmp_path / "compare.html"
    workflow.compare(tmp_path / "ds", "night-a", "night-b", output=page_path)
    page = browser.new_page()
    problems: list[str] = []
    page.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: problems.append(str(e)))
    page.goto(page_path.as_uri())
    page.wait_for_function("document.querySelectorAll('.fig .main-svg').length >= 1")
    assert problems == []
    traces = page.evaluate("""() => document.getElementById('fig-compare-load')._fullData
        .filter(t => t.visible === true && t.x && t.x.length).length""")
    assert traces == 2
    assert "moved beyond the regression rule" in page.locator("#verdict-line").inner_text()
    flagged = page.locator("#compare-messages tbody tr td.bad-cell").count()
    assert flagged >= 3
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / "compare.png"), full_page=True)
    page.close()


def test_fleet_index_renders_in_chromium(browser: Any, tmp_path: Path) -> None:
    from tracelab.fleet.index import write_index
    from tracelab.fleet.regressions import REGRESSIONS
    from tracelab.fleet.summary import runs_frame

    runs = runs_frame([{"run": f"night-{i:02d}", "vehicle": v, "date": f"2026-11-{i:02d}",
                        "key": f"{v}{i}".ljust(64, "0"), "status": "ok", "files": 1,
                        "retry": False, "frames": 1000 * i, "errors": i % 3, "missing": i % 2,
                        "max_load_ratio": 0.1 + 0.01 * i, "report": None}
                       for v in ("utv-01", "utv-02") for i in range(1, 6)])
    flags = pl.DataFrame([{"vehicle": "utv-01", "date": dt.date(2026, 11, 5), "run": "night-05",
                           "key": "utv-015".ljust(64, "0"), "bus": "P", "id": 0x100,
                           "ext": False, "name": "msg", "metric": "jitter_p99_ns",
                           "value": 9e5, "baseline": 1e5, "history": 4}], schema=REGRESSIONS)
    path = write_index(tmp_path, runs, flags)
    page = browser.new_page()
    page.set_viewport_size({"width": 1400, "height": 900})
    problems: list[str] = []
    page.on("pageerror", lambda e: problems.append(str(e)))
    page.goto(path.as_uri())
    page.wait_for_function("document.querySelectorAll('.js-plotly-plot').length >= 2")
    assert problems == []
    assert page.locator(".js-plotly-plot").count() == 2  # one trend chart per vehicle
    # the runs table fits a 1400 px window: no horizontal overflow of the page
    assert page.evaluate("document.documentElement.scrollWidth <= window.innerWidth")
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / "fleet-index.png"), full_page=True)
    page.close()
