"""Ingest benchmark: a deterministic log of N lines, a bare polars baseline, then tracelab.

    .venv/bin/python bench/ingest.py --lines 20000000

(a) baseline: polars scan_csv(...).sink_parquet(...) of the same file with hex decoding of id
and data; (b) ``tracelab ingest``. Each runs in its own subprocess so its peak RSS
(ru_maxrss from wait4) is its own. Prints lines/s, MB/s, peak RSS, the throughput and CPU-time
ratios (a)/(b), then a per-step CPU profile of the ingest: a few chunks of the same log taken
through the ingest's steps one at a time on one thread (a third subprocess).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

HEADER = ("%tracelab-frames 1\n%origin 2026-11-30T21:04:05Z\n"
          "%bus A nominal=500000 name=body\n%bus B nominal=500000 data=2000000 name=chassis\n"
          "%meta run=bench vehicle=test-rig-01\n")
HEADER_LINES = HEADER.count("\n")
N_IDS = 60
ERROR_EVERY = 1000  # 0.1 % error records
BATCH = 1_000_000
HEX = np.frombuffer(b"0123456789ABCDEF", dtype=np.uint8)

BASELINE = """
import sys, polars as pl
src, out, skip = sys.argv[1], sys.argv[2], int(sys.argv[3])
cols = [f"f{i}" for i in range(8)]
(pl.scan_csv(src, separator="\\t", has_header=False, skip_rows=skip, quote_char=None,
             schema={c: pl.String for c in cols}, truncate_ragged_lines=True,
             missing_columns="insert")
   .select(t_ns=pl.col("f0").str.to_integer(strict=False), bus="f1", kind="f2",
           id=pl.col("f3").str.to_integer(base=16, strict=False).cast(pl.UInt32), form="f4",
           dlc=pl.col("f5").str.to_integer(strict=False).cast(pl.UInt8),
           data=pl.col("f6").str.decode("hex", strict=False))
   .sink_parquet(out, compression="zstd"))
"""


def generate(path: Path, n_lines: int, seed: int = 7) -> None:
    """Mostly 8-byte classic frames over 60 ids on two buses, every 1000th record an error."""
    rng = np.random.default_rng(seed)
    ids = 0x100 + 7 * np.arange(N_IDS)
    with open(path, "wb") as out:
        out.write(HEADER.encode())
        n_records = n_lines - HEADER_LINES
        for start in range(0, n_records, BATCH):
            n = min(BATCH, n_records - start)
            k = np.arange(start, start + n)
            which = rng.integers(0, N_IDS, n)
            payload = rng.integers(0, 2**63, n, dtype=np.int64)
            payload = rng.integers(0, 256, (n, 8), dtype=np.uint8)
            chars = np.empty((n, 16), dtype=np.uint8)
            chars[:, 0::2], chars[:, 1::2] = HEX[payload >> 4], HEX[payload & 15]
            data_hex = pl.Series(chars.view("S16").ravel()).cast(pl.String)
            t_ns = pl.Series(k * 25_000).cast(pl.String)
            id_hex = pl.Series([f"{v:03X}" for v in ids])[which]  # 60 ids, gathered
            bus = pl.Series(np.where(ids[which] % 2 == 0, "A", "B"))
            frame = pl.DataFrame({"t": t_ns, "bus": bus, "id": id_hex, "data": data_hex,
                                  "error": k % ERROR_EVERY == ERROR_EVERY - 1}).select(
                pl.when("error")
                .then(pl.concat_str("t", pl.lit("\tA\terror\tstuff\tdata\t-\t-\t-")))
                .otherwise(pl.concat_str("t", pl.lit("\t"), "bus", pl.lit("\tframe\t"), "id",
                                         pl.lit("\ts\t8\t"), "data"))
            )
            frame.write_csv(out, include_header=False, quote_style="never")


def profile(log: Path, chunks: int, repeat: int = 3) -> None:
    """CPU per step and chunk (process CPU time, best of ``repeat`` per chunk, polars on one
    thread), as the ingest's worker runs them; printed as ms per chunk and share."""
    import resource

    from tracelab.format.fast import _FAST_SCHEMA
    from tracelab.format.reader import LogReader
    from tracelab.physics.bitlength import frame_bits
    from tracelab.store import ingest

    def cpu() -> float:
        usage = resource.getrusage(resource.RUSAGE_SELF)
        return usage.ru_utime + usage.ru_stime

    steps: dict[str, float] = {}

    def step(name: str, fn: Callable[..., Any], *args: Any, times: int = repeat) -> Any:
        best = float("inf")
        for _ in range(times):
            t0 = cpu()
            out = fn(*args)
            best = min(best, cpu() - t0)
        steps[name] = steps.get(name, 0.0) + best
        return out

    def read_csv(body: bytes) -> pl.DataFrame:
        return pl.read_csv(body, separator="\t", has_header=False, quote_char=None,
                           schema=_FAST_SCHEMA, truncate_ragged_lines=True,
                           missing_columns="insert")

    def write_others(chunk: Any, index: int) -> None:
        for table in ("errors", "status", "marks", "losses", "rejects"):
            if getattr(chunk, table).height:
                parts.write(table, getattr(chunk, table), index)

    work = Path(tempfile.mkdtemp(prefix="tracelab-profile-"))
    with LogReader(log) as reader:
        (work / "part").mkdir()
        parts = ingest._PartWriter(work / "part", "bench", str(log))
        blocks = reader.blocks()
        lines = 0
        for index in range(chunks):
            block = step("main thread: read a block, cut at the last LF, count LFs",
                         next, blocks, times=1)
            lines += block.newlines or 0
            chunk = step("parse: CSV read, typing and checks", reader.parse, block)
            step("  of which the CSV read (polars, as the baseline)", read_csv, block.body)
            frames = step("physics: bits and data_bits", ingest._with_physics, chunk.frames)
            step("  of which frame_bits", frame_bits, chunk.frames)
            step("write the frames part (pyarrow, zstd 1)", parts.write, "frames", frames, index)
            step("write the other tables", write_others, chunk, index)
    shutil.rmtree(work, ignore_errors=True)
    total = sum(v for k, v in steps.items() if not k.startswith("  "))
    print(f"per-step CPU, {chunks} chunks of ~{lines // chunks:,} lines (one thread, best of "
          f"{repeat} each):")
    for name, secs in steps.items():
        print(f"  {name:58s} {secs / chunks * 1e3:6.1f} ms/chunk  {secs / total:4.0%}")
    print(f"  {'sum of the steps':58s} {total / chunks * 1e3:6.1f} ms/chunk")


