"""The aggregates a run report draws, computed in DuckDB so figures never see raw frames.

Every time series is reduced to at most ``points`` display buckets per trace (min / max /
mean per bucket for bus load, peak and trough for error counters, counts for error events,
cells for the gap raster), so a 24 h run gives the same few thousand points as a 90 s one.
The report layer only lays these frames out; it computes nothing.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from functools import cache
from importlib import resources
from typing import Any

import duckdb
import polars as pl

from tracelab.analyses import run_sql_frame
from tracelab.analyses.signal_envelopes import signal_section
from tracelab.format.grammar import wall_time
from tracelab.store.schema import manifest_buses, sql_string

#: Bus-load windows a reader can pick in the report (each a multiple of the stored window).
LOAD_WINDOWS_NS = (10_000_000, 100_000_000, 1_000_000_000, 10_000_000_000, 60_000_000_000)
#: A window is offered only when the run holds at least this many of it.
MIN_WINDOWS_PER_RUN = 5
#: A message "deviates" (drawn by default in the per-message charts) when its median interval
#: is off the period by at least this share, or a 1st / 99th percentile cycle lies this far
#: from the period; the others are counted in words ("N others within tolerance").
DEVIATION_TOLERANCE_PCT = 0.01  # 100 ppm: beyond any crystal's tolerance
JITTER_TOLERANCE_PCT = 10.0
#: A node's clock "drifts" beyond this (crystal tolerances are tens of ppm; common practice).
DRIFT_TOLERANCE_PPM = 5.0


@cache
def envelope_sql(name: str) -> str:
    """The named SQL in analyses/sql/envelope_<name>.sql."""
    return resources.files("tracelab.analyses").joinpath(f"sql/envelope_{name}.sql").read_text()


@dataclass
class ReportData:
    """Everything one run's report shows; frames are small (display-sized) aggregates."""

    run: str
    header: dict[str, Any]
    t0_ns: int
    t1_ns: int
    bucket_ns: int
    faults: dict[str, Any] | None = None
    load: pl.DataFrame = field(default_factory=pl.DataFrame)
    load_stats: pl.DataFrame = field(default_factory=pl.DataFrame)
    timing: pl.DataFrame = field(default_factory=pl.DataFrame)
    drift: pl.DataFrame = field(default_factory=pl.DataFrame)
    gaps: pl.DataFrame = field(default_factory=pl.DataFrame)
    gap_bucket_ns: int = 1
    #: messages whose every gap lies inside a logger loss (not drawn in the raster)
    gaps_logger_only: int = 0
    top_ids: pl.DataFrame = field(default_factory=pl.DataFrame)
    losses: pl.DataFrame = field(default_factory=pl.DataFrame)
    loss_summary: pl.DataFrame = field(default_factory=pl.DataFrame)
    errors: pl.DataFrame = field(default_factory=pl.DataFrame)
    counters: pl.DataFrame = field(default_factory=pl.DataFrame)
    states: pl.DataFrame = field(default_factory=pl.DataFrame)
    marks: pl.DataFrame = field(default_factory=pl.DataFrame)
    marks_total: int = 0
    rejects: pl.DataFrame = field(default_factory=pl.DataFrame)
    notes: list[str] = field(default_factory=list)
    #: the Signals section (analyses/signal_envelopes.py); None without a signals analysis
    signals: Any = None


def _views(con: duckdb.DuckDBPyConnection) -> set[str]:
    rows = con.execute("SELECT table_name FROM information_schema.tables").fetchall()
    return {r[0] for r in rows}


def _columns(con: duckdb.DuckDBPyConnection, view: str) -> list[str]:
    return [r[0] for r in con.execute(f'DESCRIBE "{view}"').fetchall()]


def _pick(columns: list[str], *candidates: str) -> str | None:
    return next((c for c in candidates if c in columns), None)


def _frame(con: duckdb.DuckDBPyConnection, sql: str, params: dict[str, Any]) -> pl.DataFrame:
    """Run ``sql`` with named parameters; the result as a polars frame."""
    return con.sql(sql, params=params).pl()


