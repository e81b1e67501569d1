"""One summary row per run (the fleet's ``runs`` table) and the per-run table export.

All numbers come from the run's dataset views and analysis tables through DuckDB; nothing here
loops over frames.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from tracelab.analyses.regression_rules import phase_jitter_p99  # noqa: F401
from tracelab.fleet.discover import RunSpec
from tracelab.format.grammar import ERROR_TYPES
from tracelab.store.schema import sql_string

BUS_LOAD = pl.List(pl.Struct({"bus": pl.String, "max_load_ratio": pl.Float64,
                              "p99_load_ratio": pl.Float64}))

#: Statuses whose outputs are published (data views, reports): ``suspect`` runs are complete
#: but their input looks wrong (reason says why).
PUBLISHED = ("ok", "suspect")
#: A run is ``suspect`` when more than this share of its record lines was rejected.
SUSPECT_REJECT_SHARE = 0.05

#: The fleet summary, one row per run; ``status`` is ``ok``, ``suspect`` or ``failed`` (the
#: last two with a ``reason``).
_RUNS_COLUMNS: dict[str, Any] = {
    "run": pl.String, "vehicle": pl.String, "date": pl.Date, "origin": pl.String,
    "key": pl.String, "status": pl.String, "reason": pl.String, "retry": pl.Boolean,
    "notes": pl.String, "files": pl.Int64, "catalog": pl.String,
    "duration_ns": pl.Int64, "first_t_ns": pl.Int64, "last_t_ns": pl.Int64,
    "frames": pl.Int64, "errors": pl.Int64,
    **{f"errors_{kind}": pl.Int64 for kind in ERROR_TYPES},
    "rejects": pl.Int64, "missing": pl.Int64, "messages_missing": pl.Int64,
    "max_load_ratio": pl.Float64, "p99_load_ratio": pl.Float64, "bus_load": BUS_LOAD,
    "first_degraded_bus": pl.String, "first_degraded_node": pl.String,
    "first_degraded_state": pl.String, "first_degraded_t_ns": pl.Int64,
    "cause_kind": pl.String, "confidence": pl.Float64, "report": pl.String,
    "regressions": pl.Int64, "flagged": pl.String,
}
RUNS = pl.Schema(_RUNS_COLUMNS)

#: Per run and message: what the regression flags compare across runs.
MESSAGE_STATS = pl.Schema({
    "run": pl.String, "key": pl.String, "bus": pl.String, "id": pl.UInt32, "ext": pl.Boolean,
    "name": pl.String, "period_ns": pl.Int64, "frames": pl.Int64, "missing": pl.Int64,
    "jitter_p99_ns": pl.Float64, "drift_ppm": pl.Float64,
})



def empty_runs() -> pl.DataFrame:
    return pl.DataFrame(schema=RUNS)


def runs_frame(rows: list[dict[str, Any]]) -> pl.DataFrame:
    """Rows (from workers or JSON records) as a frame with the RUNS schema."""
    if not rows:
        return empty_runs()
    clean = [{name: row.get(name) for name in RUNS} for row in rows]
    for row in clean:  # records hold "YYYY-MM-DD", a read runs table holds dates
        row["date"] = None if row["date"] is None else str(row["date"])
    frame = pl.DataFrame(clean, schema={**RUNS, "date": pl.String}, strict=False)
    return frame.with_columns(pl.col("date").str.to_date("%Y-%m-%d", strict=False))


def base_row(spec: RunSpec) -> dict[str, Any]:
    return {"run": spec.run, "vehicle": spec.vehicle, "date": spec.date, "origin": spec.origin,
            "key": spec.key, "files": len(spec.files), "catalog": spec.catalog,
            "notes": "; ".join(spec.notes) or None, "retry": False, "regressions": 0}


def failed_row(spec: RunSpec, reason: str) -> dict[str, Any]:
    return {**base_row(spec), "status": "failed", "reason": reason}


def _views(con: duckdb.DuckDBPyConnection) -> set[str]:
    rows = con.execute("SELECT view_name FROM duckdb_views() WHERE NOT internal").fetchall()
    return {r[0] for r in rows}


def _columns(con: duckdb.DuckDBPyConnection, view: str) -> list[str]:
    return [d[0] for d in con.execute(f'SELECT * FROM "{view}" LIMIT 0').description]


def run_row(con: duckdb.DuckDBPyConnection, spec: RunSpec,
            faults_json: dict[str, Any] | None) -> dict[str, Any]:
    """The run's summary row from its dataset views, analyses and the faults JSON."""
    row = {**base_row(spec), "status": "ok", "reason": None}
    ((first, last, rejects),) = con.execute(
        "SELECT min(first_t_ns), max(last_t_ns), sum(rejects) FROM manifest").fetchall()
    row.update(first_t_ns=first, last_t_ns=last, rejects=int(rejects or 0),
               duration_ns=(last - first) if first is not None and last is not None else None)
    ((frames,),) = con.execute("SELECT count(*) FROM frames").fetchall()
    row["frames"] = int(frames)
    by_type = dict(con.execute("SELECT type, count(*) FROM errors GROUP BY type").fetchall())
    row["errors"] = int(sum(by_type.values()))
    for kind in ERROR_TYPES:
        row[f"errors_{kind}"] = int(by_type.get(kind, 0))
    row.update(_load(con))
    row.update(_missing(con))
    row.update(first_degraded(faults_json))
    return row


