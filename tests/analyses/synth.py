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


def write_demo_log(path, run: str = "bench-07", seconds: int = 4, seed: int = 3):  # type: ignore[no-untyped-def]
    """A small frame log: two periodic messages (one with a 3-frame silence), an event-driven
    one, a logger loss and two bus errors; returns the path."""
    from tracelab.format.writer import (
        BusDecl,
        LogHeader,
        LogWriter,
        error_line,
        frame_line,
        loss_line,
        mark_line,
        status_line,
    )

    rng = np.random.default_rng(seed)
    header = LogHeader(buses=[BusDecl("P", 500_000)], origin="2026-03-01T08:00:00Z",
                       meta={"run": run})
    records: list[tuple[int, str]] = []
    for frame_id, period in ((0x0C0, 10_000_000), (0x18FF0010, 100_000_000)):
        ext = frame_id > 0x7FF
        for k in range(seconds * 1_000_000_000 // period):
            if frame_id == 0x0C0 and k in (150, 151, 152):
                continue  # silent sender
            t = 1_000_000 + k * period + int(rng.integers(0, 20_000))
            records.append((t, frame_line(t, "P", frame_id, ext, False, False, False, False, 8,
                                          bytes(8))))
    for t in np.sort(rng.integers(0, seconds * 1_000_000_000, 40)):
        records.append((int(t), frame_line(int(t), "P", 0x3A0, False, False, False, False,
                                           False, 2, b"\x01\x02")))
    records.append((2_500_000_000, loss_line(2_500_000_000, "P", 12, 2_530_000_000)))
    records.append((3_000_000_000, error_line(3_000_000_000, "P", "crc", "crc", 0x0C0, False,
                                              "s", None)))
    records.append((3_100_000_000, mark_line(3_100_000_000, "P", "door opened")))
    records.append((3_200_000_000, status_line(3_200_000_000, "P", "vcu", 96, 0)))
    records.append((3_300_000_000, status_line(3_300_000_000, "P", "vcu", 136, 0)))
    records.sort(key=lambda r: r[0])
    # the logger really lost the 0C0 frames inside the loss interval
    records = [r for r in records if not (2_500_000_000 < r[0] < 2_530_000_000
                                          and "\t0C0\t" in r[1])]
    with LogWriter(path, header) as writer:
        writer.lines([line for _, line in records])
    return path


def make_dataset(tmp_path):  # type: ignore[no-untyped-def]
    """Ingest write_demo_log() into tmp_path/ds and return the dataset path."""
    from tracelab.store.ingest import ingest_logs

    log = write_demo_log(tmp_path / "bench-07.frames")
    ingest_logs([log], tmp_path / "ds", quiet=True)
    return tmp_path / "ds"
