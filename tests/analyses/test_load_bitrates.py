"""Bus-load families at 125 k, 250 k, 500 k and 1 M nominal (CAN FD data 2 M and 5 M): the
published per-frame figures, saturation and error frames, each with the bit time of the
rate under test (so a bit time that silently fell back to one rate would show)."""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from tests.analyses.synth import connect_tables, errors_table, frames_table
from tests.oracles import frame_oracle as fo
from tests.oracles import load_oracle as lo
from tracelab.analyses.load import bus_load

NOMINAL = [125_000, 250_000, 500_000, 1_000_000]


@pytest.mark.parametrize("bps", NOMINAL)
def test_one_8_byte_frame_every_10ms(bps: int) -> None:
    # source: Davis, Burns, Bril, Lukkien 2007, Real-Time Systems 35(3): an 11-bit frame with
    # 8 bytes is at most 135 bits (incl. the 3-bit intermission); derived: 135 bit times per
    # 10 ms = 10.8 % / 5.4 % / 2.7 % / 1.35 % at 125 k / 250 k / 500 k / 1 M
    bit_ns = 10**9 // bps
    expected = {125_000: 0.108, 250_000: 0.054, 500_000: 0.027, 1_000_000: 0.0135}[bps]
    exact = fo.build(0x123, False, False, False, False, False, 8, bytes(8)).bits  # 125 bits
    t = np.arange(200) * 10_000_000
    # bus W carries worst-case frames, bus X the exact frame of id 0x123 with zero bytes
    con = connect_tables([frames_table(t, 0x123, bus="W", duration_ns=135 * bit_ns, bits=135),
                          frames_table(t, 0x123, bus="X", duration_ns=exact * bit_ns,
                                       bits=exact)])
    summary = {r["bus"]: r for r in bus_load(con, window_ns=100_000_000).summary.to_dicts()}
    for bus, want in (("W", expected), ("X", expected * exact / 135)):
        assert summary[bus]["mean"] == pytest.approx(want, rel=1e-12)
        assert summary[bus]["max"] == pytest.approx(want, rel=1e-12)


@pytest.mark.parametrize("bps", NOMINAL)
def test_back_to_back_frames_fill_every_full_window(bps: int) -> None:
    # common practice, no source: a bus without idle bits is 100 % loaded
    bit_ns = 10**9 // bps
    d = 125 * bit_ns
    start = np.arange(2000) * d
    con = connect_tables(frames_table(start, 0x10, duration_ns=d, bits=125))
    w = bus_load(con, window_ns=10_000_000).windows
    full = w.filter(w["t_ns"] + 10_000_000 <= int(start[-1] + d))
    assert full["load_ratio"].to_list() == [1.0] * full.height
    assert int(w["busy_ns"].sum()) == 2000 * d


@pytest.mark.parametrize("bps", NOMINAL)
def test_error_frame_uses_this_bus_bit_time(bps: int) -> None:
    # derived (docs/analyses.md estimate): bits before t_ns by field + 17 after, in this
    # bus's bit times; one error per 100 ms window, every field, base and extended
    bit_ns = 10**9 // bps
    fields = ["sof", "arbitration", "control", "data", "crc", "ack", "eof", "interframe"]
    t = np.arange(100) * 10_000_000
    errors = []
    for k, field in enumerate(fields):
        errors.append(errors_table([k * 100_000_000 + 55_000_000], field, ext=k % 2 == 1))
    con = connect_tables(frames_table(t, 0x123, duration_ns=125 * bit_ns, bits=125),
                         errors=pl.concat(errors))
    windows = bus_load(con, window_ns=100_000_000).windows
    assert windows["error_frames"].to_list() == [1] * len(fields) + [0] * 2
    for k, field in enumerate(fields):
        extra = (lo.bits_before(field, k % 2 == 1) + lo.AFTER_BITS) * bit_ns
        assert windows["busy_ns"][k] == 10 * 125 * bit_ns + extra, field


@pytest.mark.parametrize("nominal,data", [(500_000, 2_000_000), (500_000, 5_000_000),
                                          (1_000_000, 5_000_000), (250_000, 2_000_000)])
def test_fd_64_byte_frames_at_the_data_rate(nominal: int, data: int) -> None:
    # 64-byte CAN FD frames with BRS every 1 ms; each frame's duration from the independent
    # frame oracle at (nominal, data); load = sum of durations / window (derived)
    rng = np.random.default_rng(data + nominal)
    payloads = [rng.integers(0, 256, 64, dtype=np.uint8).tobytes() for _ in range(100)]
    durs = np.array([fo.build(0x0C5, False, False, True, True, False, 15, p).duration_ns(
        nominal, data) for p in payloads])
    t = np.arange(100) * 1_000_000
    con = connect_tables(frames_table(t, 0x0C5, duration_ns=durs, bits=700))
    w = bus_load(con, window_ns=10_000_000).windows
    want = durs.reshape(10, 10).sum(axis=1)
    assert w["busy_ns"].to_list() == want.tolist()
    # derived: at least 29 nominal bits (SOF..BRS 17, ACK..intermission 12) and 550 data
    # bits (ESI 1, DLC 4, data 512, stuff count + CRC-21 + fixed stuff 32, + 1) per frame
    assert durs.min() >= 29 * 10**9 // nominal + 550 * 10**9 // data