def _one(con: duckdb.DuckDBPyConnection, sql: str, params: dict[str, Any]) -> tuple[Any, ...]:
    """The single row of an aggregate query."""
    rows = con.sql(sql, params=params).fetchall()
    return tuple(rows[0]) if rows else ()


def _nice(n: int) -> int:
    """The smallest 1, 2 or 5 x 10^k that is >= n (readable bucket sizes: 20 ms, 5 s)."""
    step = 10 ** max(0, len(str(max(1, n))) - 1)
    return next(m * step for m in (1, 2, 5, 10) if m * step >= n)


def _nice_bucket_ns(span_ns: int, points: int, multiple_of: int = 1) -> int:
    """A readable bucket, a multiple of ``multiple_of``, that splits the span into at most
    ``points`` buckets."""
    raw = max(1, math.ceil(span_ns / max(1, points)))
    return _nice(math.ceil(raw / multiple_of)) * multiple_of


def _json_obj(text: Any) -> Any:
    if text is None:
        return None
    try:
        return json.loads(text)
    except (TypeError, ValueError):
        return None


def _buses(text: str | None) -> list[dict[str, Any]]:
    """The manifest's buses of one file, with the fields the page shows (none when the
    manifest's JSON cannot be read: the page still renders)."""
    try:
        decls = manifest_buses(text)
    except (TypeError, ValueError):
        return []
    return [{k: bus.get(k) for k in ("alias", "name", "nominal_bps", "data_bps")}
            for bus in decls]


def _wall(origin: str | None, t_ns: int | None) -> str | None:
    """Wall-clock time to the millisecond, for the page header."""
    exact = wall_time(origin, t_ns)
    return None if exact is None else exact[:23] + "Z"


def header(con: duckdb.DuckDBPyConnection, run: str) -> dict[str, Any]:
    """Run, meta, wall-clock span, buses and counts from the manifest rows of one run."""
    rows = _frame(con, "SELECT * FROM manifest WHERE run = $run ORDER BY first_t_ns",
                  {"run": run})
    if rows.is_empty():
        return {"run": run, "files": [], "buses": [], "meta": {}}
    buses: dict[str, dict[str, Any]] = {}
    meta: dict[str, Any] = {}
    for row in rows.iter_rows(named=True):  # one row per ingested file: few
        for bus in _buses(row["buses"]):
            buses.setdefault(str(bus["alias"]), bus)
        found = _json_obj(row["meta"])
        if isinstance(found, dict):
            meta.update(found)
    origin = rows["origin"].drop_nulls().first() if rows["origin"].null_count() < len(rows) \
        else None
    first = rows["first_t_ns"].min()
    last = rows["last_t_ns"].max()
    sums = {k: int(rows[k].fill_null(0).sum()) for k in
            ("frames", "errors", "status", "marks", "losses", "rejects", "backward_steps")}
    backward_lines = rows.filter(pl.col("backward_steps").fill_null(0) > 0).select(
        "file", "first_backward_line").rows()
    return {
        "run": run,
        "vehicle": rows["vehicle"].drop_nulls().first() if "vehicle" in rows.columns else None,
        "meta": meta,
        "origin": origin,
        "first_t_ns": first,
        "last_t_ns": last,
        "wall_start": _wall(origin, first),  # type: ignore[arg-type]
        "wall_end": _wall(origin, last),  # type: ignore[arg-type]
        "buses": list(buses.values()),
        "files": rows["file"].to_list(),
        "backward_at": [(f, ln) for f, ln in backward_lines],
        **sums,
    }


def _span(con: duckdb.DuckDBPyConnection, run: str, hdr: dict[str, Any]) -> tuple[int, int]:
    t0, t1 = hdr.get("first_t_ns"), hdr.get("last_t_ns")
    if t0 is None or t1 is None:
        t0, t1 = _one(con, "SELECT min(t_ns), max(t_ns) FROM frames WHERE run = $run",
                      {"run": run})
    t0, t1 = int(t0 or 0), int(t1 or 0)
    return t0, max(t1, t0 + 1)


