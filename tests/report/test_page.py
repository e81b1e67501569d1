"""The report page: section order, escaping, plotly.js once, size, and the report job."""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import polars as pl
import pytest

from tests.report.synthetic import FAULTS, RUN, SCRIPT_MARK, build_dataset
from tracelab import workflow
from tracelab.errors import UsageError
from tracelab.report.page import PLOTLY_FILE, verdict_sentence

SECTIONS = ("header", "verdict", "load", "timing", "gaps", "errors", "quality", "caution")


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return build_dataset(tmp_path_factory.mktemp("report") / "ds", duration_s=60.0)


@pytest.fixture(scope="module")
def page(dataset: Path, tmp_path_factory: pytest.TempPathFactory) -> str:
    out = tmp_path_factory.mktemp("html") / "run.html"
    (path,) = workflow.report(dataset, out, load_limit=0.4)
    assert path == out
    return out.read_text(encoding="utf-8")


def _figures(page: str) -> dict:
    raw = re.search(r'<script type="application/json" id="tl-figures">(.*?)</script>', page,
                    re.S)
    assert raw
    return json.loads(raw.group(1))


def test_sections_come_in_the_agreed_order(page: str) -> None:
    positions = [page.index(f'id="{s}"') for s in SECTIONS]
    assert positions == sorted(positions)
    assert "do not replace, the engineer's judgement and the applicable functional-safety" \
        in page


def test_log_strings_are_escaped_everywhere(page: str) -> None:
    assert SCRIPT_MARK not in page
    assert "<script>window.__tl_injected" not in page
    assert "&lt;i&gt;night shift&lt;/i&gt;" in page  # %meta value
    assert "&lt;b&gt;bad&lt;/b&gt;" in page  # rejected raw line
    assert "&lt;b&gt;vcu&lt;/b&gt;" in page  # hypothesis name from faults.json
    # the mark reaches Plotly as entity-escaped text, inside JSON that cannot end a script
    figures = _figures(page)
    texts = [a.get("text") for a in figures["fig-load"]["figure"]["layout"]["annotations"]]
    assert any(t and t.startswith("&lt;script&gt;window.__tl_") for t in texts)


def test_every_figure_is_embedded_and_time_axes_share_the_run_span(page: str) -> None:
    figures = _figures(page)
    assert set(figures) == {"fig-load", "fig-deviation", "fig-drift", "fig-gaps", "fig-errors",
                            "fig-counters"}
    timed = [f for f in figures.values() if f["time"]]
    assert len(timed) == 4
    for fig in timed:
        assert fig["figure"]["layout"]["xaxis"]["range"] == [0.0, 60.0]
    assert all(f["figure"]["data"] for f in figures.values())


def test_plotly_is_embedded_once_and_the_page_is_small(page: str) -> None:
    assert page.count("<script src=") == 0
    assert page.count("Plotly.newPlot") == 1  # our loop, once
    assert len(page.encode()) < 10_000_000


def test_shared_plotly_writes_the_bundle_once_beside_the_reports(dataset: Path,
                                                               tmp_path: Path) -> None:
    (first,) = workflow.report(dataset, tmp_path / "a.html", shared_plotly=True)
    bundle = tmp_path / PLOTLY_FILE
    stamp = bundle.stat().st_mtime_ns
    workflow.report(dataset, tmp_path / "b.html", shared_plotly=True)
    assert bundle.stat().st_mtime_ns == stamp
    text = first.read_text(encoding="utf-8")
    assert f'<script src="{PLOTLY_FILE}"></script>' in text
    assert len(text.encode()) < bundle.stat().st_size / 4


def test_report_job_refuses_unknown_runs_and_bad_limits(dataset: Path, tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="no run 'synthetic-rnu'; did you mean 'synthetic-run'"):
        workflow.report(dataset, tmp_path / "x.html", run="synthetic-rnu")
    with pytest.raises(UsageError, match="--load-limit"):
        workflow.report(dataset, tmp_path / "x.html", load_limit=50)
    (path,) = workflow.report(dataset, tmp_path / "dir", run=RUN)
    assert path == tmp_path / "dir" / f"{RUN}.html"


def test_verdict_sentence() -> None:
    text, tone = verdict_sentence(FAULTS)
    assert tone == "bad"
    # a score out of 1, not a percentage: "100 %" against "0 %" read as certainty
    assert text == ("bcm on bus body degraded first: reached error-passive at 40.640 s "
                    "(2026-03-01T08:00:40.640Z), score 0.86 of 1; most likely cause: "
                    "a transmit-side fault (bcm).")
    assert verdict_sentence({"results": [{"bus": "a", "first_degraded": None}]}) == (
        "Clean run: no node left error-active.", "ok")
    assert verdict_sentence(None, errors=3)[1] == "unknown"


