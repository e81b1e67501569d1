"""The report in a real headless Chromium (Debian's package; `make browser-deps`).

Checks what only a browser can: no console errors, every figure drawn with data, the verdict
visible, the `<script>` mark shown as text and never run, linked time axes, a screenshot.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

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
    page.close()
