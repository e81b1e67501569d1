"""Per-message timing: period, inter-arrival statistics, cycle and phase jitter, drift, gaps.

Everything is computed in DuckDB from the named SQL files timing_*.sql, gaps.sql and
timing.sql (definitions in docs/analyses.md); this module only stages the catalog, runs the
steps and returns polars frames.
"""

from __future__ import annotations

from dataclasses import dataclass

import duckdb
import polars as pl

from tracelab.analyses import install_macros, query_frame, run_sql, run_sql_frame
from tracelab.errors import UsageError
from tracelab.network.catalog import Catalog

#: Columns of timing.parquet and of each ``tracelab timing --json`` object, in order.
TIMING_COLUMNS = (
    "run", "bus", "id", "ext", "name", "sender", "count", "period_ns", "period_source",
    "median_ns", "mean_ns", "min_ns", "max_ns",
    "cycle_std_ns", "cycle_p01_ns", "cycle_p99_ns", "cycle_max_abs_ns",
    "phase_std_ns", "phase_max_abs_ns", "drift_ppm",
    "missing", "gaps", "bursts", "missing_in_loss",
)
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
    params = {"run": run, "gap_factor": float(gap_factor)}
    for step in ("timing_arrivals", "timing_periods", "timing_cycles", "gaps"):
        run_sql(con, step, params)
    table = run_sql_frame(con, "timing", params)
    gaps = query_frame(con, "SELECT * FROM tl_gaps ORDER BY run, bus, ext, id, from_ns")
    con.execute("DROP TABLE IF EXISTS tl_arrivals")
    con.execute("DROP TABLE IF EXISTS tl_cycles")
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
