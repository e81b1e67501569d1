"""Bus load: published load figures, back-to-back saturation, overlap apportioning against a
numpy reference, summary statistics against numpy.percentile."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from tests.analyses.synth import connect_tables, errors_table, frames_table
from tests.oracles import frame_oracle as fo
from tracelab.analyses.load import WINDOW_COLUMNS, bus_load
from tracelab.errors import UsageError
from tracelab.physics import bitlength

BIT_NS_500K = 2_000  # 500 kbit/s


def _frame_bits_of(frame_id: int, data: bytes) -> int:
    frame = pl.DataFrame({"id": [frame_id], "ext": [False], "rtr": [False], "fd": [False],
                          "brs": [False], "esi": [False], "dlc": [len(data)], "data": [data]},
                         schema={"id": pl.UInt32, "ext": pl.Boolean, "rtr": pl.Boolean,
                                 "fd": pl.Boolean, "brs": pl.Boolean, "esi": pl.Boolean,
                                 "dlc": pl.UInt8, "data": pl.Binary})
    return int(bitlength.frame_bits(frame)["bits"].item())


def test_one_frame_every_10ms_at_500k_published_figures() -> None:
    # source: Davis, Burns, Bril, Lukkien 2007, Real-Time Systems 35(3): worst-case length of
    # an 11-bit frame with 8 data bytes incl. 3-bit intermission = 8n + 47 + floor((34 + 8n - 1)
    # / 4) = 135 bits -> 135 x 2 us / 10 ms = 2.70 %
    worst_bits = 8 * 8 + 47 + (34 + 8 * 8 - 1) // 4
    assert worst_bits == 135
    # id 0x123 with eight 0x00 bytes: 125 bits incl. stuff bits and intermission -> 2.50 %
    # (checked bit for bit by the independent oracle in tests/oracles/frame_oracle.py)
    exact_bits = _frame_bits_of(0x123, bytes(8))
    assert exact_bits == 125 == fo.build(0x123, False, False, False, False, False, 8,
                                         bytes(8)).bits
    t = np.arange(1000) * 10_000_000  # 10 s
    for bits, expected in ((exact_bits, 0.0250), (worst_bits, 0.0270)):
        con = connect_tables(frames_table(t, 0x123, duration_ns=bits * BIT_NS_500K, bits=bits))
        result = bus_load(con, window_ns=100_000_000)
        assert result.summary["mean"].item() == pytest.approx(expected, abs=1e-12)
        assert result.windows["load_ratio"].max() == pytest.approx(expected, abs=1e-12)
        assert result.summary["frames_per_s"].item() == pytest.approx(100, rel=1e-3)
    # source: docs/analyses.md, "Bus load": --window defaults to 100 ms
    con = connect_tables(frames_table(t, 0x123, duration_ns=exact_bits * BIT_NS_500K,
                                      bits=exact_bits))
    default = bus_load(con)
    assert default.windows["window_ns"].unique().to_list() == [100_000_000]
    assert default.windows["t_ns"].to_list() == [k * 100_000_000 for k in range(100)]
    # the readable table gives the loads in percent: 2.5 % (derived: 125 bits x 2 us / 10 ms)
    head, _, row = default.describe().splitlines()[1:4]
    cells = dict(zip([c.strip() for c in head.split("|")], [c.strip() for c in row.split("|")],
                     strict=True))
    assert (cells["window_ms"], cells["mean_%"], cells["max_%"]) == ("100.0", "2.5", "2.5")
    rng = np.random.default_rng(0)  # no 8-byte payload exceeds the published worst case
    payloads = [bytes(rng.integers(0, 256, 8, dtype=np.uint8)) for _ in range(200)]
    assert max(_frame_bits_of(0x123, p) for p in payloads + [b"\x00" * 8, b"\xff" * 8]) <= 135


@pytest.mark.parametrize("window_ns", [1_000_000, 10_000_000, 100_000_000])
def test_back_to_back_frames_are_100_percent_never_more(window_ns: int) -> None:
    # common practice, no source: a bus busy without idle bits is 100 % loaded
    rng = np.random.default_rng(window_ns)
    dur = rng.integers(94_000, 2_500_000, 4000)  # some longer than the 1 ms window
    start = np.concatenate([[0], np.cumsum(dur)[:-1]])
    con = connect_tables(frames_table(start, 0x10, duration_ns=dur))
    windows = bus_load(con, window_ns=window_ns).windows
    full = windows.filter(pl.col("t_ns") + window_ns <= int(start[-1] + dur[-1]))
    assert full["load_ratio"].min() == pytest.approx(1.0, abs=1e-12)
    assert windows["load_ratio"].max() <= 1.0
    assert windows["busy_ns"].sum() == int(dur.sum())  # nothing lost across window edges


def _reference_busy(s: np.ndarray, e: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Busy time in [edges[i], edges[i+1]) by brute-force overlap (numpy broadcasting)."""
    lo = np.maximum(s[:, None], edges[None, :-1])
    hi = np.minimum(e[:, None], edges[None, 1:])
    return np.clip(hi - lo, 0, None).sum(axis=0)


