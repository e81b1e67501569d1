"""Synthetic dataset tables (DEVELOPERS.md schemas) and a DuckDB connection over them."""

from __future__ import annotations

from collections.abc import Sequence

import duckdb
import numpy as np
import polars as pl

from tracelab.store import schema


def frames_table(t_ns: np.ndarray, frame_id: int | np.ndarray, bus: str = "P", run: str = "r1",
                 ext: bool = False, duration_ns: int | np.ndarray = 250_000,
                 bits: int | np.ndarray = 125, stamp: str = "start") -> pl.DataFrame:
    """Frames at times t_ns; start/end from the duration (stamp=start: start = t)."""
    t = np.asarray(t_ns, dtype=np.int64)
    n = len(t)
    dur = np.broadcast_to(np.asarray(duration_ns, dtype=np.int64), (n,))
    start = t if stamp == "start" else t - dur
    return schema.conform(pl.DataFrame({
        "run": [run] * n, "bus": [bus] * n, "t_ns": t, "start_ns": start,
        "end_ns": start + dur, "id": np.broadcast_to(np.asarray(frame_id), (n,)).astype(np.uint32),
        "ext": [ext] * n, "rtr": [False] * n, "fd": [False] * n, "brs": [False] * n,
        "esi": [False] * n, "dlc": [8] * n, "data": [bytes(8)] * n,
        "bits": np.broadcast_to(np.asarray(bits), (n,)).astype(np.uint16), "duration_ns": dur,
        "file": ["synthetic.frames"] * n, "line": np.arange(n, dtype=np.int64) + 1,
    }), "frames")


def connect_tables(frames: pl.DataFrame | Sequence[pl.DataFrame],
                   errors: pl.DataFrame | None = None,
                   losses: pl.DataFrame | None = None) -> duckdb.DuckDBPyConnection:
    """In-memory DuckDB with views frames, errors, losses, status, marks, like Dataset.connect."""
    if not isinstance(frames, pl.DataFrame):
        frames = pl.concat(list(frames))
    tables = {"frames": frames, "errors": errors, "losses": losses}
    con = duckdb.connect(":memory:")
    for name in ("frames", "errors", "losses", "status", "marks", "rejects"):
        table = tables.get(name)
        table = schema.empty(name) if table is None else schema.conform(table, name)
        con.register(f"_in_{name}", table.to_arrow())
        con.execute(f"CREATE VIEW {name} AS SELECT * FROM _in_{name}")
    con.register("_in_manifest", schema.empty("manifest").to_arrow())
    con.execute("CREATE VIEW manifest AS SELECT * FROM _in_manifest")
    return con


def losses_table(intervals: Sequence[tuple[int, int]], bus: str = "P",
                 run: str = "r1") -> pl.DataFrame:
    n = len(intervals)
    return pl.DataFrame({
        "run": [run] * n, "bus": [bus] * n, "t_ns": [a for a, _ in intervals],
        "count": [None] * n, "until_ns": [b for _, b in intervals],
        "file": ["synthetic.frames"] * n, "line": list(range(1, n + 1)),
    }, schema=schema.LOSSES)


def errors_table(t_ns: Sequence[int], field: str | Sequence[str], bus: str = "P",
                 run: str = "r1", ext: bool = False) -> pl.DataFrame:
    n = len(t_ns)
    fields = [field] * n if isinstance(field, str) else list(field)
    return pl.DataFrame({
        "run": [run] * n, "bus": [bus] * n, "t_ns": list(t_ns), "type": ["bit"] * n,
        "field": fields, "id": [0x123] * n, "ext": [ext] * n, "form": ["s"] * n,
        "by": [None] * n, "file": ["synthetic.frames"] * n, "line": list(range(1, n + 1)),
    }, schema=schema.ERRORS)
