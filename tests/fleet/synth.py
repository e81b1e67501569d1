"""Small hand-made fleet logs for the batch tests where the simulator is not needed."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from tracelab.format.writer import BusDecl, LogHeader, LogWriter, frame_line

CATALOG = """
[bus.P]
nominal = 500000

[node.vcu]
buses = ["P"]
[node.inv]
buses = ["P"]

[[message]]
bus = "P"
id = "0C0"
form = "s"
dlc = 8
sender = "vcu"
period = "10ms"
name = "drive_command"

[[message]]
bus = "P"
id = "1A0"
form = "s"
dlc = 8
sender = "inv"
period = "20ms"
name = "inverter_state"
"""

PERIODS_NS = {0x0C0: 10_000_000, 0x1A0: 20_000_000}


def write_run(path: Path, run: str, vehicle: str, origin: str, seconds: float = 2.0,
              drop_every: int = 0, jitter_ns: int = 0, seed: int = 0) -> Path:
    """A periodic two-message log; every ``drop_every``-th frame of 0C0 is left out."""
    rng = np.random.default_rng(seed)
    records: list[tuple[int, int]] = []
    for frame_id, period_ns in PERIODS_NS.items():
        n = int(seconds * 1e9 // period_ns)
        t_ns = np.arange(1, n + 1, dtype=np.int64) * period_ns + frame_id * 1000
        if jitter_ns:
            t_ns = t_ns + rng.integers(-jitter_ns, jitter_ns + 1, size=n)
        if drop_every and frame_id == 0x0C0:
            t_ns = np.delete(t_ns, np.arange(drop_every, n, drop_every))
        records.extend((int(t), frame_id) for t in t_ns)
    records.sort()
    path.parent.mkdir(parents=True, exist_ok=True)
    header = LogHeader(buses=[BusDecl("P", 500_000)], origin=origin,
                       meta={"run": run, "vehicle": vehicle})
    with LogWriter(path, header) as out:
        out.lines([frame_line(t, "P", i, False, False, False, False, False, 8, bytes(range(8)))
                   for t, i in records])
    return path