def load_windows(con: duckdb.DuckDBPyConnection, run: str, span_ns: int) -> list[int]:
    """The selectable window sizes: multiples of the stored window that fit the run."""
    (base,) = _one(con, "SELECT min(window_ns) FROM load WHERE run = $run", {"run": run})
    if base is None:
        return []
    base = int(base)
    coarser = {w for w in LOAD_WINDOWS_NS if w > base and w % base == 0
               and span_ns >= MIN_WINDOWS_PER_RUN * w}
    return sorted(coarser | {base})  # the stored window is always offered


def load_envelopes(con: duckdb.DuckDBPyConnection, run: str, span_ns: int,
                   points: int) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Per bus and selectable window: bucket envelopes, and mean / peak."""
    windows = load_windows(con, run, span_ns)
    if not windows:
        return pl.DataFrame(), pl.DataFrame()
    sizes = pl.DataFrame({"window_ns": windows,
                          "bucket_ns": [_nice_bucket_ns(span_ns, points, multiple_of=w)
                                        for w in windows]}, schema={"window_ns": pl.Int64,
                                                                    "bucket_ns": pl.Int64})
    con.register("_tl_env_sizes", sizes.to_arrow())
    con.execute("CREATE OR REPLACE TEMP TABLE tl_env_sizes AS SELECT * FROM _tl_env_sizes")
    con.unregister("_tl_env_sizes")
    envelope = run_sql_frame(con, "envelope_load", {"run": run})
    stats = run_sql_frame(con, "envelope_load_stats", {})
    con.execute("DROP TABLE IF EXISTS tl_env_load")
    return envelope, stats


def timing_table(con: duckdb.DuckDBPyConnection, run: str, limit: int = 500) -> pl.DataFrame:
    """The timing analysis of one run, worst message first (most missing frames, then the
    largest phase jitter relative to the period, then the largest drift), with the period
    deviation in percent for the chart: the median inter-arrival against the period, and the
    1st / 99th percentile of the cycle deviation as the error bar."""
    cols = _columns(con, "timing")
    wanted = {
        "bus": ("bus",), "id": ("id",), "ext": ("ext",), "name": ("name",),
        "sender": ("sender",), "period_ns": ("period_ns",),
        "median_ns": ("median_ns", "mean_ns"), "cycle_std_ns": ("cycle_std_ns",),
        "cycle_p01_ns": ("cycle_p01_ns",), "cycle_p99_ns": ("cycle_p99_ns",),
        "phase_std_ns": ("phase_std_ns",), "phase_max_abs_ns": ("phase_max_abs_ns",),
        "drift_ppm": ("drift_ppm",), "frames": ("count", "frames"),
        "missing": ("missing",), "missing_in_loss": ("missing_in_loss",), "gaps": ("gaps",),
        "bursts": ("bursts",),
    }
    select = []
    for out, candidates in wanted.items():
        src = _pick(cols, *candidates)
        select.append(f'"{src}" AS {out}' if src else f"NULL AS {out}")
    run_filter = "WHERE run = $run" if "run" in cols else ""
    sql = f"""
        WITH t AS (SELECT {", ".join(select)} FROM timing {run_filter}),
        pct AS (
            SELECT *,
                   CASE WHEN period_ns > 0
                        THEN 100.0 * (median_ns - period_ns) / period_ns END AS deviation_pct,
                   CASE WHEN period_ns > 0 THEN 100.0 * cycle_p01_ns / period_ns END AS p01_pct,
                   CASE WHEN period_ns > 0 THEN 100.0 * cycle_p99_ns / period_ns END AS p99_pct
            FROM t
        )
        SELECT * EXCLUDE (p01_pct, p99_pct),
               greatest(p99_pct - deviation_pct, 0) AS err_plus_pct,
               greatest(deviation_pct - p01_pct, 0) AS err_minus_pct,
               coalesce(abs(deviation_pct) >= {DEVIATION_TOLERANCE_PCT}
                        OR p99_pct >= {JITTER_TOLERANCE_PCT}
                        OR p01_pct <= -{JITTER_TOLERANCE_PCT}, false) AS deviates
        FROM pct
        ORDER BY coalesce(missing, 0) DESC,
                 coalesce(phase_std_ns / nullif(period_ns, 0), 0) DESC,
                 abs(coalesce(drift_ppm, 0)) DESC, bus, id
        LIMIT {int(limit)}
    """
    return _frame(con, sql, {"run": run} if run_filter else {})


def drift_table(con: duckdb.DuckDBPyConnection, run: str) -> pl.DataFrame:
    cols = _columns(con, "node_drift")
    drift = _pick(cols, "drift_ppm", "clock_drift_ppm")
    if drift is None or "node" not in cols:
        return pl.DataFrame()
    bus = "bus" if "bus" in cols else "NULL"
    lo = "min_drift_ppm" if "min_drift_ppm" in cols else "NULL"
    hi = "max_drift_ppm" if "max_drift_ppm" in cols else "NULL"
    messages = "messages" if "messages" in cols else "NULL"
    run_filter = "WHERE run = $run" if "run" in cols else ""
    sql = (f'SELECT {bus} AS bus, node, "{drift}" AS drift_ppm, {lo} AS min_drift_ppm, '
           f"{hi} AS max_drift_ppm, {hi} - \"{drift}\" AS spread_plus_ppm, "
           f"\"{drift}\" - {lo} AS spread_minus_ppm, {messages} AS messages, "
           f"coalesce(abs(\"{drift}\") >= {DRIFT_TOLERANCE_PPM}, false) AS deviates "
           f"FROM node_drift {run_filter} ORDER BY abs(drift_ppm) DESC NULLS LAST, node")
    return _frame(con, sql, {"run": run} if run_filter else {})


def gap_cells(con: duckdb.DuckDBPyConnection, run: str, bucket_ns: int) -> pl.DataFrame:
    cols = _columns(con, "gaps")
    start = _pick(cols, "from_ns", "start_ns", "t_ns", "after_ns", "last_seen_ns")
    end = _pick(cols, "to_ns", "end_ns", "until_ns", "next_ns", "resumed_ns")
    if start is None or end is None or "id" not in cols:
        return pl.DataFrame()
    ext = "ext" if "ext" in cols else "false"
    run_col = "run" if "run" in cols else sql_string(run)
    logger = "in_loss" if "in_loss" in cols else "NULL"
    con.execute(f'CREATE OR REPLACE TEMP VIEW gap_source AS SELECT {run_col} AS run, bus, id, '
                f'{ext} AS ext, "{start}" AS from_ns, "{end}" AS to_ns, {logger} AS in_loss '
                "FROM gaps")
    return _frame(con, envelope_sql("gaps"), {"run": run, "bucket_ns": bucket_ns})


def split_logger_only(cells: pl.DataFrame) -> tuple[pl.DataFrame, int]:
    """The raster cells of messages with at least one gap on the bus, and the number of
    messages whose gaps all lie inside logger losses (said in words instead of drawn)."""
    if cells.is_empty():
        return cells, 0
    keys = ["bus", "id", "ext"]
    on_bus = cells.group_by(keys).agg((~pl.col("logger")).any().alias("on_bus"))
    shown = on_bus.filter(pl.col("on_bus")).select(keys)
    kept = cells.join(shown, on=keys, how="semi", maintain_order="left")
    return kept, on_bus.height - shown.height


def top_identifiers(con: duckdb.DuckDBPyConnection, run: str, top: int = 5) -> pl.DataFrame:
    """The identifiers with the largest share of each bus's busy time (from `load`), with the
    catalog name when the timing analysis knows it."""
    names = "LEFT JOIN (SELECT DISTINCT run, bus, id, ext, name FROM timing) n USING (run, bus, " \
            "id, ext)" if "timing" in _views(con) else ""
    name = "n.name" if names else "NULL"
    return _frame(con, f"SELECT t.bus, t.id, t.ext, {name} AS name, t.frames, t.busy_ns, "
                       f"t.share, t.rank FROM load_top_ids t {names} WHERE t.run = $run "
                       "AND t.rank <= $top ORDER BY t.bus, t.rank", {"run": run, "top": top})


def counter_envelopes(con: duckdb.DuckDBPyConnection, run: str, bucket_ns: int,
                      views: set[str]) -> pl.DataFrame:
    source = "counters" if "counters" in views else "status"
    # seq: the source's own row order (the replay writes rows in time order; at one instant
    # the last row is the value after it), taken before any parallel operator can reorder.
    con.execute(f"CREATE OR REPLACE TEMP TABLE counter_source AS "
                f"SELECT run, bus, node, t_ns, tec, rec, row_number() OVER () AS seq "
                f"FROM (SELECT * FROM {source} WHERE run = $run)", {"run": run})
    return _frame(con, envelope_sql("counters"), {"run": run, "bucket_ns": bucket_ns})


def _run_faults(faults: dict[str, Any] | None, run: str) -> dict[str, Any] | None:
    """The faults.json object restricted to this run's results; None when the replay did not
    cover this run (a run ingested after it), so the page never calls it clean unseen."""
    if not isinstance(faults, dict):
        return None
    results = [r for r in faults.get("results", []) if r.get("run") in (None, run)]
    return {**faults, "results": results} if results else None


def report_data(con: duckdb.DuckDBPyConnection, run: str, faults: dict[str, Any] | None = None,
                points: int = 2000, raster_buckets: int = 600, marks_limit: int = 200,
                reject_rows: int = 10, states_limit: int = 5000) -> ReportData:
    """All aggregates of one run's report; ``faults`` is the stored faults.json object."""
    views = _views(con)
    hdr = header(con, run)
    t0, t1 = _span(con, run, hdr)
    span = t1 - t0
    bucket_ns = _nice_bucket_ns(span, points)
    data = ReportData(run=run, header=hdr, t0_ns=t0, t1_ns=t1, bucket_ns=bucket_ns,
                      faults=_run_faults(faults, run))
    if "load" in views:
        data.load, data.load_stats = load_envelopes(con, run, span, points)
    else:
        data.notes.append("bus load: no load analysis in the dataset")
    if "timing" in views:
        data.timing = timing_table(con, run)
    if "node_drift" in views:
        data.drift = drift_table(con, run)
    if "gaps" in views:
        data.gap_bucket_ns = _nice_bucket_ns(span, raster_buckets)
        data.gaps, data.gaps_logger_only = split_logger_only(
            gap_cells(con, run, data.gap_bucket_ns))
    if "load_top_ids" in views:
        data.top_ids = top_identifiers(con, run)
    data.losses = _frame(con, "SELECT bus, t_ns AS from_ns, until_ns AS to_ns, count FROM losses "
                              "WHERE run = $run ORDER BY t_ns", {"run": run})
    data.loss_summary = _frame(
        con, "SELECT bus, count(*) AS records, min(t_ns) AS from_ns, max(until_ns) AS to_ns, "
             "sum(until_ns - t_ns) AS lost_ns, sum(count) AS frames FROM losses "
             "WHERE run = $run GROUP BY bus ORDER BY bus", {"run": run})
    data.errors = _frame(con, envelope_sql("errors"), {"run": run, "bucket_ns": bucket_ns})
    data.counters = counter_envelopes(con, run, bucket_ns, views)
    if "node_states" in views:
        data.states = _frame(
            con, "SELECT bus, node, state, from_ns, coalesce(to_ns, $t1) AS to_ns, "
                 "coalesce(to_ns, $t1) - from_ns AS duration_ns FROM node_states "
                 "WHERE run = $run ORDER BY from_ns, bus, node LIMIT $n",
            {"run": run, "t1": t1, "n": states_limit})
    data.marks = _frame(con, envelope_sql("marks"), {"run": run, "limit": marks_limit})
    (total,) = _one(con, "SELECT count(*) FROM marks WHERE run = $run", {"run": run})
    data.marks_total = int(total or 0)
    data.rejects = _frame(con, "SELECT file, line, reason, raw FROM rejects WHERE run = $run "
                               "ORDER BY file, line LIMIT $n", {"run": run, "n": reject_rows})
    data.signals = signal_section(con, run, t0, t1, data.faults)
    return data
