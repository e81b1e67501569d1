"""The independent counter reference against the rule text, NodeCounters, the simulator's
truth and the forensic replay.

source of every expectation marked "rule x": ISO 11898-1:2015 clause 12.1.4 fault
confinement (clause number from memory), rules a..l as listed in docs/forensics.md section 1
(Bosch CAN 2.0 Part B section 8 rules 1..12).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.forensics import synth
from tests.oracles.counters_reference import Event, replay_events, transitions
from tracelab.physics.confinement import RECOVERY_SEQUENCES, NodeCounters
from tracelab.simulate import load_scenario
from tracelab.simulate.simulator import run_buses


def _run(kinds: list[str], **kw: Any) -> list[list[object]]:
    return replay_events([Event(i + 1, "n", k) for i, k in enumerate(kinds)], **kw)["n"]


def _last(kinds: list[str], **kw: Any) -> list[object]:
    return _run(kinds, **kw)[-1]


# --- the rule text, at its boundaries ------------------------------------------------------


def test_rec_boundary_127_active_128_passive() -> None:
    # rule i: error-passive when REC > 127; rule a: +1 per receive error
    assert _last(["rx_error"] * 127)[2:] == [127, "warning"]
    assert _last(["rx_error"] * 128)[2:] == [128, "error-passive"]
    # rules a + b: 9 per first detection: 14 x 9 = 126 (warning), 15 x 9 = 135 (passive)
    assert _last(["rx_error_first"] * 14)[2:] == [126, "warning"]  # derived
    assert _last(["rx_error_first"] * 15)[2:] == [135, "error-passive"]  # derived


def test_tec_boundaries_95_96_127_128_255_256() -> None:
    # rule c: +8 per transmit error; rule g: -1 per success. 12 x 8 - 1 = 95, 12 x 8 = 96
    assert _last(["tx_error"] * 12 + ["tx_success"])[1:] == [95, 0, "error-active"]  # derived
    assert _last(["tx_error"] * 12)[1:] == [96, 0, "warning"]  # warning limit 96 (from memory)
    assert _last(["tx_error"] * 12, warning_inclusive=False)[1:] == [96, 0, "error-active"]
    assert _last(["tx_error"] * 16 + ["tx_success"])[1:] == [127, 0, "warning"]
    assert _last(["tx_error"] * 16)[1:] == [128, 0, "error-passive"]  # rule i
    # 31 x 8 - 1 + 8 = 255: still error-passive
    assert _last(["tx_error"] * 31 + ["tx_success", "tx_error"])[1:] == [255, 0, "error-passive"]
    assert _last(["tx_error"] * 32)[1:] == [256, 0, "bus-off"]  # rule j: TEC > 255


def test_receptions_after_error_passive_rule_h() -> None:
    # rule h: above 127 a successful reception sets REC into 119..127, then -1 each
    traj = _run(["rx_error"] * 130 + ["rx_success"] * 4)
    assert [row[2] for row in traj[-4:]] == [119, 118, 117, 116]
    assert traj[-4][3] == "warning"  # rule k: REC <= 127 again, still >= 96
    assert _last(["rx_error"] * 130 + ["rx_success"], rec_after_passive=127)[2] == 127
    assert _run(["rx_success"] * 3) == [[0, 0, 0, "error-active"]]  # 0 stays 0
    with pytest.raises(ValueError):
        _run([], rec_after_passive=118)


def test_ack_exception_and_arbitration_stuff_exception() -> None:
    # rule c exception 1: a lone error-passive transmitter stops at 128 (16th attempt)
    assert _last(["tx_ack_error"] * 40)[1:] == [128, 0, "error-passive"]
    # ... unless it sees a dominant bit during its passive flag
    evs = [Event(i, "n", "tx_ack_error", dominant_in_passive_flag=True) for i in range(1, 34)]
    assert replay_events(evs)["n"][-1][1:] == [256, 0, "bus-off"]
    # rule c exception 2: no change at all
    assert _run(["tx_arb_stuff_error"] * 5) == [[0, 0, 0, "error-active"]]


def test_rules_d_e_f_and_bus_off_recovery_rule_l() -> None:
    assert _last(["tx_flag_bit_error", "tx_dominant_8"])[1] == 16  # rules d, f
    assert _last(["rx_flag_bit_error", "rx_dominant_8"])[2] == 16  # rules e, f
    # rule l: 128 occurrences of 11 recessive bits end bus-off; fewer do not
    off = [Event(i, "n", "tx_error") for i in range(1, 33)]
    assert replay_events(off + [Event(40, "n", "recessive_11", 127)])["n"][-1][3] == "bus-off"
    back = replay_events(off + [Event(40, "n", "recessive_11", 127),
                                Event(41, "n", "recessive_11")])["n"]
    assert back[-1] == [41, 0, 0, "error-active"]
    # nothing but recessive bits counts while bus-off
    still = replay_events(off + [Event(40, "n", "tx_success"), Event(41, "n", "rx_error")])["n"]
    assert still[-1][1:] == [256, 0, "bus-off"]
    # recessive bits while not bus-off are nothing
    assert _run(["recessive_11"] * 200) == [[0, 0, 0, "error-active"]]


def test_transitions_of_a_trajectory() -> None:
    traj = _run(["tx_error"] * 12 + ["tx_success"])
    assert transitions(traj) == [{"t_ns": 12, "from": "error-active", "to": "warning"},
                                 {"t_ns": 13, "from": "warning", "to": "error-active"}]


# --- against tracelab.physics.confinement.NodeCounters ----------------------------------------


def _apply_node_counters(c: NodeCounters, ev: Event, seen: list[int]) -> None:
    """The same event through NodeCounters' methods (recovery counted by the caller, as the
    simulator and the replay do)."""
    k = ev.kind
    if k == "rx_error":
        c.receive_error()
    elif k == "rx_error_first":
        c.receive_error(first_detector=True)
    elif k == "tx_error":
        c.transmit_error()
    elif k == "tx_ack_error":
        c.transmit_error(ack_error=True, saw_dominant_in_passive_flag=ev.dominant_in_passive_flag)
    elif k == "tx_arb_stuff_error":
        c.transmit_error(arbitration_stuff_error=True)
    elif k == "tx_success":
        c.transmit_success()
    elif k == "rx_success":
        c.receive_success()
    elif k == "recessive_11" and c.bus_off:
        seen[0] += ev.count
        if seen[0] >= RECOVERY_SEQUENCES:
            c.recover()
            seen[0] = 0
    if not c.bus_off and k != "recessive_11":
        seen[0] = 0


SUPPORTED = ("rx_error", "rx_error_first", "tx_error", "tx_ack_error", "tx_arb_stuff_error",
             "tx_success", "rx_success", "recessive_11")
# Runs of one kind reach the boundaries (16 transmit errors, 128 receive errors) often.
_runs = st.lists(st.tuples(st.sampled_from(SUPPORTED), st.integers(1, 40), st.booleans(),
                           st.integers(1, 130)), min_size=1, max_size=25)


@settings(max_examples=150, deadline=None)
@given(_runs, st.integers(119, 127))
def test_reference_equals_node_counters_on_random_streams(runs: list[tuple[str, int, bool, int]],
                                                          rec_reset: int) -> None:
    from tracelab.physics.confinement import ConfinementConfig

    events: list[Event] = []
    for kind, repeat, dominant, count in runs:
        for _ in range(repeat):
            events.append(Event(len(events) + 1, "n", kind,
                                count if kind == "recessive_11" else 1, dominant))
    ref = replay_events(events, rec_after_passive=rec_reset)["n"]
    c = NodeCounters(config=ConfinementConfig(rec_after_passive_reception=rec_reset))
    seen = [0]
    got: list[list[object]] = [[0, 0, 0, "error-active"]]
    for ev in events:
        _apply_node_counters(c, ev, seen)
        row = [ev.t_ns, c.tec, c.rec, c.state]
        if got[-1][1:] != row[1:]:
            got.append(row)
    assert got == ref


# --- against the simulator's truth ------------------------------------------------------------

SIM_BASE = """
[run]
name = "ref"
duration = "{duration}"
seed = {seed}