def _load(con: duckdb.DuckDBPyConnection) -> dict[str, Any]:
    """Max and p99 window load per bus, from the load analysis' summary."""
    per_bus: list[tuple[str, float | None, float | None]] = []
    if "load_summary" in _views(con):
        per_bus = con.execute('SELECT bus, max("max"), max(p99) FROM load_summary '
                              "GROUP BY bus ORDER BY bus").fetchall()
    buses = [{"bus": b, "max_load_ratio": h, "p99_load_ratio": p} for b, h, p in per_bus]
    highs = [b["max_load_ratio"] for b in buses if b["max_load_ratio"] is not None]
    p99s = [b["p99_load_ratio"] for b in buses if b["p99_load_ratio"] is not None]
    return {"bus_load": buses, "max_load_ratio": max(highs) if highs else None,
            "p99_load_ratio": max(p99s) if p99s else None}


def _missing(con: duckdb.DuckDBPyConnection) -> dict[str, Any]:
    """Total missing frames (outside logger losses) and messages with any missing."""
    if "timing" not in _views(con):
        return {"missing": None, "messages_missing": None}
    ((total, messages),) = con.execute(
        "SELECT coalesce(sum(missing), 0), count(*) FILTER (WHERE missing > 0) "
        "FROM timing").fetchall()
    return {"missing": int(total), "messages_missing": int(messages)}


def first_degraded(faults_json: dict[str, Any] | None) -> dict[str, Any]:
    """The earliest first-degraded node over the buses of the faults JSON, with its cause
    and verdict confidence; without any, the cause of the first bus that names one."""
    out: dict[str, Any] = {"first_degraded_bus": None, "first_degraded_node": None,
                           "first_degraded_state": None, "first_degraded_t_ns": None,
                           "cause_kind": None, "confidence": None}
    if not faults_json:
        return out
    results = faults_json.get("results", [])
    best: tuple[int, dict[str, Any], dict[str, Any]] | None = None
    for result in results:  # one per bus: a few, not frames
        first = result.get("first_degraded")
        if isinstance(first, dict) and first.get("t_ns") is not None and (
                best is None or int(first["t_ns"]) < best[0]):
            best = (int(first["t_ns"]), first, result)
    kinds = [(r.get("cause") or {}).get("kind") for r in results]
    named = [k for k in kinds if k not in (None, "none")]
    out["cause_kind"] = named[0] if named else (kinds[0] if kinds else None)
    if best is None:
        return out
    _, first, result = best
    confidence = first.get("confidence")
    out.update(first_degraded_bus=result.get("bus"), first_degraded_node=first.get("node"),
               first_degraded_state=first.get("state"), first_degraded_t_ns=int(first["t_ns"]),
               cause_kind=(result.get("cause") or {}).get("kind") or out["cause_kind"],
               confidence=None if confidence is None else float(confidence))
    return out


def message_stats(con: duckdb.DuckDBPyConnection, spec: RunSpec) -> pl.DataFrame:
    """Missing frames, p99 phase jitter and drift per message of this run (regression flags)."""
    if "timing" not in _views(con):
        return pl.DataFrame(schema=MESSAGE_STATS)
    timing = con.sql("SELECT run, bus, id, ext, name, period_ns, count AS frames, missing, "
                     "drift_ppm FROM timing").pl()
    phase = phase_jitter_p99(con)
    keys = ["run", "bus", "id", "ext"]
    frame = timing.join(phase.with_columns(pl.col("id").cast(timing.schema["id"])), on=keys,
                        how="left")
    frame = frame.with_columns(key=pl.lit(spec.key))
    return frame.select(pl.col(c).cast(t) for c, t in MESSAGE_STATS.items())


#: Dataset views exported as fleet tables under another name (``vehicle`` is a partition key).
_RENAMED = {"manifest": "logs"}
_PARTITION_KEYS = ("vehicle", "date")


def export_tables(con: duckdb.DuckDBPyConnection, out: Path,
                  stats: pl.DataFrame) -> dict[str, Path]:
    """Every dataset view (records, analyses) as one Parquet file in ``out``, rows in a stable
    order so a re-run writes the same content; returns table name -> staged file."""
    out.mkdir(parents=True, exist_ok=True)
    tables: dict[str, Path] = {}
    con.register("_message_stats", stats.to_arrow())
    con.execute("CREATE VIEW message_stats AS SELECT * FROM _message_stats")
    for view in sorted(_views(con)):
        cols = _columns(con, view)
        keep = [c for c in cols if c not in _PARTITION_KEYS]
        if not keep:
            continue
        order = "file, line" if {"file", "line"} <= set(keep) else "ALL"
        select = ", ".join(f'"{c}"' for c in keep)
        table = _RENAMED.get(view, view)
        target = out / f"{table}.parquet"
        quoted = sql_string(str(target))
        con.execute(f'COPY (SELECT {select} FROM "{view}" ORDER BY {order}) TO {quoted} '
                    "(FORMAT parquet, COMPRESSION zstd)")
        tables[table] = target
    return tables