def test_overlap_apportioning_matches_brute_force() -> None:
    rng = np.random.default_rng(5)
    s = np.sort(rng.integers(0, 200_000_000, 1500))
    dur = rng.integers(50_000, 3_000_000, 1500)
    con = connect_tables(frames_table(s, 0x20, duration_ns=dur))
    w = 1_000_000
    result = bus_load(con, window_ns=w)
    windows = result.windows
    assert windows.columns == list(WINDOW_COLUMNS)
    # window edges from the spans themselves (floor), not read from the output
    edges = np.arange(s.min() // w * w, ((s + dur).max() - 1) // w * w + 2 * w, w)
    assert windows["t_ns"].to_list() == edges[:-1].tolist()
    expected = _reference_busy(s, s + dur, edges)
    assert windows["busy_ns"].to_list() == expected.tolist()
    # source: numpy.percentile (linear) / numpy.mean over the window ratios
    ratio = expected / w
    summary = result.summary.row(0, named=True)
    for key, q in (("p50", 50), ("p95", 95), ("p99", 99)):
        assert summary[key] == pytest.approx(np.percentile(ratio, q), rel=1e-12)
    assert summary["mean"] == pytest.approx(ratio.mean(), rel=1e-12)
    assert summary["max_t_ns"] == int(edges[np.argmax(ratio)])
    assert summary["frames"] == 1500


def test_error_frame_estimate() -> None:
    # source: ISO 11898-1:2015 frame format (clause numbers from memory): SOF 1, identifier 11,
    # RTR 1, IDE 1, r0 1, DLC 4, data 64, CRC 15, CRC delimiter 1, ACK slot 1, ACK delimiter 1;
    # then error flag 6, error delimiter 8, intermission 3
    up_to_ack = 1 + 11 + 1 + 1 + 1 + 4 + 64 + 15 + 1 + 1 + 1
    after = 6 + 8 + 3
    t = np.arange(10) * 10_000_000
    con = connect_tables(frames_table(t, 0x123, duration_ns=125 * BIT_NS_500K, bits=125),
                         errors=errors_table([55_000_000], "ack"))
    result = bus_load(con, window_ns=100_000_000)
    row = result.windows.row(0, named=True)
    assert row["error_frames"] == 1
    assert row["busy_ns"] == 10 * 125 * BIT_NS_500K + (up_to_ack + after) * BIT_NS_500K


def test_top_ids_share_and_window_limits() -> None:
    t = np.arange(100) * 10_000_000
    con = connect_tables([frames_table(t, 0x1, duration_ns=300_000),
                          frames_table(t + 1_000_000, 0x2, duration_ns=100_000)])
    top = bus_load(con).top_ids
    assert top["id"].to_list() == [1, 2]
    assert top["share"].to_list() == pytest.approx([0.75, 0.25])
    for bad in (999_999, 3_600_000_000_001):
        with pytest.raises(UsageError):
            bus_load(con, window_ns=bad)
