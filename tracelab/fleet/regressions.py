"""Regression flags: a run whose missing frames, p99 phase jitter or clock drift rose well
above the median of the same vehicle's previous runs, per message.

Rule (docs/fleet.md): for each vehicle and message (bus, id, ext), order the vehicle's ok runs
by (date, origin, run); the baseline is the median over the previous N runs that carried the
message (N = ``--previous``). A metric is flagged when at least ``MIN_HISTORY`` previous runs
exist and the value is at least ``FACTOR`` times the baseline *and* above it by at least the
absolute floor (``MISSING_MIN_INCREASE`` frames, ``JITTER_MIN_INCREASE_NS``,
``DRIFT_MIN_INCREASE_PPM`` of |drift|): a doubling of noise-sized numbers is not a regression.
"""

from __future__ import annotations

import duckdb
import polars as pl

from tracelab.analyses.regression_rules import (  # noqa: F401  (re-exported)
    DRIFT_MIN_INCREASE_PPM,
    FACTOR,
    JITTER_MIN_INCREASE_NS,
    METRICS,
    MIN_HISTORY,
    MISSING_MIN_INCREASE,
)
from tracelab.format.grammar import id_text

REGRESSIONS = pl.Schema({
    "vehicle": pl.String, "date": pl.Date, "run": pl.String, "key": pl.String,
    "bus": pl.String, "id": pl.UInt32, "ext": pl.Boolean, "name": pl.String,
    "metric": pl.String, "value": pl.Float64, "baseline": pl.Float64, "history": pl.Int64,
})


def regression_flags(con: duckdb.DuckDBPyConnection, previous: int = 5) -> pl.DataFrame:
    """Flags over the fleet views ``runs`` and ``message_stats`` (one row per flag)."""
    if previous < 1:
        raise ValueError("previous must be at least 1")
    views = {r[0] for r in con.execute(
        "SELECT view_name FROM duckdb_views() WHERE NOT internal").fetchall()}
    if "message_stats" not in views:
        return pl.DataFrame(schema=REGRESSIONS)
    baselines = ", ".join(f"median({col}) OVER w AS base_{col}" for _, col, _ in METRICS)
    flags = "\n        UNION ALL\n".join(
        f"""SELECT vehicle, date, run, key, bus, id, ext, name, '{metric}' AS metric,
               {col} AS value, base_{col} AS baseline, history
        FROM windowed
        WHERE history >= {MIN_HISTORY} AND {col} >= {FACTOR} * base_{col}
          AND {col} - base_{col} >= {floor}""" for metric, col, floor in METRICS)
    sql = f"""
        WITH ordered AS (
            SELECT key, vehicle, date,
                   row_number() OVER (PARTITION BY vehicle
                                      ORDER BY date, origin NULLS FIRST, run, key) AS seq
            FROM runs WHERE status = 'ok'
        ), stats AS (
            SELECT o.vehicle, o.date, m.run, m.key, o.seq, m.bus, m.id, m.ext, m.name,
                   CAST(m.missing AS DOUBLE) AS missing, CAST(m.jitter_p99_ns AS DOUBLE) AS jitter,
                   abs(CAST(m.drift_ppm AS DOUBLE)) AS drift
            FROM message_stats m JOIN ordered o ON m.key = o.key
        ), windowed AS (
            SELECT *, count(*) OVER w AS history,
                   {baselines}
            FROM stats
            WINDOW w AS (PARTITION BY vehicle, bus, id, ext ORDER BY seq
                         ROWS BETWEEN {int(previous)} PRECEDING AND 1 PRECEDING)
        )
        {flags}
        ORDER BY vehicle, date, run, bus, id, metric
    """
    frame = con.sql(sql).pl()
    return frame.select(pl.col(c).cast(t) for c, t in REGRESSIONS.items())


def flag_label(name: str | None, bus: str, frame_id: int, ext: bool, metric: str) -> str:
    return f"{bus}:{name or id_text(frame_id, ext)} {metric}"


def with_flags(runs: pl.DataFrame, flags: pl.DataFrame) -> pl.DataFrame:
    """Fill the runs' ``regressions`` count and ``flagged`` list from the flags table."""
    labels: dict[str, list[str]] = {}
    for flag in flags.iter_rows(named=True):  # flags are rare events, not frames
        labels.setdefault(flag["key"], []).append(
            flag_label(flag["name"], flag["bus"], flag["id"], flag["ext"], flag["metric"]))
    per_run = pl.DataFrame({"key": list(labels), "_n": [len(v) for v in labels.values()],
                            "_f": [", ".join(sorted(v)) for v in labels.values()]},
                           schema={"key": pl.String, "_n": pl.Int64, "_f": pl.String})
    joined = runs.drop("regressions", "flagged").join(per_run, on="key", how="left")
    return joined.with_columns(regressions=pl.col("_n").fill_null(0),
                               flagged=pl.col("_f")).drop("_n", "_f").select(runs.columns)
