"""Simulator speed: simulated frames per second of wall time on one core.

Generates its own scenario (one 500 kbit/s bus near 50 % load, 40 periodic messages, no
faults), runs the event loop and compares with a baseline measured in the same run: a bare
numpy generation of the same number of release instants (what any simulator must at least
do). Target (issue 3): >= 150 k frames/s.

    .venv/bin/python bench/simulate.py [--seconds 60]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from tracelab.simulate import load_scenario
from tracelab.simulate.engine import BusEngine
from tracelab.simulate.schedule import build_schedule
from tracelab.simulate.simulator import simulate

TARGET_FRAMES_PER_S = 150_000


def scenario_text(seconds: float, messages: int = 40, load: float = 0.5) -> str:
    """Periods chosen so that sum(C_i / T_i) is about `load` for 8-byte frames (~250 us)."""
    lines = [f'[run]\nname = "bench"\nduration = "{seconds}s"\nseed = 1\n',
             "[bus.P]\nnominal = 500000\n"]
    nodes = [f"n{i}" for i in range(6)]
    lines += [f'[node.{n}]\nbuses = ["P"]\n' for n in nodes]
    per_message = load / messages
    for i in range(messages):
        period_us = int(250 / per_message * (0.5 + i / messages))
        lines.append(f'[[message]]\nbus = "P"\nid = "{0x100 + 8 * i:03X}"\ndlc = 8\n'
                     f'sender = "{nodes[i % len(nodes)]}"\nperiod = "{period_us}us"\n'
                     'payload = "random"\n')
    return "\n".join(lines)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0, help="simulated seconds")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "bench.toml"
        path.write_text(scenario_text(args.seconds), encoding="utf-8")
        sc = load_scenario(path)
        duration = sc.run.duration_ns

        t0 = time.perf_counter()
        schedule = build_schedule(sc, "P", duration, np.random.default_rng(1))
        t1 = time.perf_counter()
        result = BusEngine(sc, schedule, duration, np.random.default_rng(2)).run()
        t2 = time.perf_counter()
        frames = len(result.release)

        # Baseline: bare numpy release instants for the same number of frames.
        b0 = time.perf_counter()
        rng = np.random.default_rng(3)
        periods = rng.integers(1_000_000, 100_000_000, 40)
        reps = frames // 40 + 1
        instants = np.sort((periods[:, None] * np.arange(reps)[None, :]).ravel())
        b1 = time.perf_counter()
        assert len(instants) >= frames

        out = Path(tmp) / "bench.frames.zst"
        t3 = time.perf_counter()
        summary = simulate(sc, out, quiet=True)
        t4 = time.perf_counter()

    loop_rate = frames / (t2 - t1)
    total_rate = summary.frames / (t4 - t3)
    baseline_rate = frames / (b1 - b0)
    load = float((result.end_ns - result.start_ns).sum()) / duration
    print(f"simulated {args.seconds:g} s, {frames} frames, bus load {100 * load:.1f} %")
    print(f"schedule (numpy + frame_bits): {t1 - t0:.2f} s")
    print(f"event loop: {t2 - t1:.2f} s = {loop_rate / 1000:.0f} k frames/s "
          f"(target {TARGET_FRAMES_PER_S // 1000} k: ratio {loop_rate / TARGET_FRAMES_PER_S:.2f})")
    print(f"end to end incl. schedule, formatting, zstd log and truth: {t4 - t3:.2f} s = "
          f"{total_rate / 1000:.0f} k frames/s (ratio to target {total_rate / TARGET_FRAMES_PER_S:.2f})")
    print(f"baseline bare numpy schedule: {baseline_rate / 1e6:.1f} M frames/s; "
          f"end to end is {baseline_rate / total_rate:.0f}x slower than the baseline")
    return 0


if __name__ == "__main__":
    sys.exit(main())
