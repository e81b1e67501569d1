"""Bus load over time: busy time per window from exact frame durations plus error frames.

The SQL is in sql/load_*.sql and sql/load.sql (definitions and the error-frame estimate in
docs/analyses.md); this module runs the steps and returns polars frames.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import duckdb
import polars as pl

from tracelab.analyses import (
    hex_id_expr,
    install_macros,
    query_frame,
    query_scalar,
    run_sql,
    run_sql_frame,
    text_table,
)
from tracelab.errors import UsageError

MIN_WINDOW_NS = 1_000_000             # 1 ms
MAX_WINDOW_NS = 3_600_000_000_000     # 1 h
TOP_IDS = 10
#: Times from -4e18 ns (about -127 years) are windowed correctly (see load_heads.sql).
K_OFFSET_NS = 4 * 10**18
WINDOW_COLUMNS = ("run", "bus", "window_ns", "t_ns", "busy_ns", "load_ratio", "frames",
                  "error_frames")


@dataclass
class LoadResult:
    windows: pl.DataFrame   # one row per (run, bus, window): load.parquet
    summary: pl.DataFrame   # one row per (run, bus): load_summary.parquet
    top_ids: pl.DataFrame   # the identifiers with the largest busy share per (run, bus)

    def as_json(self) -> list[dict[str, Any]]:
        """One object per (run, bus): the load_summary columns (ratios in 0..1)."""
        return self.summary.to_dicts()

    def describe(self) -> str:
        if self.summary.is_empty():
            return "load: no frames"
        pct = [(pl.col(c) * 100).round(2).alias(f"{c}_%") for c in
               ("mean", "p50", "p95", "p99", "max")]
        view = self.summary.select(
            "run", "bus", (pl.col("window_ns") / 1e6).alias("window_ms"), *pct,
            (pl.col("max_t_ns") / 1e9).round(3).alias("max_at_s"),
            pl.col("frames_per_s").round(1), "frames", "error_frames")
        top = self.top_ids.filter(pl.col("rank") <= 5).select(
            "run", "bus", "rank", hex_id_expr().alias("id"), "frames",
            (pl.col("share") * 100).round(2).alias("share_%"))
        return "\n".join(["bus load per window:", text_table(view), "",
                          "top identifiers by share of busy time:", text_table(top)])


def check_window(window_ns: int) -> None:
    if not MIN_WINDOW_NS <= window_ns <= MAX_WINDOW_NS:
        raise UsageError(f"--window {window_ns} ns is outside 1ms .. 1h")


def bus_load(con: duckdb.DuckDBPyConnection, window_ns: int = 100_000_000,
             run: str | None = None, top: int = TOP_IDS) -> LoadResult:
    """Load per window of ``window_ns`` for every (run, bus) in ``con``'s frames and errors."""
    check_window(window_ns)
    install_macros(con)
    params = {"run": run, "window_ns": int(window_ns), "top": int(top),
              "k_offset": K_OFFSET_NS // int(window_ns)}
    if query_scalar(con, "SELECT count(*) FROM errors WHERE $run::VARCHAR IS NULL "
                    "OR run = $run::VARCHAR", {"run": run}):
        run_sql(con, "load_errors", params)
    else:
        con.execute("CREATE OR REPLACE TEMP TABLE tl_error_spans (run VARCHAR, bus VARCHAR, "
                    "s BIGINT, e BIGINT)")
    run_sql(con, "load_heads", params)
    longest_ns = query_scalar(con, "SELECT greatest((SELECT max(longest_ns) FROM tl_ids), "
                                   "(SELECT max(e - s) FROM tl_error_spans))")
    if longest_ns is not None and longest_ns > window_ns:  # rare: very short windows
        run_sql(con, "load_long", params)
    else:
        con.execute("CREATE OR REPLACE TEMP TABLE tl_long (run VARCHAR, bus VARCHAR, k BIGINT, "
                    "extra_ns BIGINT)")
    run_sql(con, "load", params)
    windows = query_frame(con, "SELECT * FROM tl_load ORDER BY run, bus, t_ns")
    summary = run_sql_frame(con, "load_summary", params)
    top_ids = run_sql_frame(con, "load_top_ids", params)
    windows = windows.select(WINDOW_COLUMNS).with_columns(
        *(pl.col(c).cast(pl.Int64) for c in ("window_ns", "t_ns", "busy_ns", "frames",
                                             "error_frames")),
        pl.col("load_ratio").cast(pl.Float64))
    summary = summary.with_columns(
        *(pl.col(c).cast(pl.Int64) for c in ("window_ns", "windows", "max_t_ns", "frames",
                                             "error_frames", "busy_ns", "span_ns")),
        *(pl.col(c).cast(pl.Float64) for c in ("mean", "p50", "p95", "p99", "max",
                                               "frames_per_s")))
    top_ids = top_ids.with_columns(pl.col("id").cast(pl.UInt32), pl.col("rank").cast(pl.Int64),
                                   pl.col("frames").cast(pl.Int64))
    return LoadResult(windows, summary, top_ids)
