"""Bench: signal decoding (tracelab.analyses.signals) vs a bare numpy shift-and-mask over the
same binary payload column. Target: >= 20 M decoded values per second per core.

Both contenders start from the same Arrow binary column of 8-byte payloads (as DuckDB hands
it over). The bare baseline views the value buffer as uint64 words and shifts and masks each
signal; tracelab's decode adds the byte matrix checks, big-endian words, sign extension and
the exact-decimal scaling. "long form" adds building the signals.parquet frame (strings and
all) for the same values. Rates are per CPU second of this process (numpy runs on one core).

    .venv/bin/python bench/signals.py --frames 5000000
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench._dataset import cpu_s  # noqa: E402
from tracelab.analyses.signals import DecodedMessage, decode_message, long_form  # noqa: E402
from tracelab.network.catalog import MessageSpec, SignalSpec  # noqa: E402
from tracelab.network.payload import byte_matrix  # noqa: E402

#: Eight signals over an 8-byte payload: both orders, signed, scaled (a typical message).
SIGNALS = (
    SignalSpec("temp", 0, 12, 8, scale=0.1, offset=-40.0),
    SignalSpec("speed", 12, 16, 8, scale=0.25),
    SignalSpec("torque", 28, 12, 8, signed=True, scale=0.5),
    SignalSpec("state", 40, 4, 8),
    SignalSpec("alive", 44, 4, 8, role="counter"),
    SignalSpec("voltage", 55, 16, 8, order="big", scale=0.01),
    SignalSpec("current", 63, 8, 8, order="big", signed=True, scale=0.2),
    SignalSpec("crc", 56, 8, 8),
)


def payload_column(frames: int, seed: int = 1) -> pa.Array:
    rng = np.random.default_rng(seed)
    data = rng.integers(0, 256, frames * 8, dtype=np.uint8)
    offsets = (np.arange(frames + 1, dtype=np.int32) * 8)
    return pa.Array.from_buffers(pa.binary(), frames, [None, pa.py_buffer(offsets.tobytes()),
                                                       pa.py_buffer(data.tobytes())])


def bare(column: pa.Array) -> list[np.ndarray]:
    """The baseline: uint64 words of the value buffer, one shift and mask per signal."""
    words = np.frombuffer(column.buffers()[2], dtype="<u8")
    return [(words >> np.uint64(s.shift)) & np.uint64(s.mask) for s in SIGNALS]


def decode(column: pa.Array, table: pa.Table, msg: MessageSpec) -> list[np.ndarray]:
    rows = byte_matrix(column, 8)
    return [v for _, _, _, v in decode_message(DecodedMessage(msg, table, rows), list(SIGNALS))]


def best(repeat: int, job):  # type: ignore[no-untyped-def]
    wall = cpu = float("inf")
    result = None
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), cpu_s()
        result = job()
        wall, cpu = min(wall, time.perf_counter() - t0), min(cpu, cpu_s() - c0)
    return wall, cpu, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--frames", type=int, default=2_000_000)
    parser.add_argument("--repeat", type=int, default=3, help="best of N runs of each")
    args = parser.parse_args()
    column = payload_column(args.frames)
    msg = MessageSpec("P", 0x310, False, False, False, False, 8, "tms", 10_000_000,
                      "bench", "s", SIGNALS)
    table = pa.table({"run": pa.array(["r"] * args.frames), "bus": pa.array(["P"] * args.frames),
                      "t_ns": pa.array(np.arange(args.frames, dtype=np.int64) * 10_000),
                      "file": pa.array(["bench.frames"] * args.frames),
                      "line": pa.array(np.arange(args.frames, dtype=np.int64))})
    values = args.frames * len(SIGNALS)
    bare_s, bare_cpu, raw = best(args.repeat, lambda: bare(column))
    dec_s, dec_cpu, out = best(args.repeat, lambda: decode(column, table, msg))
    # the same raw values (the scaled ones are checked by the tests)
    for spec, r, v in zip(SIGNALS, raw, out, strict=True):
        if spec.order == "little" and spec.scale == 1.0 and not spec.signed:
            assert np.array_equal(r.astype(np.float64), v)
    rows = byte_matrix(column, 8)
    long_s, long_cpu, frame = best(1, lambda: long_form(
        [DecodedMessage(msg, table, rows)], [(msg, list(SIGNALS))]))
    assert frame.height == values
    load = os.getloadavg()[0]
    print(f"{args.frames:,} frames x {len(SIGNALS)} signals = {values:,} values "
          f"(load average {load:.1f})")
    print(f"bare numpy shift-and-mask: {bare_s:.3f} s ({values / bare_cpu / 1e6:.0f} M values "
          f"per CPU s)")
    print(f"tracelab decode:           {dec_s:.3f} s ({values / dec_cpu / 1e6:.0f} M values "
          f"per CPU s; target >= 20 M)   ratio to bare {dec_cpu / bare_cpu:.2f} "
          f"(wall {dec_s / bare_s:.2f})")
    print(f"decode + long form frame:  {long_s:.3f} s ({values / long_cpu / 1e6:.1f} M values "
          "per CPU s)")


if __name__ == "__main__":
    main()
