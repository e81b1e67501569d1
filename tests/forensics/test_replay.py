"""Event-driven replay against a frame-by-frame application of the same rules.

source of the rules: ISO 11898-1:2015 clause 12.1.4 (fault confinement); the reference in
tests/forensics/synth.py applies them at every frame, the replay only at error events.
"""

from __future__ import annotations

import polars as pl
import pytest

from tests.forensics import synth
from tracelab.forensics import replay_faults
from tracelab.forensics.replay import load_bus_evidence, recovery_end_ns, replay_node
from tracelab.physics.confinement import DEFAULT_CONFIG


def _until_recovery(transitions: list[dict]) -> tuple[list[tuple], int | None]:
    """Transitions up to the first bus-off recovery, and the time of that recovery.

    After a recovery the replay depends on where in the errored frames the errors fell,
    which the log does not say, so later transitions are compared only when none occurred.
    """
    out: list[tuple] = []
    for tr in transitions:
        if tr["from"] == "bus-off":
            return out, tr["t_ns"]
        out.append((tr["t_ns"], tr["from"], tr["to"]))
    return out, None


@pytest.mark.parametrize("fault,p,seed", [("tx", 0.6, 1), ("tx", 0.3, 2), ("rx", 0.4, 3),
                                          ("rx", 0.2, 4), ("ack", 1.0, 5), ("bus", 0.3, 6),
                                          ("bus", 0.15, 7)])
def test_attributed_replay_equals_frame_by_frame_reference(fault: str, p: float,
                                                           seed: int) -> None:
    s = synth.generate(5000, fault=fault, culprit="bravo", p=p, seed=seed, fault_from_slot=300)
    result = replay_faults(s.connect(), synth.catalog()).as_json()["results"][0]
    assert any(s.transitions.values())  # the scenario does degrade someone
    for node in result["nodes"]:
        got, got_recovery = _until_recovery(node["transitions"])
        want, want_recovery = _until_recovery(s.transitions[node["node"]])
        assert got == want, node["node"]
        if want_recovery is None:
            assert got_recovery is None
            assert node["max_tec"] == s.max_tec[node["node"]]
        else:
            assert got_recovery is not None
            assert abs(got_recovery - want_recovery) <= 3 * synth.FRAME_BITS * synth.BIT_NS


def test_lone_node_without_ack_stays_error_passive_at_128() -> None:
    # from memory: ISO 11898-1 rule c exception 1: TEC stops at 128, the node never goes bus-off
    s = synth.generate(2000, fault="ack", culprit="delta", seed=1)
    result = replay_faults(s.connect(), synth.catalog()).as_json()["results"][0]
    delta = next(n for n in result["nodes"] if n["node"] == "delta")
    assert delta["max_tec"] == 128 and delta["bus_off"] == []
    assert [tr["to"] for tr in delta["transitions"]] == ["warning", "error-passive"]
    acks = [e["t_ns"] for e in s.errors]
    assert delta["transitions"][1]["t_ns"] == acks[15]  # the 16th attempt


def test_persistent_transmit_error_bus_off_at_32nd_and_recovery_takes_1408_bits() -> None:
    # from memory: ISO 11898-1 rules c, j, l: bus-off after 32 errors, then 128 x 11 recessive bits
    s = synth.generate(1000, fault="tx", culprit="alpha", p=1.0, seed=1)
    con = s.connect()
    ev = load_bus_evidence(con, synth.catalog(), "r1", "can0")
    rep = replay_node(ev, ev.nodes.index("alpha"))
    errors = [e["t_ns"] for e in s.errors]
    passive = next(tr for tr in rep.transitions if tr["to"] == "error-passive")
    assert passive["t_ns"] == errors[15]
    assert rep.bus_off[0]["from_ns"] == errors[31]
    took_ns = rep.bus_off[0]["to_ns"] - rep.bus_off[0]["from_ns"]
    assert took_ns >= 1408 * synth.BIT_NS  # 2.816 ms at 500 kbit/s
    # 128 frame ends (frames back to back, no idle) take about 128 frames' time
    assert took_ns <= 130 * synth.FRAME_BITS * synth.BIT_NS


def test_recovery_on_an_idle_bus_is_128_x_11_bits() -> None:
    # from memory: ISO 11898-1 rule l; 1408 bits at 500 kbit/s = 2.816 ms
    s = synth.generate(50, seed=1)
    ev = load_bus_evidence(s.connect(), synth.catalog(), "r1", "can0")
    t_end = int(s.frames[-1]["end_ns"])
    assert recovery_end_ns(ev, t_end + 10, DEFAULT_CONFIG) == t_end + 10 + 2_816_000