[bus.P]
nominal = 500000

[node.a]
buses = ["P"]
[node.b]
buses = ["P"]
[node.c]
buses = ["P"]

[[message]]
bus = "P"
id = "100"
dlc = 8
sender = "a"
period = "1ms"
[[message]]
bus = "P"
id = "200"
dlc = 4
sender = "b"
period = "2ms"
[[message]]
bus = "P"
id = "300"
dlc = 8
sender = "c"
period = "3ms"
"""

SIM_FAULTS = {
    "rx-noise": 'kind = "rx-noise"\nnode = "c"\nstart = "100ms"\nrate = 0.3',
    "tx-noise-bus-off": 'kind = "tx-noise"\nnode = "b"\nstart = "100ms"\nend = "900ms"\n'
                        'rate = 0.7',
    "bus-noise": 'kind = "bus-noise"\nstart = "100ms"\nrate = 0.1\nrate_end = 0.3',
    "bus-noise-ber": 'kind = "bus-noise"\nstart = "100ms"\nber = 5e-4\nber_end = 2e-3',
    "local-noise-ber": 'kind = "local-noise"\nnodes = ["b", "c"]\nstart = "100ms"\n'
                       'ber = 2e-3',
    "rx-noise-ber-detector": 'kind = "rx-noise"\nnode = "a"\nstart = "100ms"\nber = 3e-3'
                             '\n\n[logger]\nview = "detector"',
    "tx-noise-ack": 'kind = "tx-noise"\nnode = "c"\nstart = "100ms"\nrate = 0.4'
                    '\n\n[logger]\nack = true',
    # a and b cut off: c is left alone on the wire and gets ACK errors too
    "isolated": 'kind = "isolated"\nnode = "a"\nstart = "100ms"\nend = "600ms"\n\n'
                '[[fault]]\nkind = "isolated"\nnode = "b"\nstart = "100ms"\nend = "600ms"',
}


def _events_from_trace(trace: list[tuple[int, str, str, int]]) -> list[Event]:
    return [Event(t, node, kind, count) for t, node, kind, count in trace]


@pytest.mark.parametrize("fault", sorted(SIM_FAULTS))
@pytest.mark.parametrize("seed", [1, 2])
def test_reference_equals_simulator_truth(tmp_path: Path, fault: str, seed: int) -> None:
    path = tmp_path / "ref.toml"
    path.write_text(SIM_BASE.format(duration="1500ms", seed=seed) + "\n[[fault]]\n"
                    + SIM_FAULTS[fault] + "\n", encoding="utf-8")
    sc = load_scenario(path)
    res = run_buses(sc, sc.run.duration_ns, sc.run.seed, trace=True)[0]
    assert res.trace is not None
    ref = replay_events(_events_from_trace(res.trace), nodes=[n.node for n in res.nodes])
    changed = 0
    for truth in res.nodes:
        assert ref[truth.node] == truth.trajectory, truth.node
        assert transitions(ref[truth.node]) == truth.transitions
        changed += len(truth.trajectory) > 1
    assert changed >= 2  # the scenario does move counters
    if fault == "isolated":
        assert any(e[2] == "tx_ack_error" and e[1] == "c" for e in res.trace)
    if fault == "rx-noise":  # flags over recessive identifier bits: lost arbitrations
        assert any(e["arbitration_lost"] for e in res.errors)
    if fault == "tx-noise-bus-off":
        assert any(n.bus_off for n in res.nodes)  # rule j and rule l both exercised
        assert any(e[2] == "recessive_11" for e in res.trace)


# --- against the forensic replay with `by` attribution ---------------------------------------


def _events_from_log(s: synth.Synth) -> list[Event]:
    """Each node's view of the synthetic log: the frame's sender transmits, the others
    receive, ``by`` detected first (docs/frame-log-format.md, error records)."""
    sender_of = {ident: name for name, ident in synth.IDS.items()}
    rows: list[tuple[int, int, str, str | None, str]] = []
    rows += [(f["t_ns"], 1, sender_of[f["id"]], None, "frame") for f in s.frames]
    rows += [(e["t_ns"], 0, sender_of[e["id"]], e["by"], e["type"]) for e in s.errors]
    out: list[Event] = []
    for t, _, sender, by, kind in sorted(rows):
        for n in synth.NODES:
            if kind == "frame":
                out.append(Event(t, n, "tx_success" if n == sender else "rx_success"))
            elif n == sender:
                out.append(Event(t, n, "tx_ack_error" if kind == "ack" else "tx_error"))
            elif kind != "ack":
                out.append(Event(t, n, "rx_error_first" if n == by else "rx_error"))
    return out


def _until_bus_off(traj: list[list[object]]) -> list[list[object]]:
    out = []
    for row in traj:  # recovery timing depends on idle time, compared elsewhere
        out.append(row)
        if row[3] == "bus-off":
            break
    return out


@pytest.mark.parametrize("fault,p,seed", [("rx", 0.3, 1), ("rx", 0.15, 2), ("tx", 0.4, 3),
                                          ("bus", 0.25, 4), ("ack", 1.0, 5)])
def test_reference_equals_attributed_forensic_replay(fault: str, p: float, seed: int) -> None:
    from tracelab.forensics import replay_faults

    s = synth.generate(3000, fault=fault, culprit="charlie", p=p, seed=seed,
                       fault_from_slot=200)
    ref = replay_events(_events_from_log(s), nodes=synth.NODES)
    result = replay_faults(s.connect(), synth.catalog())
    r = result.as_json()["results"][0]
    checked = 0
    for node in r["nodes"]:
        want = _until_bus_off(ref[node["node"]])
        want_tr = transitions(want)
        got_tr = [tr for tr in node["transitions"]][:len(want_tr)]
        assert [(tr["t_ns"], tr["from"], tr["to"]) for tr in got_tr] == \
            [(tr["t_ns"], tr["from"], tr["to"]) for tr in want_tr], node["node"]
        # counters at every row the replay reports (the last row at each instant), until
        # the first bus-off
        mine = result.counters.filter(result.counters["node"] == node["node"])
        rows: dict[int, tuple[int, int]] = {}
        for t, tec, rec in zip(mine["t_ns"].to_list(), mine["tec"].to_list(),
                               mine["rec"].to_list(), strict=True):
            rows[t] = (tec, rec)
        end = want[-1][0] if want[-1][3] == "bus-off" else None
        for t, value in rows.items():
            if end is not None and t > end:
                continue
            at = [row for row in want if row[0] <= t]
            assert value == (at[-1][1], at[-1][2]), (node["node"], t)
            checked += 1
    assert checked >= 10
    assert any(transitions(traj) for traj in ref.values())
