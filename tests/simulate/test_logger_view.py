"""What a listen-only logger records for each fault kind (``[logger] view = "own"``), the
first-detector view, per-bit noise, local noise and the error flag's visible length.

source of the detection rules: ISO 11898-1:2015 clause 10.9 (error detection: a receiver
detects stuff, form and CRC errors, only a transmitting node detects bit and ACK errors)
and 10.4.4 (error flag: 6 dominant bits; the superposition of the flags of the nodes that
react is 6..12 bits) (clause numbers from memory).
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from tests.simulate.test_engine import message, node, scenario
from tracelab.simulate.simulator import run_buses

BIT_NS = 2_000
#: four senders: short and long frames, high and low identifiers
TRAFFIC = (message("100", "a", "2ms") + message("7F0", "b", "3ms", dlc=1)
           + message("300", "c", "4ms", dlc=8) + message("050", "d", "5ms", dlc=4))
FAULTS = {
    "rx-noise": 'kind = "rx-noise"\nnode = "c"\nrate = 0.3\nstart = "50ms"',
    "tx-noise": 'kind = "tx-noise"\nnode = "b"\nrate = 0.5\nstart = "50ms"',
    "bus-noise": 'kind = "bus-noise"\nrate = 0.2\nstart = "50ms"',
    "local-noise": 'kind = "local-noise"\nnodes = ["c", "d"]\nber = 0.002\nstart = "50ms"',
    "rx-noise-ber": 'kind = "rx-noise"\nnode = "c"\nber = 0.002\nstart = "50ms"',
    "bus-noise-ber": 'kind = "bus-noise"\nber = 0.001\nstart = "50ms"',
}


def _run(tmp_path: Path, fault: str, view: str = "own", duration: str = "1s",
         ack: bool = False) -> Any:
    body = TRAFFIC + "[[fault]]\n" + FAULTS[fault] + "\n"
    sc = scenario(tmp_path, body, duration=duration, nodes="a b c d",
                  extra_run="attribute_errors = true")
    sc = replace(sc, run=replace(sc.run, logger_view=view, logger_ack=ack))
    return run_buses(sc, sc.run.duration_ns, sc.run.seed)[0]


def _errors(res: Any) -> list[list[str]]:
    return [line.split("\t") for _, _, line in res.records if "\terror\t" in line]


@pytest.mark.parametrize("fault", ["rx-noise", "rx-noise-ber", "local-noise"])
def test_local_receive_fault_is_stuff_or_form_never_bit_or_crc(tmp_path: Path,
                                                              fault: str) -> None:
    # the logger's own bits were fine until the culprit's flag came: it can only trip over
    # the flag (a stuff error in a stuffed field, a form error in a fixed-form field)
    res = _run(tmp_path, fault)
    errors = _errors(res)
    assert len(errors) > 50
    # crc only where bits really were corrupted on the wire: the culprit's own frames once
    # it is error-passive (its passive flag overwrites its own remaining bits)
    active = [e for e in res.errors if e["logged"] and not e["passive_flag"]]
    assert {e["logged"]["type"] for e in active} <= {"stuff", "form"}
    assert all(e["tx"] in ("c", "d") for e in res.errors
               if e["logged"] and e["logged"]["type"] == "crc")
    types = {e[3] for e in errors}
    assert types <= {"stuff", "form", "crc"} and "stuff" in types
    # but the culprit, detecting first, saw crc errors and its own frames' bit errors
    detected = {e["detected_as"] for e in res.errors if e["kind"] != "rx-passive"}
    assert "crc" in detected and "bit" in detected
    # flags before the identifier was complete: the logger cannot tell the frame
    unknown = [e for e in errors if e[5] == "-"]
    assert unknown and all(e[6] == "-" for e in unknown)
    assert all(e[5] != "-" for e in errors if e[4] in ("data", "crc", "eof", "ack"))


def test_first_detector_view_keeps_the_detectors_types(tmp_path: Path) -> None:
    res = _run(tmp_path, "rx-noise", view="detector")
    types = {e[3] for e in _errors(res)}
    assert types <= {"stuff", "crc", "bit"} and {"crc", "bit"} <= types
    assert all(e[5] != "-" for e in _errors(res))


def test_transmit_fault_is_never_a_bit_error_for_the_logger(tmp_path: Path) -> None:
    res = _run(tmp_path, "tx-noise")
    errors = _errors(res)
    assert len(errors) > 50
    assert {e[3] for e in errors} <= {"stuff", "form", "crc"}
    # its active flags are seen as stuff / form errors; once error-passive its recessive
    # flag leaves corrupted bits that the receivers (and the logger) may see as CRC errors
    active = [e for e in res.errors if not e["passive_flag"]]
    assert active and {e["logged"]["type"] for e in active} <= {"stuff", "form"}
    assert {e[5] for e in errors} <= {"7F0", "-"}  # only the faulty node's frames
    assert {e["detected_as"] for e in res.errors} == {"bit"}


@pytest.mark.parametrize("fault", ["bus-noise", "bus-noise-ber"])
def test_whole_bus_disturbance_shows_crc_errors(tmp_path: Path, fault: str) -> None:
    # corrupted bits on the wire: the logger sees them as every other receiver does
    res = _run(tmp_path, fault)
    types = {e[3] for e in _errors(res)}
    assert "crc" in types and "bit" not in types
    assert all(e["flag_bits"] == 6 for e in res.errors)  # everyone flags at once
    assert all(not e["arbitration_lost"] for e in res.errors)


def test_flag_length_superposition_and_time_to_the_next_frame(tmp_path: Path) -> None:
    res = _run(tmp_path, "rx-noise")
    flags = [e["flag_bits"] for e in res.errors
             if e["kind"] in ("rx", "tx") and not e["passive_flag"]]
    # one node detects first, the others react within 6 bits: 7..12 visible bits
    assert min(flags) >= 7 and max(flags) == 12 and len(set(flags)) >= 4
    # on a busy bus the next frame starts right after flag + delimiter (8) + intermission (3)
    starts = np.sort(res.start_ns)
    errs = sorted(res.errors, key=lambda e: e["t_ns"])
    checked = 0
    for e, nxt in zip(errs, errs[1:], strict=False):
        if e["kind"] == "rx-passive":
            continue
        k = int(np.searchsorted(starts, e["t_ns"]))
        if k < len(starts) and starts[k] < nxt["t_ns"]:
            gap = starts[k] - e["t_ns"]
            if gap <= (12 + 11) * BIT_NS:  # the bus was not idle
                assert gap == (e["flag_bits"] + 8 + 3) * BIT_NS
                checked += 1
    assert checked > 20


def test_flag_overwriting_a_recessive_identifier_bit_is_a_lost_arbitration(
        tmp_path: Path) -> None:
    res = _run(tmp_path, "rx-noise", duration="2s")
    lost = [e for e in res.errors if e["arbitration_lost"]]
    assert lost  # 0x7F0 sends recessive identifier bits from the first one on
    assert all(not e["tx_counted"] for e in lost)
    b = node(res, "b")
    for e in lost:  # no +8 for the sender at that instant (rule c does not apply)
        if e["tx"] == "b":
            at = [p for p in b.trajectory if p[0] == e["t_ns"]]
            before = [p for p in b.trajectory if p[0] < e["t_ns"]][-1]
            assert not at or at[-1][1] <= before[1]


def test_local_noise_makes_each_listed_node_a_first_detector(tmp_path: Path) -> None:
    res = _run(tmp_path, "local-noise", duration="300ms")
    rx = [e for e in res.errors if e["kind"] == "rx"]
    assert rx and all(set(e["detectors"]) <= {"c", "d"} for e in rx)
    both = [e for e in rx if set(e["detectors"]) == {"c", "d"}]
    assert both
    # rules a + b: +9 for each first detector while the others react; the bystander a +1
    first = both[0]
    for name, step in (("c", 9), ("d", 9), ("a", 1)):
        traj = node(res, name).trajectory
        at = [p for p in traj if p[0] == first["t_ns"]][-1]
        before = [p for p in traj if p[0] < first["t_ns"]][-1]
        if first["tx"] != name:
            assert at[2] - before[2] == step, name


def test_per_bit_noise_hits_long_frames_more_often(tmp_path: Path) -> None:
    # ber: a frame of n exposed bits is hit with probability 1 - (1 - ber)^n (independent
    # bits; derived). 0x7F0 has DLC 1, 0x300 DLC 8: about 55 and 120 exposed bits.
    res = _run(tmp_path, "bus-noise-ber", duration="3s")
    s = res.schedule
    for ident in ("7F0", "300"):
        rank = next(m.rank for m in s.messages if m.id_hex == ident)
        sent = int(np.sum(s.rank[res.release] == rank))
        hit = sum(1 for e in res.errors if e["id_hex"] == ident)
        bits = int(np.median(s.bits[s.rank == rank])) - 4
        p = 1 - (1 - 0.001) ** bits
        # attempts = sent + hit; binomial standard deviation, 4 sigma (derived)
        n = sent + hit
        expected = n * p
        assert abs(hit - expected) <= 4 * np.sqrt(n * p * (1 - p)) + 3, (ident, hit, expected)


def test_logger_that_acknowledges_also_flags(tmp_path: Path) -> None:
    # with ack = true the logger is a normal-mode node: its flag is one of the reactions
    res = _run(tmp_path, "rx-noise", ack=True, duration="300ms")
    assert {e[3] for e in _errors(res)} <= {"stuff", "form"}
    assert all(e["flag_bits"] >= 7 for e in res.errors if e["kind"] == "rx")


def test_fd_logger_detects_within_six_nominal_bits_of_the_flag(tmp_path: Path) -> None:
    # after an error the flag is sent at the nominal bit rate, also in a CAN FD data phase
    body = (message("100", "a", "2ms", form="sfb", dlc=12) + message("200", "b", "3ms",
                                                                     form="sfb", dlc=15)
            + '[[fault]]\nkind = "rx-noise"\nnode = "c"\nrate = 0.3\n')
    path = tmp_path / "fd.toml"
    path.write_text('[run]\nname = "fd"\nduration = "300ms"\nseed = 3\n\n'
                    '[bus.P]\nnominal = 500000\ndata = 2000000\n\n'
                    + "".join(f'[node.{n}]\nbuses = ["P"]\n' for n in "abc") + "\n" + body,
                    encoding="utf-8")
    from tracelab.simulate import load_scenario

    sc = load_scenario(path)
    res = run_buses(sc, sc.run.duration_ns, sc.run.seed)[0]
    logged = [e for e in res.errors if e["logged"] and not e["passive_flag"] and e["kind"] == "rx"]
    assert len(logged) > 20
    for e in logged:
        lag = e["logged"]["t_ns"] - e["t_ns"]
        assert lag % BIT_NS == 0 and BIT_NS <= lag <= 6 * BIT_NS  # derived: bits d..d+5
