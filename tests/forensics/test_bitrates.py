"""The forensic replay at several bit rates: a bit-rate lookup that fell back to a default
would move every time the replay derives from bit times (bus-off recovery, error-frame ends).

Scenarios and the expected counters come from tests/oracles/test_counter_boundaries.py (the
independent per-event reference); here the same bus runs at 125 k .. 1 M nominal and with
CAN FD frames switching to 2 M and 5 M.
"""

from __future__ import annotations

from typing import Any

import pytest

import tests.oracles.test_counter_boundaries as cb
from tests.oracles import frame_oracle as fo
from tests.oracles.counters_reference import replay_events, transitions
from tracelab.physics.confinement import RECOVERY_SEQUENCE_BITS, RECOVERY_SEQUENCES

NOMINAL = [125_000, 250_000, 500_000, 1_000_000]


def _bus_off_then_idle(bit_ns: int) -> tuple[list[Any], list[dict[str, Any]],
                                             list[dict[str, Any]]]:
    slots = cb.SCENARIOS["tec256_bus_off"][0]
    events, frames, errors = cb._events(slots, bit_ns)
    # 20 ms of idle bus after the bus-off, then alpha's frames every 1 ms
    t0 = max([f["end_ns"] for f in frames] + [e["t_ns"] for e in errors]) + 20_000_000
    for k in range(30):
        s = t0 + k * 1_000_000
        e = s + cb.FRAME_BITS * bit_ns
        frames.append(dict(frames[0], t_ns=e - 3 * bit_ns, start_ns=s, end_ns=e,
                           line=1000 + k, id=cb.IDS["alpha"]))
    return events, frames, errors


def _recovery_bits(bps: int) -> float:
    from tracelab.forensics import replay_faults

    bit_ns = 10**9 // bps
    _, frames, errors = _bus_off_then_idle(bit_ns)
    result = replay_faults(cb._connect(frames, errors), cb._catalog(bps))
    (charlie,) = [n for n in result.as_json()["results"][0]["nodes"] if n["node"] == "charlie"]
    (off,) = charlie["bus_off"]
    assert off["from_ns"] == errors[-1]["t_ns"]  # bus-off at the 32nd error (TEC 256)
    return (off["to_ns"] - off["from_ns"]) / bit_ns


def test_bus_off_recovery_scales_with_the_bit_time() -> None:
    # from memory (rule l): at least 128 x 11 recessive bit times; the replay adds the
    # errored frame's tail by its own convention, which must not depend on the rate
    bits = {bps: _recovery_bits(bps) for bps in NOMINAL}
    assert len(set(bits.values())) == 1, bits
    (value,) = set(bits.values())
    assert RECOVERY_SEQUENCES * RECOVERY_SEQUENCE_BITS == 1408
    assert 1408 <= value <= 1408 + 2 * cb.FRAME_BITS


@pytest.mark.parametrize("data_bps", [2_000_000, 5_000_000])
@pytest.mark.parametrize("name", ["tec128_passive", "tec256_bus_off", "rec128_passive",
                                  "rec96_warning"])
def test_fd_frames_at_data_rates(name: str, data_bps: int) -> None:
    from tracelab.forensics import replay_faults

    bps = 500_000
    bit_ns = 10**9 // bps
    events, frames, errors = cb._events(cb.SCENARIOS[name][0], bit_ns)
    # the good frames become CAN FD frames with BRS, 16 zero bytes; durations from the
    # independent frame oracle at the data rate (frame starts kept, so the bus idles more)
    for f in frames:
        wire = fo.build(f["id"], False, False, True, True, False, 10, bytes(16))
        f.update(fd=True, brs=True, dlc=10, data=bytes(16), bits=wire.bits,
                 duration_ns=wire.duration_ns(bps, data_bps))
        f["end_ns"] = f["start_ns"] + f["duration_ns"]
        f["t_ns"] = f["end_ns"] - 3 * bit_ns
    ref = replay_events(events, nodes=cb.NODES)
    result = replay_faults(cb._connect(frames, errors), cb._catalog(bps))
    nodes = {n["node"]: n for n in result.as_json()["results"][0]["nodes"]}
    for n in cb.NODES:
        want = transitions(cb._until_bus_off(ref[n]))
        got = nodes[n]["transitions"][:len(want)]
        assert [(tr["from"], tr["to"]) for tr in got] == [(tr["from"], tr["to"]) for tr in want]
    _, (max_tec, max_rec, _) = cb.SCENARIOS[name]
    assert (nodes["charlie"]["max_tec"], nodes["charlie"]["max_rec"]) == (max_tec, max_rec)


@pytest.mark.parametrize("bps", NOMINAL)
def test_verdict_names_the_first_degraded_node_at_every_rate(bps: int) -> None:
    from tracelab.forensics import replay_faults

    bit_ns = 10**9 // bps
    events, frames, errors = cb._events(cb.SCENARIOS["tec256_bus_off"][0], bit_ns)
    ref = replay_events(events, nodes=cb.NODES)["charlie"]
    # from the reference: the first state change (warning at TEC 96) and the bus-off
    first = transitions(ref)[0]
    off = [tr for tr in transitions(ref) if tr["to"] == "bus-off"][0]
    (bus,) = replay_faults(cb._connect(frames, errors), cb._catalog(bps)).as_json()["results"]
    fd = bus["first_degraded"]
    assert (fd["node"], fd["state"], fd["t_ns"]) == ("charlie", first["to"], first["t_ns"])
    assert (fd["worst_state"], fd["worst_t_ns"]) == ("bus-off", off["t_ns"])
    assert bus["cause"]["kind"] == "transmit-fault"


def test_an_unknown_bit_rate_is_an_assumption_and_a_warning() -> None:
    """Neither the catalog nor the log header names the rate: the replay assumes 500 kbit/s,
    lists it among the result's assumptions and `faults` warns; a bus at 250 kbit/s then
    recovers from bus-off in half its real bit times."""
    from tracelab.forensics import replay_faults
    from tracelab.network.catalog import Catalog

    bps = 250_000
    bit_ns = 10**9 // bps
    _, frames, errors = _bus_off_then_idle(bit_ns)
    known = replay_faults(cb._connect(frames, errors), cb._catalog(bps))
    cat = cb._catalog(bps)
    unknown_cat = Catalog(cat.path, {}, cat.nodes, cat.messages)  # no [bus.can0] rate
    unknown = replay_faults(cb._connect(frames, errors), unknown_cat)
    assert known.bit_rate_warning() is None
    assert not any("bit rate" in a for a in known.as_json()["results"][0]["assumptions"])
    (line,) = [a for a in unknown.as_json()["results"][0]["assumptions"] if "bit rate" in a]
    assert "can0" in line and "500 kbit/s assumed" in line
    warning = unknown.bit_rate_warning()
    assert warning is not None and "r1/can0" in warning and "500 kbit/s" in warning

    def recovery_bits(result: Any) -> float:
        (charlie,) = [n for n in result.as_json()["results"][0]["nodes"]
                      if n["node"] == "charlie"]
        (off,) = charlie["bus_off"]
        return (off["to_ns"] - off["from_ns"]) / bit_ns

    # derived: 1408 recessive bits at 2 us (500 k assumed) are 704 bit times of 4 us
    assert recovery_bits(unknown) < 0.6 * recovery_bits(known)
    assert recovery_bits(known) >= RECOVERY_SEQUENCES * RECOVERY_SEQUENCE_BITS