def test_logger_loss_marks_counters_uncertain_until_they_reach_zero() -> None:
    s = synth.generate(3000, fault="tx", culprit="bravo", p=0.5, seed=2, fault_from_slot=200)
    mid = s.errors[len(s.errors) // 2]["t_ns"]
    s.losses.append({"run": "r1", "bus": "can0", "t_ns": mid - 5_000_000, "count": 10,
                     "until_ns": mid - 4_000_000, "file": "synthetic.frames", "line": 1})
    counters = replay_faults(s.connect(), synth.catalog()).counters
    bravo = counters.filter(counters["node"] == "bravo")
    before = bravo.filter(bravo["t_ns"] < mid - 5_000_000)
    after = bravo.filter(bravo["t_ns"] >= mid)
    assert not before["uncertain"].any()
    assert after["uncertain"].head(1).item()


def test_status_records_agree_with_attributed_replay() -> None:
    s = synth.generate(4000, fault="rx", culprit="charlie", p=0.3, seed=3, fault_from_slot=300,
                       status_every=97)
    result = replay_faults(s.connect(), synth.catalog()).as_json()["results"][0]
    agreement = result["status_agreement"]
    assert agreement["records"] == len(s.status)
    assert agreement["tec_equal"] == agreement["records"]
    assert agreement["rec_equal"] == agreement["records"]


@pytest.mark.parametrize("assume_first", [False, True])
def test_quiet_nodes_vectorised_walk_equals_the_event_loop(assume_first: bool,
                                                           monkeypatch: pytest.MonkeyPatch) -> None:
    from tracelab.forensics import replay

    s = synth.generate(4000, fault="bus", p=0.01, attribute=False, seed=9)
    ev = load_bus_evidence(s.connect(), synth.catalog(), "r1", "can0")
    fast = [replay_node(ev, n, assume_first) for n in range(len(ev.nodes))]
    assert all(rep.rows_frame is not None for rep in fast)  # the walk did run
    monkeypatch.setattr(replay, "_quiet_replay", lambda *args: None)
    for n, rep in enumerate(fast):
        slow = replay_node(ev, n, assume_first)
        assert rep.rows_frame is not None
        assert [tuple(r) for r in rep.rows_frame.iter_rows()] == slow.rows
        assert (rep.max_tec, rep.max_rec) == (slow.max_tec, slow.max_rec)
        assert rep.first_bonus_events == slow.first_bonus_events
        assert slow.transitions == [] and rep.state_before == slow.state_before


def test_split_by_node_both_ways_agree() -> None:
    import numpy as np

    from tracelab.forensics.replay import _split_by_node

    rng = np.random.default_rng(3)
    t = np.cumsum(rng.integers(1, 100, 5000))
    codes = rng.integers(-1, 12, 5000).astype(np.int16)
    few, many = _split_by_node(t, codes, 8), _split_by_node(t, codes, 12)
    for i in range(12):
        expected = t[codes == i]  # reference: numpy boolean indexing
        assert np.array_equal(many[i], expected)
        if i < 8:
            assert np.array_equal(few[i], expected)


def test_an_evidence_window_holds_only_what_lies_inside_it() -> None:
    """evidence_window's promise: frames and records in [t_from, t_to) only, the per-node
    ESI times (CAN FD: set while the sender is error-passive) included; numpy on the whole
    log's arrays is the reference."""
    import numpy as np

    from tracelab.forensics.evidence import evidence_window

    s = synth.generate(3000, fault="tx", culprit="alpha", p=0.5, seed=4, fd=True)
    ev = load_bus_evidence(s.connect(), synth.catalog(fd=True), "r1", "can0")
    assert sum(on.size for on, _ in ev.esi_t) > 0  # alpha went passive: ESI set
    lo = int(ev.frame_t[ev.frame_t.size // 3])
    hi = int(ev.frame_t[2 * ev.frame_t.size // 3])
    w = evidence_window(ev, lo, hi)

    def inside(col) -> np.ndarray:  # type: ignore[no-untyped-def]
        t = col.to_numpy()
        return t[(t >= lo) & (t < hi)]

    assert np.array_equal(w.frame_t.to_numpy(), inside(ev.frame_t))
    for (on, off), (w_on, w_off) in zip(ev.esi_t, w.esi_t, strict=True):
        assert np.array_equal(w_on.to_numpy(), inside(on))
        assert np.array_equal(w_off.to_numpy(), inside(off))
    assert w.esi_set_frames == sum(inside(on).size for on, _ in ev.esi_t)
    assert 0 < w.esi_set_frames < sum(on.size for on, _ in ev.esi_t)  # the cut matters here
    t = w.events["t_ns"].to_numpy()
    assert t.size and t.min() >= lo and t.max() < hi


def _rule_b_log(others_passive: bool) -> synth.Synth:
    """A log in which alpha, bravo and delta first fail 16 of their own frames each (so, by
    rule c, they are error-passive) or not, then 10 unattributed errors hit alpha's frames
    back to back. Charlie is the candidate first detector of those 10."""
    log = synth.Timeline()
    for node in ("alpha", "bravo", "charlie", "delta"):
        log.frame(node)
    if others_passive:
        for node in ("alpha", "bravo", "delta"):
            for _ in range(16):  # its own monitoring finds each error: TEC +8, 16 x -> 128
                log.error(node, 62, by=node, etype="bit", bits=synth.ERROR_BITS)
    for _ in range(10):
        log.error("alpha", 62, bits=synth.ERROR_BITS)
    log.frame("bravo")
    return log.log


@pytest.mark.parametrize("others_passive", [False, True])
def test_assumed_first_detector_gets_rule_b_only_while_another_node_flags_actively(
        others_passive: bool) -> None:
    # from memory: ISO 11898-1:2015 12.1.4.2 rule b (REC +8 when the first bit after the
    # node's own error flag is dominant) and 10.4.4 (an error-passive node's error flag is 6
    # recessive bits): with every other node error-passive, nothing dominant follows the first
    # detector's flag, so each error is REC +1 (rule a) only
    s = _rule_b_log(others_passive)
    ev = load_bus_evidence(s.connect(), synth.catalog(), "r1", "can0")
    charlie = replay_node(ev, ev.nodes.index("charlie"), assume_first=True)
    before = 48 if others_passive else 0  # rule a: +1 for each error on the others' frames
    per_error = 1 if others_passive else 9
    assert charlie.max_rec == before + 10 * per_error
    assert charlie.first_bonus_events == (0 if others_passive else 10)


def test_an_unidentified_error_goes_to_the_sender_of_the_error_right_after_it() -> None:
    # derived from ISO 11898-1 automatic retransmission: a destroyed frame goes out again at
    # the next bus idle; when that attempt fails too, the next thing on the bus is its error
    # record (which names the frame), not the next complete frame, which can be another
    # sender's. An unidentified error followed by a complete frame keeps that frame's sender.
    log = synth.Timeline()
    log.frame("alpha")
    log.error(None, 20, field="arbitration", bits=synth.ERROR_BITS)  # delta's, unidentified
    log.error("delta", 20, bits=synth.ERROR_BITS)  # its retransmission fails too, identified
    log.frame("bravo")     # bravo wins the next arbitration
    log.error(None, 20, field="arbitration", bits=synth.ERROR_BITS)  # charlie's, unidentified
    log.frame("charlie")   # charlie's retransmission succeeds
    log.frame("delta")
    s = log.log
    ev = load_bus_evidence(s.connect(), synth.catalog(), "r1", "can0")
    blind = ev.events.filter(pl.col("id").is_null())
    assert [ev.nodes[i] for i in blind["tx"].to_list()] == ["delta", "charlie"]
    assert blind["tx_inferred"].to_list() == [True, True]


def _arbitration_log(errors: int) -> synth.Synth:
    """Alpha's frames destroyed ``errors`` times by a flag in the arbitration field
    (unattributed), each followed by its successful retransmission, among the others'."""
    log = synth.Timeline()
    for node in ("bravo", "charlie", "delta"):
        log.frame(node)
    for _ in range(errors):
        log.error("alpha", 9, field="arbitration")
        log.frame("alpha")
        log.frame("bravo")
    return log.log


def test_a_flag_from_another_receiver_in_arbitration_does_not_raise_the_senders_tec() -> None:
    # from memory: ISO 11898-1:2015 clause 10.x (a transmitter that sends a recessive bit of
    # the arbitration field and monitors a dominant one has lost arbitration and goes on as
    # a receiver) and 12.1.4.2 rule c exception 2 (a stuff error during arbitration on a
    # recessive stuff bit read dominant does not raise TEC). Another node's error flag in
    # the arbitration field overwrites one or the other, so the sender's TEC stays; as a
    # receiver that detects the flag it gets REC +1 (rule a). Its own monitoring (no
    # foreign flags) counts +8.
    s = _arbitration_log(errors=3)
    ev = load_bus_evidence(s.connect(), synth.catalog(), "r1", "can0")
    alpha = ev.nodes.index("alpha")
    own = replay_node(ev, alpha)
    foreign = replay_node(ev, alpha, foreign_flags=True)
    assert (own.max_tec, own.max_rec) == (3 * 8 - 2, 0)  # +8 each, -1 per success between
    assert (foreign.max_tec, foreign.max_rec) == (0, 1)  # +1, then -1 at the next reception


def test_receive_fault_hypotheses_replay_the_others_with_foreign_flags() -> None:
    # the readings differ only in where the flag came from: under a receive fault of
    # charlie its flags cost alpha arbitration (above); under a disturbance of the whole
    # bus alpha's own monitoring finds each error (TEC +8, then -1 per own success)
    from tracelab.forensics.verdict import CatalogView, analyse

    s = _arbitration_log(errors=20)
    ev = load_bus_evidence(s.connect(), synth.catalog(), "r1", "can0")
    alpha = ev.nodes.index("alpha")
    hyps = {h.name: h for h in analyse(ev, None, CatalogView(set(), {}, set())).hyps}
    assert hyps["bus-disturbance"].replays[alpha].max_tec > 8
    assert hyps["receive-fault:charlie"].replays[alpha].max_tec == 0
    assert hyps["transmit-fault:alpha"].replays[alpha].max_tec > 8  # its own bit errors
