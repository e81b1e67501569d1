"""Ingest benchmark: a deterministic log of N lines, a bare polars baseline, then tracelab.

    .venv/bin/python bench/ingest.py --lines 20000000

(a) baseline: polars scan_csv(...).sink_parquet(...) of the same file with hex decoding of id
and data; (b) ``tracelab ingest``. Each runs in its own subprocess so its peak RSS
(ru_maxrss from wait4) is its own. Prints lines/s, MB/s, peak RSS and the ratio (b)/(a).
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

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
    parser.add_argument("--generate-only", type=Path, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.generate_only is not None:
        generate(args.generate_only, args.lines)
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
    if args.workdir is None:
        shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