def timed(cmd: list[str]) -> tuple[float, float, int, int]:
    """(wall seconds, CPU seconds, peak RSS bytes, exit code) of a child process."""
    start = time.perf_counter()
    proc = subprocess.Popen(cmd)
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    cpu_s = usage.ru_utime + usage.ru_stime
    return time.perf_counter() - start, cpu_s, usage.ru_maxrss * 1024, proc.returncode


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=2_000_000)
    parser.add_argument("--repeat", type=int, default=1,
                        help="run both N times, alternating, and keep each one's best wall time "
                             "(a shared machine's load then hurts both alike)")
    parser.add_argument("--workdir", type=Path, default=None,
                        help="keep the generated log here (reused when present)")
    parser.add_argument("--profile-chunks", type=int, default=4,
                        help="chunks the per-step profile takes (0: no profile)")
    parser.add_argument("--generate-only", type=Path, default=None, help=argparse.SUPPRESS)
    parser.add_argument("--profile-only", type=Path, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.generate_only is not None:
        generate(args.generate_only, args.lines)
        return 0
    if args.profile_only is not None:
        profile(args.profile_only, args.profile_chunks)
        return 0
    work = args.workdir or Path(tempfile.mkdtemp(prefix="tracelab-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    log = work / f"bench-{args.lines}.frames"
    if not log.exists():
        t0 = time.perf_counter()
        # in a child: a forked child starts with its parent's RSS, which would then show
        # in the measured runs' ru_maxrss if the generator's memory lived in this process
        subprocess.run([sys.executable, __file__, "--generate-only", str(log), "--lines",
                        str(args.lines)], check=True)
        print(f"generated {log} ({log.stat().st_size / 1e6:.0f} MB) in "
              f"{time.perf_counter() - t0:.1f} s")
    size = log.stat().st_size
    lines = args.lines
    best: dict[str, tuple[float, float, int]] = {}
    for _ in range(args.repeat):
        shutil.rmtree(work / "dataset", ignore_errors=True)
        (work / "baseline.parquet").unlink(missing_ok=True)
        runs = {
            "base": [sys.executable, "-c", BASELINE, str(log), str(work / "baseline.parquet"),
                     str(HEADER_LINES)],
            "ingest": [sys.executable, "-m", "tracelab.cli", "ingest", str(log), "-o",
                       str(work / "dataset"), "--quiet"],
        }
        for name, cmd in runs.items():
            wall_s, cpu_s, rss, rc = timed(cmd)
            if rc:
                return rc
            if name not in best or wall_s < best[name][0]:
                best[name] = (wall_s, cpu_s, rss)
    base_s, base_cpu, base_rss = best["base"]
    ingest_s, ingest_cpu, ingest_rss = best["ingest"]
    print(f"{lines:,} lines, {size / 1e6:.0f} MB, {os.cpu_count()} cores, "
          f"load average {os.getloadavg()[0]:.1f}")
    for name, secs, cpu, rss in (
            ("baseline polars scan_csv+sink_parquet", base_s, base_cpu, base_rss),
            ("tracelab ingest", ingest_s, ingest_cpu, ingest_rss)):
        print(f"{name:38s} {secs:6.2f} s  {lines / secs / 1e6:5.2f} M lines/s  "
              f"{size / secs / 1e6:6.1f} MB/s  CPU {cpu:6.2f} s  peak RSS {rss / 2**20:5.0f} MiB")
    print(f"ratio ingest/baseline throughput: {base_s / ingest_s:.2f} (target >= 0.7); "
          f"CPU-time ratio {base_cpu / ingest_cpu:.2f}; "
          f"ingest peak RSS {'ok' if ingest_rss <= 2**30 else 'OVER'} (target <= 1 GiB)")
    if args.profile_chunks:
        subprocess.run([sys.executable, __file__, "--profile-only", str(log), "--profile-chunks",
                        str(args.profile_chunks)], check=True,
                       env={**os.environ, "POLARS_MAX_THREADS": "1"})
        print(f"load average after the profile {os.getloadavg()[0]:.1f}")
    if args.workdir is None:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
