"""Fleet SQL: views spanning all runs, and a layout other engines read as it is."""

from __future__ import annotations

import datetime as dt
import html
import re

import duckdb
import polars as pl
import pyarrow.dataset as pads
import pytest

from tests.fleet.conftest import Fleet
from tracelab.errors import StoreError
from tracelab.fleet.index import write_index
from tracelab.fleet.regressions import REGRESSIONS
from tracelab.fleet.summary import runs_frame
from tracelab.fleet.views import connect_fleet

REQUIRED = ("run", "vehicle", "date", "frames", "missing", "errors", "first_degraded_node",
            "first_degraded_state", "cause_kind", "status", "reason")


def test_views_span_all_runs_with_vehicle_and_date(small_fleet: Fleet) -> None:
    con = connect_fleet(small_fleet.fleet)
    runs = con.sql("SELECT * FROM runs").pl()
    assert set(REQUIRED) <= set(runs.columns)
    assert set(runs["status"]) == {"ok", "failed"}
    per_run = con.sql("SELECT vehicle, date, run, count(*) AS n FROM frames GROUP BY ALL").pl()
    joined = per_run.join(runs, on=["vehicle", "date", "run"])
    assert joined.height == 9 and (joined["n"] == joined["frames"]).all()
    assert con.execute("SELECT DISTINCT typeof(date) FROM frames").fetchall() == [("DATE",)]
    views = {r[0] for r in con.sql("SELECT view_name FROM duckdb_views() "
                                   "WHERE NOT internal").fetchall()}
    assert {"frames", "errors", "timing", "gaps", "load", "load_summary", "runs",
            "regressions", "manifest", "message_stats", "verdicts"} <= views
    flagged = set(con.sql("SELECT run, metric FROM regressions").fetchall())
    assert {("birch-03", "missing"), ("cedar-03", "abs_drift_ppm")} <= flagged


def test_sql_command_over_a_fleet(small_fleet: Fleet, capsys: pytest.CaptureFixture[str]) -> None:
    from tracelab.cli import main

    assert main(["sql", str(small_fleet.fleet),
                 "SELECT vehicle, count(*) AS runs FROM runs WHERE status = 'ok' "
                 "GROUP BY vehicle ORDER BY vehicle", "--format", "csv"]) == 0
    out = capsys.readouterr().out
    assert "alder,3" in out and "birch,3" in out and "cedar,3" in out


def test_hive_layout_read_as_is(small_fleet: Fleet) -> None:
    frames_dir = small_fleet.fleet / "data" / "frames"
    # another engine: Apache Arrow's dataset reader with hive partitioning
    table = pads.dataset(frames_dir, format="parquet", partitioning="hive").to_table()
    assert [(table.num_rows,)] == connect_fleet(small_fleet.fleet).execute(
        "SELECT count(*) FROM frames").fetchall()
    assert {"vehicle", "date"} <= set(table.column_names)
    # plain DuckDB, no tracelab views
    rows = duckdb.sql(f"SELECT DISTINCT vehicle FROM read_parquet('{frames_dir}/*/*/*.parquet', "
                      "hive_partitioning = true) ORDER BY 1").fetchall()
    assert rows == [("alder",), ("birch",), ("cedar",)]


def test_not_a_fleet(tmp_path) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(StoreError, match="not a tracelab fleet"):
        connect_fleet(tmp_path)


def test_index_links_every_report(small_fleet: Fleet) -> None:
    page = (small_fleet.fleet / "index.html").read_text()
    links = re.findall(r'href="([^"]+\.html)"', page)
    assert len(links) == 9
    for link in links:
        assert (small_fleet.fleet / html.unescape(link)).is_file()
    # three vehicles; the unknown one has no ok run, so no empty axes are drawn for it
    assert page.count('class="chart"') == 3
    assert "Vehicle unknown" not in page
    assert (small_fleet.fleet / "plotly.min.js").is_file()


def test_index_escapes_strings(tmp_path) -> None:  # type: ignore[no-untyped-def]
    runs = runs_frame([{"run": "<script>alert(1)</script>", "vehicle": "v&<w>",
                        "date": "2026-11-01", "key": "a" * 64, "status": "failed",
                        "reason": "bad <b>line</b>", "files": 1, "retry": False}])
    page = write_index(tmp_path, runs, pl.DataFrame(schema=REGRESSIONS)).read_text()
    assert "<script>alert" not in page and "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "bad &lt;b&gt;line&lt;/b&gt;" in page and "v&amp;&lt;w&gt;" in page


def test_index_trend_chart_escapes_run_names_and_marks_flags_by_metric(tmp_path) -> None:  # type: ignore[no-untyped-def]
    runs = runs_frame([{"run": f"<b>BOLD</b>{i}\u202e", "vehicle": "v1", "date": f"2026-11-0{i}",
                        "key": str(i) * 64, "status": "ok", "files": 1, "retry": False,
                        "frames": 10, "errors": 0, "missing": 0, "max_load_ratio": 0.1}
                       for i in (1, 2, 3)])
    flags = pl.DataFrame([{"vehicle": "v1", "date": dt.date(2026, 11, 3), "run": "<b>BOLD</b>3\u202e",
                           "key": "3" * 64, "bus": "P", "id": 0x100, "ext": False,
                           "name": "msg", "metric": "jitter_p99_ns", "value": 9e5,
                           "baseline": 1e5, "history": 2}], schema=REGRESSIONS)
    page = write_index(tmp_path, runs, flags).read_text()
    assert "<b>BOLD</b>" not in page  # Plotly renders markup in labels: escaped first
    assert "\u202e" not in page and "\\u202e" in page  # bidi override shown, not applied
    # the jitter flag sits on the flags panel with its own symbol, not on "missing frames"
    assert '"triangle-up"' in page and '"diamond-open"' not in page
    assert '"rangemode":"nonnegative"' in page.replace(" ", "")
