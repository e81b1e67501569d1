"""Per-message timing: period, inter-arrival statistics, cycle and phase jitter, drift, gaps.

Everything is computed in DuckDB from the named SQL files timing_*.sql, gaps.sql and
timing.sql (definitions in docs/analyses.md); this module only stages the catalog, runs the
steps and returns polars frames.
"""

from __future__ import annotations

import contextlib
import shutil
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
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
from tracelab.store.limits import memory_limit_bytes

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
#: Peak DuckDB memory per frame of a batch (measured with bench/scale.py); a batch holds at
#: most memory_limit / BYTES_PER_FRAME frames.
BYTES_PER_FRAME = 200
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
           run: str | None = None, gap_factor: float = 1.5,
           batch_frames: int | None = None) -> TimingResult:
    """Timing statistics of every (run, bus, id, ext) stream in ``con``'s ``frames`` view.

    Every statistic is per stream, so the streams are taken in batches of whole streams of
    at most ``batch_frames`` frames (default: what the connection's memory_limit holds,
    ``BYTES_PER_FRAME`` each) and peak memory stays flat however long the log. With more
    than one batch, one pass first copies each frame's (stream key, t_ns) into a Parquet
    file per batch under the connection's temp_directory (removed afterwards); a stream
    larger than a batch is a batch of its own. ``con`` needs the views frames and losses;
    small temporary tables tl_* are left on it.
    """
    if not gap_factor > 1.0:
        raise UsageError(f"--gap-factor {gap_factor} must be greater than 1")
    install_macros(con)
    con.register("_tl_catalog_in", _catalog_frame(catalog).to_arrow())
    con.execute("CREATE OR REPLACE TEMP TABLE tl_catalog AS SELECT * FROM _tl_catalog_in")
    con.unregister("_tl_catalog_in")
    params = {"run": run, "gap_factor": float(gap_factor), "block": CYCLE_BLOCK}
    run_sql(con, "timing_streams", params)
    if query_scalar(con, "SELECT count(DISTINCT g) <> count(*) FROM tl_streams"):
        raise StoreError("timing: two streams share a 64-bit key; please report this dataset")
    if batch_frames is None:
        batch_frames = max(1, memory_limit_bytes(con) // BYTES_PER_FRAME)
    streams = query_frame(con, "SELECT g, frames FROM tl_streams ORDER BY run, bus, ext, id")
    batches = _batches(streams, batch_frames)
    tables, gap_tables = [], []
    with _batch_sources(con, run, batches) as sources:
        for source in sources:
            con.execute(f"CREATE OR REPLACE TEMP VIEW tl_batch AS {source}")
            for step in ("timing_arrivals", "timing_periods", "timing_cycles"):
                run_sql(con, step, params)
            con.execute("DROP TABLE tl_arrivals")  # frame-sized; tl_cycles holds what is left
            run_sql(con, "gaps", params)
            tables.append(run_sql_frame(con, "timing", params))
            gap_tables.append(query_frame(con, "SELECT * FROM tl_gaps"))
            con.execute("DROP TABLE tl_cycles")
    table = pl.concat(tables, how="vertical_relaxed").sort("run", "bus", "ext", "id")
    gaps = pl.concat(gap_tables, how="vertical_relaxed").sort(
        "run", "bus", "ext", "id", "from_ns")
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


def _batches(streams: pl.DataFrame, batch_frames: int) -> list[list[int]]:
    """The stream keys cut into consecutive batches of at most ``batch_frames`` frames (a
    larger stream alone); one batch (all) when everything fits. Loops over streams: few."""
    if int(streams["frames"].sum() or 0) <= batch_frames:
        return [streams["g"].to_list()]
    batches: list[list[int]] = [[]]
    held = 0
    for g, frames in streams.iter_rows():
        if batches[-1] and held + frames > batch_frames:
            batches.append([])
            held = 0
        batches[-1].append(g)
        held += frames
    return batches


@contextlib.contextmanager
def _batch_sources(con: duckdb.DuckDBPyConnection, run: str | None,
                   batches: list[list[int]]) -> Iterator[list[str]]:
    """Per batch, the SELECT of its frames' (g, t_ns). One batch reads the frames view;
    several are first copied in one pass into a Parquet file each (PARTITION_BY batch)."""
    where = "" if run is None else f"WHERE run = '{run.replace(chr(39), chr(39) * 2)}'"
    keyed = f"SELECT hash(run, bus, id, ext) AS g, t_ns FROM frames {where}"
    if len(batches) == 1:
        yield [keyed]
        return
    temp = Path(str(query_scalar(con, "SELECT current_setting('temp_directory')")))
    folder = temp / f"timing-{uuid.uuid4().hex}"
    made_temp = not temp.exists()
    try:
        folder.mkdir(parents=True)
        con.register("_tl_batch_in", pl.DataFrame(
            {"g": [g for batch in batches for g in batch],
             "b": [b for b, batch in enumerate(batches) for _ in batch]},
            schema={"g": pl.UInt64, "b": pl.Int32}).to_arrow())
        con.execute("CREATE OR REPLACE TEMP TABLE tl_batches AS SELECT * FROM _tl_batch_in")
        con.unregister("_tl_batch_in")
        con.execute(f"COPY (SELECT k.b, f.g, f.t_ns FROM ({keyed}) f JOIN tl_batches k "
                    f"ON k.g = f.g) TO '{folder}' (FORMAT parquet, PARTITION_BY (b))")
        yield [f"SELECT g, t_ns FROM read_parquet('{folder}/b={b}/*.parquet', "
               "hive_partitioning = false)" for b in range(len(batches))]
    except (OSError, duckdb.Error) as error:
        raise StoreError(f"timing: cannot stage the batches in {folder} ({error})") from error
    finally:
        shutil.rmtree(folder, ignore_errors=True)
        if made_temp:
            with contextlib.suppress(OSError):
                temp.rmdir()  # only when empty: DuckDB may be spilling there


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
