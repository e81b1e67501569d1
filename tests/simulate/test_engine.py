"""Bus-level facts the event loop must reproduce: arbitration, utilisation, fault confinement."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tracelab.physics.bitlength import frame_bits_reference
from tracelab.simulate import load_scenario
from tracelab.simulate.engine import BusResult, NodeTruth
from tracelab.simulate.schedule import arbitration_key
from tracelab.simulate.simulator import run_buses

BIT_NS = 2_000  # 500 kbit/s


def scenario(tmp_path: Path, body: str, duration: str = "1s", nodes: str = "a b",
             extra_run: str = "", data_bps: int | None = None) -> Any:
    head = [f'[run]\nname = "t"\nduration = "{duration}"\nseed = 11\n{extra_run}\n',
            "[bus.P]\nnominal = 500000\n" + (f"data = {data_bps}\n" if data_bps else "")]
    head += [f'[node.{n}]\nbuses = ["P"]\n' for n in nodes.split()]
    path = tmp_path / "t.toml"
    path.write_text("\n".join(head) + "\n" + body, encoding="utf-8")
    return load_scenario(path)


def message(ident: str, sender: str, period: str, form: str = "s", dlc: int = 8,
            extra: str = "") -> str:
    return (f'[[message]]\nbus = "P"\nid = "{ident}"\nform = "{form}"\ndlc = {dlc}\n'
            f'sender = "{sender}"\nperiod = "{period}"\n{extra}\n')


def run(sc: Any) -> BusResult:
    return run_buses(sc, sc.run.duration_ns, sc.run.seed)[0]


def node(res: BusResult, name: str) -> NodeTruth:
    return next(n for n in res.nodes if n.node == name)


def records(res: BusResult, kind: str) -> list[list[str]]:
    """The log lines of one record kind (status, error, ...), split into fields."""
    return [line.split("\t") for _, _, line in res.records if f"\t{kind}\t" in line]


def tec_values(truth: NodeTruth) -> list[int]:
    return [p[1] for p in truth.trajectory]


# --- arbitration ------------------------------------------------------------------------


def test_arbitration_key_facts() -> None:
    # from memory: ISO 11898-1 / Bosch CAN 2.0 Part B bitwise arbitration over ID, SRR,
    # IDE, RTR, dominant 0 wins (clause and section numbers not checked here)
    assert arbitration_key(0x100, False, False) < arbitration_key(0x101, False, False)
    # base frame beats an extended frame with the same 11-bit prefix (IDE recessive)
    assert arbitration_key(0x123, False, False) < arbitration_key(0x123 << 18, True, False)
    assert arbitration_key(0x123, False, True) < arbitration_key(0x123 << 18, True, False)
    # data frame beats a remote frame with the same identifier (RTR recessive)
    assert arbitration_key(0x123, False, False) < arbitration_key(0x123, False, True)
    assert arbitration_key(0x1ABCDEF, True, False) < arbitration_key(0x1ABCDEF, True, True)
    # the prefix decides before IDE: a lower extended prefix beats a higher base id
    assert arbitration_key(0x122 << 18 | 0x3FFFF, True, True) < arbitration_key(0x123, False, False)


def test_lower_identifier_wins_simultaneous_release(tmp_path: Path) -> None:
    body = "".join(message(i, s, "10ms", form, extra='offset = "0ms"') for i, s, form in [
        ("300", "a", "s"), ("100", "b", "s"), ("04000000", "a", "x"), ("101", "b", "x"),
        ("100", "a", "x")])
    res = run(scenario(tmp_path, body, duration="5ms"))
    s = res.schedule
    sent = [(s.messages[r].id, s.messages[r].ext) for r in s.rank[res.release]]
    # from memory: ISO 11898-1 arbitration (see test above). Extended 100 and 101 have the
    # 11-bit prefix 0; extended 04000000 has prefix 100 and loses to base 100.
    assert sent == [(0x100, True), (0x101, True), (0x100, False), (0x4000000, True),
                    (0x300, False)]


def test_no_two_frames_overlap_and_saturation_starves_low_priority(tmp_path: Path) -> None:
    # Ten messages of ~230 us every 1 ms ask for ~230 % of the bus.
    body = "".join(message(f"{0x100 + i:03X}", "ab"[i % 2], "1ms") for i in range(10))
    res = run(scenario(tmp_path, body, duration="200ms"))
    assert np.all(res.start_ns[1:] >= res.end_ns[:-1])  # common practice, no source
    sent = np.bincount(res.schedule.rank[res.release], minlength=10)
    # Fixed-priority non-preemptive scheduling: the highest four fit (4 x 230 us < 1 ms),
    # the lowest get (almost) nothing. source: Davis et al. 2007, Real-Time Systems 35(3), sec. 3
    assert min(sent[:4]) >= 199
    assert sent[-1] + sent[-2] <= 3  # at most a start-up slip before the queues fill
    assert sent[4] < sent[3] and sent[5:].sum() <= 3
    assert res.dropped[-1] > 0


def test_error_free_utilisation_matches_analytic(tmp_path: Path) -> None:
    periods_ms = [2, 5, 7, 10, 20, 50, 100]
    payload = "A5" * 8
    body = "".join(message(f"{0x200 + i:03X}", "ab"[i % 2], f"{p}ms",
                           extra=f'payload = "constant:{payload}"')
                   for i, p in enumerate(periods_ms))
    sc = scenario(tmp_path, body, duration="20s")
    res = run(sc)
    busy = float((res.end_ns - res.start_ns).sum())
    measured = busy / sc.run.duration_ns
    # U = sum(C_i / T_i) with C_i the exact frame time (stuff bits included, physics
    # reference) -- source for the form of U: Tindell & Burns 1994; Davis et al. 2007.
    analytic = sum(
        frame_bits_reference(0x200 + i, False, False, False, False, False, 8,
                             bytes.fromhex(payload))[0] * BIT_NS / (p * 1e6)
        for i, p in enumerate(periods_ms))
    assert measured == pytest.approx(analytic, rel=0.01)


# --- fault confinement (ISO 11898-1 rules, clause numbers from memory) ---------------------


def test_isolated_node_ack_errors_stop_at_128(tmp_path: Path) -> None:
    body = message("100", "a", "10ms") + message("200", "b", "10ms") + (
        '[[fault]]\nnode = "a"\nkind = "isolated"\nstart = "100ms"\nend = "400ms"\n')
    res = run(scenario(tmp_path, body, duration="600ms", nodes="a b c"))
    tec = tec_values(node(res, "a"))
    # rule c: +8 per ACK error while error-active; exception 1: none once error-passive
    assert tec[:17] == [8 * k for k in range(17)]
    assert max(tec) == 128 and not node(res, "a").bus_off
    passive = [t for t in node(res, "a").transitions if t["to"] == "error-passive"]
    assert passive and passive[0]["t_ns"] == node(res, "a").trajectory[16][0]
    # after rejoining, successes count it down again (rule g)
    assert tec[17] == 127 and tec[-1] < 128
    assert node(res, "b").trajectory == [[0, 0, 0, "error-active"]]


def test_lonely_node_gets_ack_errors_and_never_bus_off(tmp_path: Path) -> None:
    res = run(scenario(tmp_path, message("100", "a", "10ms"), duration="200ms", nodes="a"))
    truth = node(res, "a")
    tec = tec_values(truth)
    assert tec == [8 * k for k in range(17)]  # 8, 16, ... 128 at the 16th attempt, then stays
    assert not truth.bus_off
    assert [t["to"] for t in truth.transitions] == ["warning", "error-passive"]
    errors = [line for _, _, line in res.records if "\terror\t" in line]
    # A listen-only logger cannot see a missing ACK: it sees the transmitter's active flag
    # overwrite the ACK delimiter (form error, ISO 11898-1 error detection), 16 times; once
    # the node is error-passive its flag is recessive and the logger receives every
    # retransmission as a complete frame.
    assert len(errors) == 16 and all("\tform\tack\t100\ts\t" in line for line in errors)
    assert len(res.unacked) > 100 and len(res.release) == len(res.unacked)


def test_lonely_node_in_the_first_detector_view_logs_ack_errors(tmp_path: Path) -> None:
    sc = scenario(tmp_path, message("100", "a", "10ms"), duration="200ms", nodes="a")
    sc = replace(sc, run=replace(sc.run, logger_view="detector"))
    res = run(sc)
    errors = [line for _, _, line in res.records if "\terror\t" in line]
    assert len(errors) > 100 and all("\tack\tack\t" in line for line in errors)
    assert len(res.release) == 0


def test_persistent_transmit_error_passive_after_16_bus_off_after_32(tmp_path: Path) -> None:
    body = message("100", "a", "10ms") + message("200", "b", "10ms") + (
        '[[fault]]\nnode = "a"\nkind = "tx-noise"\nevery = 1\n')
    res = run(scenario(tmp_path, body, duration="100ms"))
    truth = node(res, "a")
    tec = tec_values(truth)
    assert tec[:33] == [8 * k for k in range(33)]
    states = [p[3] for p in truth.trajectory]
    assert states[15] != "error-passive" and states[16] == "error-passive"
    assert states[31] == "error-passive" and states[32] == "bus-off"
    assert truth.bus_off and truth.bus_off[0]["from_ns"] == truth.trajectory[32][0]
    # receivers gain 1 per error (rule a)
    assert tec_values(node(res, "b"))[:2] == [0, 0]
    assert [p[2] for p in node(res, "b").trajectory[:4]] == [0, 1, 2, 3]


def test_alternating_error_and_success(tmp_path: Path) -> None:
    body = message("100", "a", "5ms") + message("200", "b", "10ms") + (
        '[[fault]]\nnode = "a"\nkind = "tx-noise"\nevery = 2\n')
    res = run(scenario(tmp_path, body, duration="2s"))
    truth = node(res, "a")
    after_error = [p for p, prev in zip(truth.trajectory[1:], truth.trajectory, strict=False)
                   if p[1] > prev[1]]
    # rules c and g alternating: TEC after the k-th error is 8k - (k - 1) = 7k + 1
    assert [p[1] for p in after_error[:37]] == [7 * k + 1 for k in range(1, 38)]
    assert after_error[18][1] == 134 and after_error[18][3] == "error-passive"
    assert after_error[17][3] != "error-passive"
    assert after_error[36][1] == 260 and after_error[36][3] == "bus-off"


def test_rx_noise_first_detector_gains_nine(tmp_path: Path) -> None:
    body = message("100", "s", "5ms") + (
        '[[fault]]\nnode = "r"\nkind = "rx-noise"\nrate = 1.0\n')
    res = run(scenario(tmp_path, body, duration="300ms", nodes="s r h"))
    rec_r = [p[2] for p in node(res, "r").trajectory]
    rec_h = [p[2] for p in node(res, "h").trajectory]
    # rule a (+1) and rule b (+8 for the receiver that sees the others' flags after its own)
    assert rec_r[:16] == [9 * k for k in range(16)]
    assert node(res, "r").trajectory[15][3] == "error-passive"
    assert node(res, "r").trajectory[14][3] != "error-passive"
    assert rec_h[:16] == list(range(16))
    # the transmitter gets +8 per destroyed frame, then succeeds once r is passive
    tec_s = tec_values(node(res, "s"))
    assert tec_s[:16] == [8 * k for k in range(16)] and tec_s[16] == 119


def test_bus_off_recovery_takes_1408_bit_times(tmp_path: Path) -> None:
    body = message("100", "a", "5ms") + (
        '[[fault]]\nnode = "a"\nkind = "tx-noise"\nevery = 1\nend = "50ms"\n')
    res = run(scenario(tmp_path, body, duration="200ms"))
    truth = node(res, "a")
    assert len(truth.bus_off) >= 2  # the fault lasts: bus-off, recovery, bus-off again ...
    for off in truth.bus_off:
        # rule l: 128 occurrences of 11 recessive bits = 1408 bit times = 2.816 ms at 500 kbit/s
        assert off["to_ns"] - off["from_ns"] >= 1408 * BIT_NS
        assert off["to_ns"] - off["from_ns"] <= (1408 + 40) * BIT_NS  # idle bus: no longer
        back = [p for p in truth.trajectory if p[0] == off["to_ns"]]
        assert back == [[off["to_ns"], 0, 0, "error-active"]]  # counters restart at 0
    assert [(t["from"], t["to"]) for t in truth.transitions[3:5]] == [
        ("bus-off", "error-active"), ("error-active", "warning")]


def test_status_records_and_attribution(tmp_path: Path) -> None:
    body = message("100", "a", "5ms") + message("200", "b", "7ms") + (
        '[[fault]]\nnode = "b"\nkind = "rx-noise"\nrate = 0.5\nstart = "100ms"\nend = "200ms"\n')
    res = run(scenario(tmp_path, body, duration="2.5s",
                       extra_run='status_every = "1s"\nattribute_errors = true'))
    status = records(res, "status")
    assert [(s[0], s[3]) for s in status] == [("1000000000", "a"), ("1000000000", "b"),
                                              ("2000000000", "a"), ("2000000000", "b")]
    errors = records(res, "error")
    assert errors and all(e[7] == "b" for e in errors)


def test_bus_off_recovery_on_a_saturated_bus_counts_frame_tails(tmp_path: Path) -> None:
    body = message("100", "a", "5ms") + "".join(
        message(f"{0x200 + i:03X}", "b", "1ms") for i in range(10)) + (
        '[[fault]]\nnode = "a"\nkind = "tx-noise"\nevery = 1\nend = "30ms"\n')
    res = run(scenario(tmp_path, body, duration="200ms", nodes="a b c"))
    off = node(res, "a").bus_off[0]
    b_frames = sent_by_node(res, "b")
    between = int(((b_frames > off["from_ns"]) & (b_frames < off["to_ns"])).sum())
    # rule l: each frame's 11 recessive tail bits are one occurrence; back-to-back frames
    # leave no idle time, so recovery needs 128 of them (the first is the error frame's own)
    assert 126 <= between <= 128
    assert off["to_ns"] - off["from_ns"] > 100 * 1408 * BIT_NS / 11


def sent_by_node(res: BusResult, sender: str) -> np.ndarray:
    s = res.schedule
    mine = np.array([s.messages[r].sender == sender for r in s.rank[res.release]], dtype=bool)
    return res.start_ns[mine]


def test_isolated_fd_node_retransmits_with_its_data_phase_at_the_data_rate(
        tmp_path: Path) -> None:
    # from memory: ISO 11898-1 FD frame format (the bit rate switches at BRS and back at the
    # CRC delimiter, also for a node alone on its piece of wire) and error signalling (an
    # ACK error is flagged after the ACK slot: flag 6, delimiter 8, intermission 3 bits). So
    # attempts follow each other by the frame's bits up to the ACK slot, then 17 nominal bits:
    # the frame's duration (ACK delimiter, EOF and intermission are 11 of its bits) + 6 bits
    from tracelab.physics.bitlength import frame_durations_ns

    body = message("100", "a", "10ms", form="sfb", dlc=0) + message("200", "b", "10ms") + (
        '[[fault]]\nnode = "a"\nkind = "isolated"\nstart = "100ms"\nend = "400ms"\n')
    res = run(scenario(tmp_path, body, duration="600ms", nodes="a b c", data_bps=2_000_000))
    times = [p[0] for p in node(res, "a").trajectory[1:17]]  # the 16 ACK errors
    bits, dpb = frame_bits_reference(0x100, False, False, True, True, False, 0, b"")
    want = int(frame_durations_ns(np.array([bits]), np.array([dpb]), 500_000, 2_000_000)[0]) \
        + 6 * BIT_NS
    assert all(abs((b - a) - want) <= 2 for a, b in zip(times, times[1:], strict=False))


def test_status_records_hold_the_counters_at_their_own_time(tmp_path: Path) -> None:
    # common practice, no source: a controller's status read at t reports its counters at t;
    # an error flagged later in a frame already on the wire at t is not in it
    body = message("100", "a", "2ms") + message("200", "b", "3ms") + (
        '[[fault]]\nnode = "b"\nkind = "rx-noise"\nrate = 0.3\nstart = "100ms"\n')
    res = run(scenario(tmp_path, body, duration="3s",
                       extra_run='status_every = "50ms"'))
    status = records(res, "status")
    assert len(status) > 100
    for t, _bus, _kind, name, tec, rec in status:
        traj = node(res, name).trajectory
        at = [p for p in traj if p[0] <= int(t)][-1]  # the last change at or before t
        assert (int(tec), int(rec)) == (at[1], at[2]), (t, name)
