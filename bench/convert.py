"""Convert benchmark: a deterministic CSV frame table of N rows, a bare polars baseline, then
``tracelab convert``.

    .venv/bin/python bench/convert.py --rows 2000000

(a) baseline: polars ``read_csv`` of the same table (all columns as text) and ``write_csv`` of
it to a second file, i.e. the reading and writing any converter has to do; (b) ``tracelab
convert`` of the table (checks every row, writes format v1). Each runs in its own subprocess so
its peak RSS (ru_maxrss from wait4) is its own. Prints rows/s, peak RSS and the ratio (b)/(a).
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

BATCH = 1_000_000
N_IDS = 60
HEX = np.frombuffer(b"0123456789ABCDEF", dtype=np.uint8)
EPOCH_S = 1_796_072_645  # 2026-11-30T21:04:05Z

BASELINE = """
import sys, polars as pl
src, out = sys.argv[1], sys.argv[2]
table = pl.read_csv(src, infer_schema=False)
table.write_csv(out)
"""


def _hex_rows(payload: np.ndarray) -> pl.Series:
    """(n, 8) bytes -> n upper-case hex strings, by a nibble lookup (no Python per row)."""
    chars = np.empty((payload.shape[0], 16), dtype=np.uint8)
    chars[:, 0::2] = HEX[payload >> 4]
    chars[:, 1::2] = HEX[payload & 0xF]
    return pl.Series(chars.view("S16").ravel()).cast(pl.String)


def generate(path: Path, n_rows: int, seed: int = 7) -> None:
    """Classic 8-byte frames over 60 identifiers (every 10th extended) on two channels, epoch
    seconds with microseconds, payload as plain upper-case hex."""
    rng = np.random.default_rng(seed)
    ids = np.where(np.arange(N_IDS) % 10 == 0, 0x18DA0000 + np.arange(N_IDS),
                   0x100 + 7 * np.arange(N_IDS))
    id_text = np.array([f"{i:X}" for i in ids])
    ext = (np.arange(N_IDS) % 10 == 0).astype(np.int8)
    with open(path, "wb") as out:
        out.write(b"timestamp,channel,identifier,extended,length,payload\n")
        for start in range(0, n_rows, BATCH):
            n = min(BATCH, n_rows - start)
            k = np.arange(start, start + n, dtype=np.int64)
            which = rng.integers(0, N_IDS, n)
            t_us = k * 250
            payload = rng.integers(0, 256, (n, 8), dtype=np.uint8)
            frame = pl.DataFrame({
                "timestamp": pl.Series((EPOCH_S + t_us // 1_000_000).astype(str)) + "."
                + pl.Series((t_us % 1_000_000).astype(str)).str.pad_start(6, "0"),
                "channel": np.where(k % 2 == 0, "1", "2"),
                "identifier": id_text[which],
                "extended": ext[which],
                "length": np.full(n, 8, dtype=np.int8),
                "payload": _hex_rows(payload),
            })
            frame.write_csv(out, include_header=False)


def run(argv: list[str]) -> tuple[float, float, int]:
    """(wall s, CPU s of the child, peak RSS bytes)."""
    start = time.perf_counter()
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    elapsed = time.perf_counter() - start
    stderr = proc.stderr.read().decode() if proc.stderr else ""
    if os.waitstatus_to_exitcode(status) != 0:
        sys.exit(f"failed: {' '.join(argv)}\n{stderr}")
    return elapsed, usage.ru_utime + usage.ru_stime, usage.ru_maxrss * 1024


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=2_000_000, help="table rows (default 2M)")
    parser.add_argument("--repeat", type=int, default=3, help="runs of each, best kept")
    args = parser.parse_args()
    tracelab = str(Path(sys.executable).with_name("tracelab"))
    work = Path(tempfile.mkdtemp(prefix="tracelab-bench-convert-"))
    try:
        table = work / "table.csv"
        generate(table, args.rows)
        size_mb = table.stat().st_size / 1e6
        print(f"load average before: {os.getloadavg()[0]:.1f}")
        base_s, base_cpu, base_rss = min(run([sys.executable, "-c", BASELINE, str(table),
                                    str(work / "copy.csv")]) for _ in range(args.repeat))
        conv_s, conv_cpu, conv_rss = min(run([
            tracelab, "convert", str(table), "-o", str(work / "out.frames"), "--quiet",
            "--bus", "1=A,nominal=500000", "--bus", "2=B,nominal=500000",
            "--columns", "time=timestamp,id=identifier,ext=extended,dlc=length,data=payload,"
            "bus=channel"]) for _ in range(args.repeat))
        print(f"table: {args.rows:,} rows, {size_mb:.1f} MB")
        for name, wall, cpu, rss in (("baseline polars read_csv + write_csv", base_s, base_cpu,
                                      base_rss),
                                     ("tracelab convert", conv_s, conv_cpu, conv_rss)):
            print(f"{name:37s} wall {wall:6.2f} s ({args.rows / wall / 1e6:.2f} M rows/s), "
                  f"CPU {cpu:6.2f} s ({args.rows / cpu / 1e6:.2f} M rows/CPU-s), "
                  f"peak RSS {rss / 1e6:.0f} MB")
        print(f"ratio convert / baseline: wall {conv_s / base_s:.2f}, CPU {conv_cpu / base_cpu:.2f}")
        print(f"load average after: {os.getloadavg()[0]:.1f}")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
