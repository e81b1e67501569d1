"""A large synthetic dataset written directly as Parquet (numpy/polars, no simulator, no
ingest), shared by bench/timing.py and bench/load.py, with their CPU-time probe."""

from __future__ import annotations

import hashlib
import json
import resource
import time
from pathlib import Path

import numpy as np
import polars as pl

from tracelab.store import schema
from tracelab.store.dataset import sha16

PERIODS_NS = np.array([5, 10, 20, 50, 100, 1000]) * 1_000_000
BIT_NS = 2_000  # 500 kbit/s


def cpu_s() -> float:
    """CPU seconds of this process (all DuckDB threads): steadier than wall time when
    other work shares the machine."""
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def write_dataset(path: Path, frames: int, ids: int = 200, buses: int = 2,
                  seed: int = 1, drop: float = 0.0) -> Path:
    """``frames`` periodic frames of ``ids`` identifiers over ``buses`` buses, one run;
    ``drop`` removes that fraction of frames at random (gaps in every stream)."""
    t0 = time.perf_counter()
    rng = np.random.default_rng(seed)
    period = rng.choice(PERIODS_NS, ids)
    duration_ns = int(frames / np.sum(1e9 / period) * 1e9)
    counts = (duration_ns // period).astype(np.int64)
    total = int(counts.sum())
    which = np.repeat(np.arange(ids), counts)
    k = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    t = (rng.integers(0, period)[which] + k * period[which]
         + rng.normal(0, 20_000, total)).astype(np.int64)
    bits = np.full(total, 125, dtype=np.uint16)  # the view derives duration, start, end
    frame = pl.DataFrame({
        "run": pl.Series(["bench"] * 1, dtype=pl.String).extend_constant("bench", total - 1),
        "bus": pl.Series([f"B{i}" for i in range(buses)])[which % buses],
        "t_ns": t, "id": (0x100 + which).astype(np.uint32), "ext": np.zeros(total, bool),
        "rtr": np.zeros(total, bool), "fd": np.zeros(total, bool), "brs": np.zeros(total, bool),
        "esi": np.zeros(total, bool), "dlc": np.full(total, 8, np.uint8),
        "data": pl.Series([bytes(8)], dtype=pl.Binary).extend_constant(bytes(8), total - 1),
        "bits": bits, "data_bits": np.zeros(total, np.uint16),
        "file": pl.Series(["bench.frames"]).extend_constant("bench.frames", total - 1),
        "line": np.arange(total, dtype=np.int64) + 1,
    })
    if drop:
        frame = frame.filter(pl.Series(rng.random(total) >= drop))
    frame = frame.sort("t_ns")
    total = frame.height
    sha = hashlib.sha256(f"bench-{frames}-{seed}".encode()).hexdigest()
    part = path / "parts" / sha16(sha)
    for table in schema.TABLES:
        (part / table).mkdir(parents=True, exist_ok=True)
        data = (schema.conform(frame, "frames", stored=True) if table == "frames"
                else schema.empty(table, stored=True))
        data.write_parquet(part / table / "0.parquet", compression="zstd",
                           row_group_size=1_000_000)
    manifest = {name: None for name in schema.MANIFEST}
    manifest.update(file="bench.frames", sha256=sha, frames=total, run="bench",
                    first_t_ns=int(t.min()), last_t_ns=int(t.max()), meta="{}",
                    layout=schema.PARTS_LAYOUT, buses=json.dumps([
                        {"alias": f"B{i}", "nominal_bps": 1_000_000_000 // BIT_NS,
                         "data_bps": None, "stamp": "end", "name": None}
                        for i in range(buses)]))
    pl.DataFrame([manifest], schema=schema.MANIFEST).write_parquet(path / "manifest.parquet")
    print(f"dataset: {total:,} frames, {ids} ids, {buses} buses, "
          f"{duration_ns / 1e9:.0f} s of bus time, written in {time.perf_counter() - t0:.1f} s")
    return path
