"""Benchmark of the frame physics alone: frames/s of frame_bits on one core.

Generates its own frames (deterministic), then times, in the same run, the table-driven
``frame_bits`` and the bit-by-bit vectorised ``frame_bits_bitwise`` on the same input, and
prints frames/s for classic 8-byte and CAN FD 64-byte frames and the ratio between the two.

    .venv/bin/python bench/physics.py --frames 2000000
"""

from __future__ import annotations

import argparse
import os
import time

os.environ.setdefault("POLARS_MAX_THREADS", "1")  # one core, as the target is stated

import numpy as np  # noqa: E402
import polars as pl  # noqa: E402
import pyarrow as pa  # noqa: E402

from tracelab.physics.bitlength import frame_bits, frame_bits_bitwise  # noqa: E402


def make_frames(n: int, fd: bool, seed: int) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    n_bytes = 64 if fd else 8
    ext = rng.random(n) < 0.2
    ident = np.where(ext, rng.integers(0, 1 << 29, n), rng.integers(0, 1 << 11, n))
    payload = rng.integers(0, 256, (n, n_bytes), dtype=np.uint8)
    # a quarter of the payloads are stuffing-heavy (all zero / all one bytes)
    heavy = rng.random(n) < 0.25
    payload[heavy] = np.where(rng.random((int(heavy.sum()), 1)) < 0.5, 0x00, 0xFF)
    offsets = np.arange(n + 1, dtype=np.int64) * n_bytes
    arrow = pa.LargeBinaryArray.from_buffers(
        pa.large_binary(), n, [None, pa.py_buffer(offsets), pa.py_buffer(payload.tobytes())])
    data = pl.Series("data", arrow)
    return pl.DataFrame({
        "id": ident.astype(np.uint32), "ext": ext, "rtr": np.zeros(n, bool),
        "fd": np.full(n, fd), "brs": np.full(n, fd) & (rng.random(n) < 0.8),
        "esi": np.zeros(n, bool), "dlc": np.full(n, 15 if fd else 8, dtype=np.uint8),
        "data": data,
    })


def best_of(fn, frames: pl.DataFrame, repeat: int) -> float:  # type: ignore[no-untyped-def]
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn(frames)
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=1_000_000, help="classic frames (FD: 1/8)")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    for label, fd, n in (("classic 8-byte", False, args.frames),
                         ("CAN FD 64-byte", True, max(1, args.frames // 8))):
        frames = make_frames(n, fd, seed=1)
        t_table = best_of(frame_bits, frames, args.repeat)
        t_bit = best_of(frame_bits_bitwise, frames, args.repeat)
        assert frame_bits(frames).equals(frame_bits_bitwise(frames))
        print(f"{label}: {n:,} frames  table-driven {n / t_table / 1e6:.2f} M frames/s  "
              f"bit-by-bit {n / t_bit / 1e6:.2f} M frames/s  ratio {t_bit / t_table:.2f}x")


if __name__ == "__main__":
    main()
