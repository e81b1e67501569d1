"""timing() per batch of streams gives exactly what one whole-table pass gives."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal

from tests.analyses.synth import connect_tables, frames_table, losses_table
from tracelab.analyses.timing import _batches, timing
from tracelab.network.catalog import load_catalog

CATALOG = """
[bus.P]
nominal = 500000
[bus.C]
nominal = 500000
[node.vcu]
buses = ["P", "C"]
[[message]]
bus = "P"
id = "101"
dlc = 8
sender = "vcu"
period = "10ms"
[[message]]
bus = "C"
id = "204"
dlc = 8
sender = "vcu"
period = "20ms"
"""


def _streams(seed: int = 5) -> list[pl.DataFrame]:
    """Two runs x two buses of periodic streams with jitter, dropped frames (gaps), a burst
    and a drifting clock, plus one event-driven stream."""
    rng = np.random.default_rng(seed)
    out = []
    for run in ("r1", "r2"):
        for bus, ids in (("P", (0x101, 0x102, 0x103)), ("C", (0x204, 0x205))):
            for k, frame_id in enumerate(ids):
                period = (10_000_000, 20_000_000, 50_000_000)[k % 3] * (2 if bus == "C" else 1)
                n = 20_000 // (k + 1)
                drift = 1 + 40e-6 * k  # 0, 40, 80 ppm slow
                t = (rng.integers(0, period) + np.arange(n) * period * drift
                     + rng.normal(0, 30_000, n)).astype(np.int64)
                keep = rng.random(n) > 0.002  # gaps
                t = t[keep]
                t = np.sort(np.append(t, t[100] + period // 10))  # a burst
                out.append(frames_table(t, frame_id, bus=bus, run=run))
        event_t = np.sort(rng.integers(0, 100 * 10**9, 300))
        out.append(frames_table(event_t, 0x3A0, bus="P", run=run))
    return out


@pytest.mark.parametrize("with_catalog", [False, True])
def test_batched_equals_whole_table(with_catalog: bool, tmp_path: Path) -> None:
    lost_from, lost_to = 30 * 10**9, 30 * 10**9 + 200_000_000  # the logger lost r1/P then
    frames = pl.concat(_streams()).filter(
        ~((pl.col("run") == "r1") & (pl.col("bus") == "P")
          & pl.col("t_ns").is_between(lost_from, lost_to, closed="left")))
    losses = losses_table([(lost_from, lost_to)], bus="P", run="r1")
    catalog = None
    if with_catalog:
        (tmp_path / "net.toml").write_text(CATALOG, encoding="utf-8")
        catalog = load_catalog(tmp_path / "net.toml")
    results = []
    for batch_frames in (None, 12_000):  # one pass / batches of <= 12k frames (9 batches)
        con = connect_tables(frames, losses=losses)
        # one thread: DuckDB's parallel float sums (stddev, regr_slope) may round differently
        # from one run to the next, batched or not; with one thread every run is exact
        con.execute("SET threads = 1")
        con.execute("SET temp_directory = $d", {"d": str(tmp_path / "spill")})
        results.append(timing(con, catalog, batch_frames=batch_frames))
        con.close()
    whole, batched = results
    counts = (frames.group_by("run", "bus", "id", "ext").len().rename({"len": "frames"})
              .with_row_index("g").select(pl.col("g").cast(pl.UInt64), "frames"))
    assert len(_batches(counts, 12_000)) >= 9  # the batched pass really had many batches
    assert whole.timing.height == 12  # 2 runs x (5 periodic + 1 event-driven)
    assert whole.gaps.height > 50 and whole.gaps["in_loss"].any()
    assert_frame_equal(whole.timing, batched.timing, check_exact=True)
    assert_frame_equal(whole.gaps, batched.gaps, check_exact=True)
    assert_frame_equal(whole.node_drift, batched.node_drift, check_exact=True)
    assert_frame_equal(whole.unseen, batched.unseen, check_exact=True)
    assert_frame_equal(whole.unknown, batched.unknown, check_exact=True)
    assert not any((tmp_path / "spill").glob("timing-*"))  # the batch files are removed


def test_batches_hold_whole_streams_within_the_budget() -> None:
    streams = pl.DataFrame({"g": [1, 2, 3, 4, 5], "frames": [40, 30, 50, 200, 10]},
                           schema={"g": pl.UInt64, "frames": pl.Int64})
    assert _batches(streams, 1000) == [[1, 2, 3, 4, 5]]
    # greedy in order; a stream larger than a batch is a batch of its own
    assert _batches(streams, 100) == [[1, 2], [3], [4], [5]]
