"""Bench: `tracelab report` on a large dataset whose analyses are already computed, against
the analyses' own run time (timing + load + faults) in the same run.
Targets: report <= 0.5 x the analyses' time, HTML <= 10 MB.

    .venv/bin/python bench/report.py --frames 20000000

The dataset is written directly as Parquet (no simulator, no ingest): periodic frames of
``--ids`` catalogued messages on two buses over ``--hours``, a burst of error frames on one
sender's frames, test-step marks, logger losses and a few missing frames.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from tracelab import workflow  # noqa: E402
from tracelab.store import schema  # noqa: E402
from tracelab.store.dataset import create_or_open  # noqa: E402

PERIODS_MS = np.array([10, 20, 50, 100, 200, 1000])
NODES = ("vcu", "bcm", "esc", "eps", "hvac", "gw")
BIT_NS = 2_000  # 500 kbit/s
RUN = "bench-report"


def catalog_toml(ids: np.ndarray, periods_ms: np.ndarray, senders: np.ndarray,
                 buses: np.ndarray) -> str:
    lines = ["[bus.B0]", "nominal = 500000", "[bus.B1]", "nominal = 500000"]
    for node in NODES:
        lines += [f"[node.{node}]", 'buses = ["B0", "B1"]']
    for ident, period, sender, bus in zip(ids, periods_ms, senders, buses, strict=True):
        lines += ["[[message]]", f'bus = "B{bus}"', f'id = "{ident:03X}"', 'form = "s"',
                  "dlc = 8", f'sender = "{NODES[sender]}"', f'period = "{period}ms"']
    return "\n".join(lines) + "\n"


def write_dataset(path: Path, frames: int, ids: int, hours: float, seed: int = 2) -> Path:
    t_start = time.perf_counter()
    rng = np.random.default_rng(seed)
    period_ms = rng.choice(PERIODS_MS, ids)
    span_ns = int(hours * 3600e9)
    # scale the periods so the run holds about ``frames`` frames over ``hours``
    scale = max(1.0, float(np.sum(span_ns / (period_ms * 1e6))) / frames)
    period_ms = np.maximum(1, np.round(period_ms * scale)).astype(np.int64)
    period_ns = period_ms * 1_000_000
    counts = span_ns // period_ns
    total = int(counts.sum())
    which = np.repeat(np.arange(ids), counts)
    k = np.arange(total) - np.repeat(np.cumsum(counts) - counts, counts)
    t = (rng.integers(0, period_ns)[which] + k * period_ns[which]
         + rng.normal(0, 20_000, total)).astype(np.int64)
    keep = ~((which == 3) & (t > span_ns * 0.3) & (t < span_ns * 0.3 + 5e9))  # a 5 s gap
    t, which = t[keep], which[keep]
    total = len(t)
    buses = np.arange(ids) % 2
    senders = np.arange(ids) % len(NODES)
    dur = np.full(total, 125 * BIT_NS, np.int64)
    frame = pl.DataFrame({
        "run": pl.Series([RUN]).extend_constant(RUN, total - 1),
        "bus": pl.Series(["B0", "B1"])[buses[which]],
        "t_ns": t, "start_ns": t - (dur - 3 * BIT_NS), "end_ns": t + 3 * BIT_NS,
        "id": (0x100 + which).astype(np.uint32), "ext": np.zeros(total, bool),
        "rtr": np.zeros(total, bool), "fd": np.zeros(total, bool), "brs": np.zeros(total, bool),
        "esi": np.zeros(total, bool), "dlc": np.full(total, 8, np.uint8),
        "data": pl.Series([bytes(8)], dtype=pl.Binary).extend_constant(bytes(8), total - 1),
        "bits": np.full(total, 125, np.uint16), "duration_ns": dur,
        "file": pl.Series([f"{RUN}.frames"]).extend_constant(f"{RUN}.frames", total - 1),
        "line": np.arange(total, dtype=np.int64) + 1,
    }).sort("t_ns")
    # error frames on the frames of id 0x101 (sender bcm, bus B1) for a while mid-run
    burst = np.sort(rng.integers(int(span_ns * 0.6), int(span_ns * 0.6 + 60e9), 400))
    errors = pl.DataFrame({
        "run": RUN, "bus": "B1", "t_ns": burst, "type": rng.choice(["bit", "stuff", "crc"], 400),
        "field": "data", "id": np.full(400, 0x101, np.uint32), "ext": False, "form": "s",
        "by": None, "file": f"{RUN}.frames", "line": np.arange(400, dtype=np.int64)})
    marks = pl.DataFrame({"run": RUN, "bus": "*",
                          "t_ns": np.arange(1, int(hours) + 1, dtype=np.int64) * 3_600_000_000_000,
                          "text": [f"hour {h}" for h in range(1, int(hours) + 1)],
                          "file": f"{RUN}.frames", "line": np.arange(int(hours), dtype=np.int64)})
    loss_t = np.array([span_ns * 0.2, span_ns * 0.7], dtype=np.int64)
    losses = pl.DataFrame({"run": RUN, "bus": "B0", "t_ns": loss_t, "count": [50, 80],
                           "until_ns": loss_t + 2_000_000_000, "file": f"{RUN}.frames",
                           "line": [1, 2]})
    tables = {"frames": frame, "errors": errors, "marks": marks, "losses": losses}
    ds = create_or_open(path)
    folder = ds.new_staging_dir()
    for table in schema.TABLES:
        (folder / table).mkdir()
        data = schema.conform(tables[table], table) if table in tables else schema.empty(table)
        data.write_parquet(folder / table / "0.parquet", compression="zstd",
                           row_group_size=1_000_000)
    sha = hashlib.sha256(f"{RUN}-{frames}-{seed}".encode()).hexdigest()
    row = {name: None for name in schema.MANIFEST}
    row.update(file=f"{RUN}.frames", sha256=sha, frames=total, errors=len(errors),
               marks=len(marks), losses=len(losses), rejects=0, backward_steps=0, run=RUN,
               first_t_ns=int(t.min()), last_t_ns=int(t.max()), origin="2026-03-01T20:00:00Z",
               buses=json.dumps([{"alias": "B0", "nominal_bps": 500_000},
                                 {"alias": "B1", "nominal_bps": 500_000}]),
               meta=json.dumps({"run": RUN, "vehicle": "bench-mule"}), vehicle="bench-mule")
    ds.commit({sha: folder}, pl.DataFrame([row], schema=schema.MANIFEST))
    (path.parent / "catalog.toml").write_text(
        catalog_toml(0x100 + np.arange(ids), period_ms, senders, buses))
    print(f"dataset: {total:,} frames, {ids} ids, {hours:g} h, written in "
          f"{time.perf_counter() - t_start:.1f} s")
    return path


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--frames", type=int, default=2_000_000)
    parser.add_argument("--ids", type=int, default=120)
    parser.add_argument("--hours", type=float, default=24.0)
    parser.add_argument("--keep", type=Path, default=None, help="write here and keep it")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        base = args.keep or Path(tmp)
        ds = write_dataset(base / "ds", args.frames, args.ids, args.hours)
        catalog = base / "catalog.toml"
        steps = {}
        for name, step in (("timing", lambda: workflow.timing(ds, catalog=catalog)),
                           ("load", lambda: workflow.load(ds)),
                           ("faults", lambda: workflow.faults(ds, catalog=catalog))):
            t0 = time.perf_counter()
            step()
            steps[name] = time.perf_counter() - t0
        analyses_s = sum(steps.values())
        t0 = time.perf_counter()
        (html,) = workflow.report(ds, base / "report.html")
        report_s = time.perf_counter() - t0
        size_mb = html.stat().st_size / 1e6
        print("analyses: " + ", ".join(f"{k} {v:.2f} s" for k, v in steps.items())
              + f" = {analyses_s:.2f} s")
        print(f"report: {report_s:.2f} s, {size_mb:.2f} MB   ratio {report_s / analyses_s:.2f} "
              f"(target <= 0.5; size target <= 10 MB)")


if __name__ == "__main__":
    main()
