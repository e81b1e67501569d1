"""Per-message timing: period, inter-arrival statistics, cycle and phase jitter, drift, gaps.

Everything is computed in DuckDB from the named SQL files timing_*.sql, gaps.sql and
timing.sql (definitions in docs/analyses.md); this module only stages the catalog, runs the
steps and returns polars frames.
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
from tracelab.errors import StoreError, UsageError
from tracelab.network.catalog import Catalog

#: Columns of timing.parquet and of each ``tracelab timing --json`` object, in order.
TIMING_COLUMNS = (
    "run", "bus", "id", "ext", "name", "sender", "count", "period_ns", "period_source",
    "median_ns", "mean_ns", "min_ns", "max_ns",
    "cycle_std_ns", "cycle_p01_ns", "cycle_p99_ns", "cycle_max_abs_ns",
    "phase_std_ns", "phase_max_abs_ns", "drift_ppm",
    "missing", "gaps", "bursts", "missing_in_loss",
)
#: Frames per block of the cycle-index correction (timing_cycles.sql).
CYCLE_BLOCK = 64
GAP_COLUMNS = ("run", "bus", "id", "ext", "from_ns", "to_ns", "missing", "in_loss")
_CATALOG_SCHEMA = {"bus": pl.String, "id": pl.UInt32, "ext": pl.Boolean, "name": pl.String,
                   "sender": pl.String, "period_ns": pl.Int64}


@dataclass
class TimingResult:
    timing: pl.DataFrame       # one row per (run, bus, id, ext)
    gaps: pl.DataFrame         # one row per gap
    node_drift: pl.DataFrame   # per (run, node): median drift over its catalogued messages
    unseen: pl.DataFrame       # catalog messages never seen in a run
    unknown: pl.DataFrame      # identifiers seen but not in the catalog

    def as_json(self) -> list[dict[str, Any]]:
        """One object per (run, bus, id, ext) with exactly the timing.parquet columns."""
        return self.timing.select(TIMING_COLUMNS).to_dicts()

    def describe(self) -> str:
        """The timing table in readable units (ms, us), then gaps and catalog coverage."""
        if self.timing.is_empty():
            return "timing: no frames"
        us = 1e3
        view = self.timing.select(
            "run", "bus", hex_id_expr().alias("id"), pl.col("name").fill_null(""),
            pl.col("sender").fill_null(""), "count",
            (pl.col("period_ns") / 1e6).round(3).alias("period_ms"),
            pl.col("period_source").fill_null("event").alias("source"),
            (pl.col("cycle_std_ns") / us).round(1).alias("cycle_std_us"),
            (pl.col("cycle_max_abs_ns") / us).round(1).alias("cycle_max_us"),
            (pl.col("phase_std_ns") / us).round(1).alias("phase_std_us"),
            pl.col("drift_ppm").round(1), "gaps", "missing", "missing_in_loss", "bursts")
        lines = [f"timing: {self.timing.height} messages, "
                 f"{int(self.timing['gaps'].fill_null(0).sum())} gaps, "
                 f"{int(self.timing['missing'].fill_null(0).sum())} missing frames "
                 f"(+{int(self.timing['missing_in_loss'].fill_null(0).sum())} in logger losses)",
                 text_table(view)]
        if not self.node_drift.is_empty():
            lines += ["", "clock drift per sender (median over its messages):",
                      text_table(self.node_drift.with_columns(
                          pl.col("drift_ppm", "min_drift_ppm", "max_drift_ppm").round(2)))]
        if not self.unknown.is_empty():
            lines += ["", f"not in the catalog: {self.unknown.height} identifiers",
                      text_table(self.unknown.with_columns(hex_id_expr().alias("id")))]
        if not self.unseen.is_empty():
            lines += ["", f"in the catalog, never seen: {self.unseen.height} messages",
                      text_table(self.unseen.select("run", "bus", hex_id_expr().alias("id"),
                                                    "name", "sender"))]
        return "\n".join(lines)


def _catalog_frame(catalog: Catalog | None) -> pl.DataFrame:
    if catalog is None:
        return pl.DataFrame(schema=_CATALOG_SCHEMA)
    return catalog.messages_frame().select(list(_CATALOG_SCHEMA)).cast(_CATALOG_SCHEMA)  # type: ignore[arg-type]


def timing(con: duckdb.DuckDBPyConnection, catalog: Catalog | None = None,
           run: str | None = None, gap_factor: float = 1.5) -> TimingResult:
    """Timing statistics of every (run, bus, id, ext) stream in ``con``'s ``frames`` view.

    ``con`` needs the views frames and losses; temporary tables tl_* are left on it.
    """
    if not gap_factor > 1.0:
        raise UsageError(f"--gap-factor {gap_factor} must be greater than 1")
    install_macros(con)
    con.register("_tl_catalog_in", _catalog_frame(catalog).to_arrow())
    con.execute("CREATE OR REPLACE TEMP TABLE tl_catalog AS SELECT * FROM _tl_catalog_in")
    con.unregister("_tl_catalog_in")
    params = {"run": run, "gap_factor": float(gap_factor), "block": CYCLE_BLOCK}
    run_sql(con, "timing_arrivals", params)
    if query_scalar(con, "SELECT count(DISTINCT g) <> count(*) FROM tl_streams"):
        raise StoreError("timing: two streams share a 64-bit key; please report this dataset")
    for step in ("timing_periods", "timing_cycles", "gaps"):
        run_sql(con, step, params)
    table = run_sql_frame(con, "timing", params)
    gaps = query_frame(con, "SELECT * FROM tl_gaps ORDER BY run, bus, ext, id, from_ns")
    for temp in ("tl_arrivals", "tl_cycles"):  # the two frame-sized tables
        con.execute(f"DROP TABLE IF EXISTS {temp}")
    table = table.select(TIMING_COLUMNS).with_columns(
        pl.col("id").cast(pl.UInt32), pl.col("count").cast(pl.Int64),
        *(pl.col(c).cast(pl.Int64) for c in ("period_ns", "min_ns", "max_ns", "cycle_max_abs_ns",
                                             "missing", "gaps", "bursts", "missing_in_loss")),
        *(pl.col(c).cast(pl.Float64) for c in ("median_ns", "mean_ns", "cycle_std_ns",
                                               "cycle_p01_ns", "cycle_p99_ns", "phase_std_ns",
                                               "phase_max_abs_ns", "drift_ppm")),
    )
    gaps = gaps.select(GAP_COLUMNS).with_columns(pl.col("id").cast(pl.UInt32))
    return TimingResult(table, gaps, node_drift(table), *_coverage(table, catalog))


def node_drift(table: pl.DataFrame) -> pl.DataFrame:
    """Median drift per (run, sender) over messages with a catalogue period: a node whose
    messages all drift together has a clock problem, one odd message is more likely jitter."""
    return (
        table.filter(pl.col("period_source") == "catalog", pl.col("drift_ppm").is_not_null(),
                     pl.col("sender").is_not_null())
        .group_by("run", pl.col("sender").alias("node"))
        .agg(pl.len().alias("messages"), pl.col("drift_ppm").median(),
             pl.col("drift_ppm").min().alias("min_drift_ppm"),
             pl.col("drift_ppm").max().alias("max_drift_ppm"))
        .with_columns(pl.col("messages").cast(pl.Int64))
        .sort("run", "node")
    )


def _coverage(table: pl.DataFrame, catalog: Catalog | None) -> tuple[pl.DataFrame, pl.DataFrame]:
    """(catalog messages never seen per run, identifiers seen but not catalogued)."""
    if catalog is None:
        empty = pl.DataFrame(schema={"run": pl.String, "bus": pl.String, "id": pl.UInt32,
                                     "ext": pl.Boolean, "name": pl.String, "sender": pl.String,
                                     "period_ns": pl.Int64})
        return empty, table.select("run", "bus", "id", "ext", "count").clear()
    cat = _catalog_frame(catalog)
    runs = table.select("run").unique()
    unseen = (runs.join(cat, how="cross")
              .join(table.select("run", "bus", "id", "ext"), on=["run", "bus", "id", "ext"],
                    how="anti")
              .sort("run", "bus", "ext", "id"))
    unknown = (table.join(cat.select("bus", "id", "ext"), on=["bus", "id", "ext"], how="anti")
               .select("run", "bus", "id", "ext", "count").sort("run", "bus", "ext", "id"))
    return unseen, unknown
