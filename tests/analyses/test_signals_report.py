"""The report's Signals section: envelopes (never raw points), out-of-range spans, the
window around the first degradation and the findings table with file:line."""

from __future__ import annotations

import json
import re
from pathlib import Path

import polars as pl
import pytest

from tests.analyses.test_signals import CATALOG, FRAMES, PERIOD_NS, build_log
from tracelab import workflow
from tracelab.analyses.signal_envelopes import signal_section
from tracelab.store.dataset import open_dataset
from tracelab.store.ingest import ingest_logs


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    root = tmp_path_factory.mktemp("sigreport")
    build_log(root / "sig-01.frames")
    ingest_logs([root / "sig-01.frames"], root / "ds", quiet=True)
    (root / "net.toml").write_text(CATALOG, encoding="utf-8")
    return root / "ds", root / "net.toml"


def test_section_data_envelopes_and_spans(dataset: tuple[Path, Path]) -> None:
    ds, cat = dataset
    workflow.signals(ds, cat)
    faults = {"results": [{"run": "sig-01", "bus": "P", "first_degraded": {
        "node": "tms", "t_ns": 5_000_000_000, "state": "error-passive"}}]}
    values = pl.read_parquet(ds / "analyses" / "signals.parquet")
    with open_dataset(ds).connect() as con:
        section = signal_section(con, "sig-01", 1_000_000, 1_000_000 + FRAMES * PERIOD_NS,
                                 faults, points=100)
    assert section is not None
    assert section.panels["signal"].to_list() == ["coolant_temp"]  # the one with plot = true
    env = section.envelopes
    assert env.height <= 101  # display buckets, not the ~1000 values
    # independent recomputation of each bucket's min / max with polars over the raw rows
    temp = values.filter(pl.col("signal") == "coolant_temp").with_columns(
        (pl.col("t_ns") // section.bucket_ns * section.bucket_ns).alias("b"))
    want = temp.group_by("b").agg(pl.col("value").min().alias("lo"),
                                  pl.col("value").max().alias("hi")).sort("b")
    got = env.sort("t_ns")
    assert got["t_ns"].to_list() == want["b"].to_list()
    assert got["v_min"].to_list() == want["lo"].to_list()
    assert got["v_max"].to_list() == want["hi"].to_list()
    # the values above max = 50 degC start at k = 901 (t = 9.011 s) and last to the end
    (span,) = section.ranges.iter_rows(named=True)
    assert span["from_ns"] <= 1_000_000 + 901 * PERIOD_NS < span["from_ns"] + section.bucket_ns
    assert span["to_ns"] >= 1_000_000 + 999 * PERIOD_NS
    assert section.degraded_ns == 5_000_000_000 and section.degraded_node == "tms"
    assert section.detail_from_ns is not None and section.detail_from_ns < 5_000_000_000
    assert section.detail.height > 0
    assert set(section.findings["kind"]) >= {"counter-lost", "counter-skip", "checksum"}


def test_report_page_has_the_section(dataset: tuple[Path, Path], tmp_path: Path) -> None:
    ds, cat = dataset
    (page,) = workflow.report(ds, tmp_path / "r.html", catalog=cat)
    html = page.read_text(encoding="utf-8")
    assert '<section id="signals"><h2>Signals</h2>' in html
    assert "sig-01.frames:" in html.split("id='signal-findings'", 1)[1].split("</table>")[0]
    # JSON reads the \u003c escapes itself (a unicode_escape pass would break "\\")
    figures = json.loads(re.search(r'id="tl-figures">(.*?)</script>', html, re.S)
                         .group(1))  # type: ignore[union-attr]
    fig = figures["fig-signals"]
    assert fig["time"] is True
    points = sum(len(t.get("x") or []) for t in fig["figure"]["data"])
    assert points < 3 * 2100  # three traces (band edges, mean) of at most ~2000 buckets
    assert any(s.get("fillcolor") for s in fig["figure"]["layout"]["shapes"])  # out of range