def test_report_paths_for_one_and_several_runs(tmp_path: Path) -> None:
    from tracelab.workflow import _report_path

    def tag(name: str) -> str:  # sanitised names carry a short hash of the original
        return hashlib.sha256(name.encode()).hexdigest()[:8]

    assert _report_path(tmp_path / "r.html", "a/b", several=False) == tmp_path / "r.html"
    assert _report_path(tmp_path / "r.html", "a/b", several=True) == \
        tmp_path / f"r-a_b-{tag('a/b')}.html"
    assert _report_path(tmp_path / "out", "run 1", several=True) == \
        tmp_path / "out" / f"run_1-{tag('run 1')}.html"
    assert _report_path(tmp_path / "out", "night-07", several=True) == \
        tmp_path / "out" / "night-07.html"
    # runs a<b and a>b must not write one page
    assert _report_path(tmp_path / "out", "a<b", True) != _report_path(tmp_path / "out", "a>b", True)


def test_report_recomputes_analyses_that_miss_a_run(dataset: Path, tmp_path: Path) -> None:
    import shutil

    from tracelab.store.dataset import open_dataset

    copy = tmp_path / "ds"
    shutil.copytree(dataset, copy)
    ds = open_dataset(copy)
    stale = ds.read_analysis("timing")
    assert stale is not None
    ds.write_analysis("timing", stale.with_columns(run=pl.lit("another-run")))
    workflow.report(copy, tmp_path / "r.html")
    refreshed = ds.read_analysis("timing")
    assert refreshed is not None and refreshed["run"].unique().to_list() == [RUN]


def test_report_of_an_ingested_log_without_catalog(tmp_path: Path) -> None:
    """Real ingest, no catalog: timing and load are computed, the verdict says the replay did
    not run, and the logged status records feed the counter chart."""
    from tracelab.format.writer import (
        BusDecl,
        LogHeader,
        LogWriter,
        frame_line,
        mark_line,
        status_line,
    )

    header = LogHeader(buses=[BusDecl("body", 500_000)], origin="2026-03-01T08:00:00Z",
                       meta={"run": "plain", "vehicle": "rig-2"})
    log = tmp_path / "plain.frames"
    with LogWriter(log, header) as out:
        for k in range(2000):  # 20 s of a 10 ms message
            t_ns = k * 10_000_000 + 1_000_000
            out.line(frame_line(t_ns, "body", 0x100, False, False, False, False, False, 8,
                                bytes(8)))
            if k % 100 == 0:
                out.line(status_line(t_ns + 1, "body", "vcu", k // 20, 0))
        out.line(mark_line(19_000_000_000, "*", "end </script><b>x</b>"))
    workflow.ingest([log], tmp_path / "ds", quiet=True)
    (path,) = workflow.report(tmp_path / "ds", tmp_path / "plain.html")
    text = path.read_text(encoding="utf-8")
    assert "fault-confinement replay not run" in text
    assert "</script><b>x" not in text
    counters = _figures(text)["fig-counters"]["figure"]["data"]
    assert any(trace.get("name") == "vcu" for trace in counters)


def test_verdict_sentence_names_a_flood_instead_of_a_clean_run() -> None:
    faults = {"results": [{"run": RUN, "bus": "body", "first_degraded": None,
                           "cause": {"kind": "flood", "node": None, "id": "7FF"},
                           "flood": {"id": "7FF", "ext": False, "sender": None,
                                     "from_ns": 2_000_000_000, "to_ns": 5_000_000_000,
                                     "per_s": 4000.0, "in_catalog": False,
                                     "starved_nodes": ["bcm", "vcu"]}}]}
    text, tone = verdict_sentence(faults)
    assert tone == "bad" and "Clean run" not in text
    assert "identifier 7FF (not in the catalog) flooded the bus" in text
    assert "starving bcm, vcu" in text


def test_verdict_sentence_says_why_the_moment_is_open() -> None:
    faults = {"results": [{"run": RUN, "bus": "body", "cause": {"kind": "receive-fault",
                                                                "node": "bcm"},
                           "hypotheses": [{"name": "receive-fault:bcm", "score": 0.97}],
                           "first_degraded": {"node": "bcm", "state": "warning",
                                              "t_ns": 5_000_000_000, "confidence": 0.2,
                                              "earliest_ns": 4_000_000_000,
                                              "latest_ns": 5_100_000_000,
                                              "bounds_from": ["a logger loss"]}}]}
    text, _ = verdict_sentence(faults)
    assert "between 4.000 s and 5.100 s (the exact moment is open: a logger loss" in text
    assert ("score 0.20 of 1 (lowered because a logger loss before it hid part of the "
            "evidence; the cause's own score is 0.97)") in text
