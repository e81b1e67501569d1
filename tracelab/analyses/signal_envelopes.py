"""The aggregates of the report's Signals section, computed in DuckDB from the stored
`signals`, `signal_stats` and `signal_checks` analyses: value envelopes (min / max / mean per
display bucket, never raw points) of the signals marked for plotting, their out-of-range
spans, a finer window around the first degradation, and the payload findings."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import duckdb
import polars as pl

from tracelab.analyses import install_macros, run_sql_frame

#: At most this many signals get a panel (the rest are named in a note).
MAX_PANELS = 8
FINDING_ROWS = 50
#: Half-width of the window around the first degradation: this share of the run, within
#: [MIN_DETAIL_NS, MAX_DETAIL_NS].
DETAIL_SHARE = 0.05
MIN_DETAIL_NS, MAX_DETAIL_NS = 5_000_000_000, 120_000_000_000
#: Finding kinds the section's table lists (counter and checksum findings).
TABLE_KINDS = ("counter-lost", "counter-skip", "counter-in-loss", "counter-repeat", "checksum")


@dataclass
class SignalSection:
    """Everything the Signals section shows; every frame is display-sized."""

    bucket_ns: int
    panels: pl.DataFrame = field(default_factory=pl.DataFrame)     # message, signal, unit, limits
    envelopes: pl.DataFrame = field(default_factory=pl.DataFrame)  # per bucket
    ranges: pl.DataFrame = field(default_factory=pl.DataFrame)     # out-of-range spans
    findings: pl.DataFrame = field(default_factory=pl.DataFrame)   # first FINDING_ROWS
    counts: dict[str, int] = field(default_factory=dict)           # findings per kind
    omitted: list[str] = field(default_factory=list)               # plotted signals not drawn
    degraded_ns: int | None = None
    degraded_node: str | None = None
    detail_from_ns: int | None = None
    detail_to_ns: int | None = None
    detail_bucket_ns: int = 1
    detail: pl.DataFrame = field(default_factory=pl.DataFrame)


def _views(con: duckdb.DuckDBPyConnection) -> set[str]:
    return {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables")
            .fetchall()}


def _nice_ns(span_ns: int, points: int) -> int:
    raw = max(1, math.ceil(span_ns / max(1, points)))
    step = 10 ** (len(str(raw)) - 1)
    return next(m * step for m in (1, 2, 5, 10) if m * step >= raw)


def first_degraded(faults: dict[str, Any] | None, run: str) -> tuple[int | None, str | None]:
    """The earliest first-degraded instant of the run's fault replay, and its node."""
    found = [r["first_degraded"] for r in (faults or {}).get("results", []) or []
             if r.get("run") in (None, run) and r.get("first_degraded")]
    found = [f for f in found if f.get("t_ns") is not None]
    if not found:
        return None, None
    first = min(found, key=lambda f: f["t_ns"])
    return int(first["t_ns"]), first.get("node")


def signal_section(con: duckdb.DuckDBPyConnection, run: str, t0_ns: int, t1_ns: int,
                   faults: dict[str, Any] | None = None, points: int = 1500,
                   detail_points: int = 600) -> SignalSection | None:
    """The section's data for one run; None when the dataset has no signals analysis."""
    views = _views(con)
    if not {"signals", "signal_stats"} <= views:
        return None
    install_macros(con)
    bucket_ns = _nice_ns(t1_ns - t0_ns, points)
    section = SignalSection(bucket_ns)
    plotted = con.sql(
        "SELECT bus, id, ext, message, signal, any_value(unit) AS unit, "
        "any_value(min_limit) AS min_limit, any_value(max_limit) AS max_limit "
        "FROM signal_stats WHERE run = $run AND plot GROUP BY ALL "
        "ORDER BY bus, ext, id, signal", params={"run": run}).pl()
    section.omitted = [f"{m}.{s}" for m, s in
                       plotted.select("message", "signal").rows()[MAX_PANELS:]]
    section.panels = plotted.head(MAX_PANELS)
    if "signal_checks" in views:
        section.counts = dict(con.sql(
            "SELECT kind, count(*)::BIGINT FROM signal_checks WHERE run = $run GROUP BY kind",
            params={"run": run}).fetchall())
        kinds = ", ".join(f"'{k}'" for k in TABLE_KINDS)
        section.findings = con.sql(
            f"SELECT kind, t_ns, message, signal, raw, expected, count, missing, cause, file, "
            f"line FROM signal_checks WHERE run = $run AND kind IN ({kinds}) "
            f"ORDER BY t_ns LIMIT {FINDING_ROWS}", params={"run": run}).pl()
    section.degraded_ns, section.degraded_node = first_degraded(faults, run)
    if section.panels.is_empty():
        return section
    con.register("_tl_signal_plot", section.panels.to_arrow())
    con.execute("CREATE OR REPLACE TEMP TABLE tl_signal_plot AS SELECT * FROM _tl_signal_plot")
    con.unregister("_tl_signal_plot")
    params = {"run": run, "bucket_ns": bucket_ns, "from_ns": t0_ns, "to_ns": t1_ns}
    section.envelopes = run_sql_frame(con, "envelope_signals", params)
    section.ranges = run_sql_frame(con, "envelope_signal_ranges",
                                   {"run": run, "bucket_ns": bucket_ns})
    if section.degraded_ns is not None:
        half = int(min(MAX_DETAIL_NS, max(MIN_DETAIL_NS, DETAIL_SHARE * (t1_ns - t0_ns))))
        lo, hi = max(t0_ns, section.degraded_ns - half), min(t1_ns, section.degraded_ns + half)
        section.detail_from_ns, section.detail_to_ns = lo, hi
        section.detail_bucket_ns = _nice_ns(hi - lo, detail_points)
        section.detail = run_sql_frame(con, "envelope_signals", {
            "run": run, "bucket_ns": section.detail_bucket_ns, "from_ns": lo, "to_ns": hi})
    con.execute("DROP TABLE IF EXISTS tl_signal_plot")
    return section
