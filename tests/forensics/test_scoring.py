"""Pieces of the hypothesis scoring and the log segmentation, checked on small arrays."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binom

from tests.forensics import synth
from tracelab.forensics import replay_faults
from tracelab.forensics.hypotheses import _binomial, _position_split
from tracelab.forensics.verdict import _run_start

FRAME_NS = synth.FRAME_BITS * synth.BIT_NS


def test_binomial_loglik_at_the_fitted_share_matches_scipy() -> None:
    # source: scipy.stats.binom.logpmf (the binomial coefficient is common to every
    # hypothesis and left out of _binomial)
    for k, n in ((3, 10), (31, 34), (135, 269), (1, 2)):
        want = binom.logpmf(k, n, k / n) - math.log(math.comb(n, k))
        assert math.isclose(_binomial(k, n), want, rel_tol=1e-12, abs_tol=1e-12)
    assert _binomial(0, 10) == 0.0 and _binomial(10, 10) == 0.0  # derived: 0 log 0 = 0


def test_a_group_with_its_own_stuff_share_is_preferred_only_when_it_differs() -> None:
    # derived: 34 errors on the culprit's own frames, 31 stuff (its monitoring flags at once);
    # 269 on others' frames, 135 stuff (receptions found mostly at the CRC check)
    own = np.r_[np.ones(31, bool), np.zeros(3, bool)]
    rest = np.r_[np.ones(135, bool), np.zeros(134, bool)]
    stuff = np.r_[own, rest]
    usable = np.ones(stuff.size, bool)
    group = np.r_[np.ones(own.size, bool), np.zeros(rest.size, bool)]
    penalty = 0.5 * math.log(stuff.size)
    gain = _position_split(stuff, usable, group, penalty)
    split = _binomial(31, 34) + _binomial(135, 269) - _binomial(166, 303)
    assert gain == split - penalty and gain > 5
    # the same share in both groups: the extra share only costs its penalty
    same = np.r_[np.ones(17, bool), np.zeros(17, bool), np.ones(135, bool), np.zeros(134, bool)]
    assert _position_split(same, usable, group, penalty) < 0
    # fewer than POSITION_MIN_ERRORS errors in a group: no evidence either way
    tiny = np.zeros(stuff.size, bool)
    tiny[:3] = True
    assert _position_split(stuff, usable, tiny, penalty) == 0.0


def test_a_run_start_is_the_first_error_of_a_run_on_that_node() -> None:
    # derived: 40 errors spread over nodes 0..3, then from index 40 on 3 of every 4 on node 4
    tx = np.r_[np.tile([0, 1, 2, 3], 10), np.tile([4, 4, 4, 1], 15)]
    t = np.arange(tx.size) * 1000
    assert _run_start(tx, t, 4, run=30, share=0.6) == 40_000
    assert _run_start(tx, t, 2, run=30, share=0.6) is None
    assert _run_start(tx[:20], t[:20], 4, run=30, share=0.6) is None


def _rx_behind_a_loss(seed: int, extra: int) -> tuple[synth.Synth, int]:
    """A receive fault in charlie whose onset and climb to error-passive the logger lost."""
    s = synth.generate(6000, fault="rx", culprit="charlie", p=0.25, attribute=False,
                       seed=seed, fault_from_slot=400)
    passive = next(tr["t_ns"] for tr in s.transitions["charlie"] if tr["to"] == "error-passive")
    lo, hi = s.frames[380]["t_ns"], passive + extra * FRAME_NS
    lost = [f for f in s.frames if lo <= f["t_ns"] < hi] + \
        [e for e in s.errors if lo <= e["t_ns"] < hi]
    s.frames = [f for f in s.frames if not lo <= f["t_ns"] < hi]
    s.errors = [e for e in s.errors if not lo <= e["t_ns"] < hi]
    s.losses.append({"run": "r1", "bus": "can0", "t_ns": int(lo), "count": len(lost),
                     "until_ns": int(hi), "file": "synthetic.frames", "line": 1})
    return s, int(hi)


@pytest.mark.parametrize("extra", [200, 600])
def test_a_receive_fault_behind_a_logger_loss_is_read_through_the_loss(
        extra: int, monkeypatch: pytest.MonkeyPatch) -> None:
    # derived: the counters at the loss's end are unknown; the receive-fault hypothesis takes
    # the reading of the loss under which it explains the logged errors best
    s, _ = _rx_behind_a_loss(12, extra)
    v = replay_faults(s.connect(), synth.catalog()).as_json()["results"][0]
    assert v["cause"] == {"kind": "receive-fault", "node": "charlie"}
    assert v["first_degraded"]["node"] == "charlie"
    t_true = min(tr["t_ns"] for tr in s.transitions["charlie"])
    fd = v["first_degraded"]
    assert fd["earliest_ns"] - 3 * FRAME_NS <= t_true <= fd["latest_ns"] + 3 * FRAME_NS
    # with only the most likely reading of the loss (errors at the rate around it) the logged
    # part is read as another cause (this case: alpha cut off)
    from tracelab.forensics import verdict

    monkeypatch.setattr(verdict, "LOSS_READINGS", ("rate",))
    w = replay_faults(s.connect(), synth.catalog()).as_json()["results"][0]
    assert w["cause"] != v["cause"]


def test_an_unidentified_error_can_belong_to_the_back_to_back_run_after_it() -> None:
    # derived from ISO 11898-1 automatic retransmission: the destroyed frame goes out again
    # at the next bus idle, after any higher-priority frames released meanwhile; a bus idle
    # ends the run (the retransmission would have started in it)
    from types import SimpleNamespace
    from typing import Any, cast

    import polars as pl

    from tracelab.forensics.bounds import GUESS_RUN_FRAMES, guess_candidates
    from tracelab.forensics.evidence import KIND_ERROR

    bit = 2000.0  # ns at 500 kbit/s
    frame = 125 * bit
    # frames end at these times (ns); senders 0..3; a 1 ms idle after the third frame
    ends = np.array([1, 2, 3, 8, 9], dtype=np.float64) * frame
    ends[3:] += 1_000_000
    ev = SimpleNamespace(
        frame_t=ends.astype(np.int64), frame_node=np.array([2, 1, 3, 0, 1]), bit_ns=bit,
        frames_by_id=pl.DataFrame({"busy_ns": [5 * frame], "frames": [5]}),
        events=pl.DataFrame({"kind": [KIND_ERROR], "t_ns": [int(0.5 * frame)]},
                            schema={"kind": pl.Int8, "t_ns": pl.Int64}))
    cand = guess_candidates(cast(Any, ev), np.array([int(0.5 * frame)], dtype=np.int64))
    assert cand.shape == (1, GUESS_RUN_FRAMES)
    assert cand[0].tolist()[:4] == [2, 1, 3, -1]  # the run stops at the idle
    # an error right before the idle: nothing follows back to back except the next frame
    late = guess_candidates(cast(Any, ev), np.array([int(3.2 * frame)], dtype=np.int64))
    assert late[0].tolist()[0] == -1  # the next frame is 1 ms away: anyone


def test_a_whole_bus_verdict_that_leaves_an_onset_run_unexplained_is_not_confident() -> None:
    # derived: a run of 30 errors with 60 % on one node's frames comes by chance under a
    # whole-bus disturbance about 1e-4 of the time per position (binomial tail); when the
    # whole-bus reading still wins over the windows cut there and the CRC errors it leaves on
    # every sender's frames are missing too, its score is capped
    from typing import Any, cast

    from tracelab.forensics.bounds import ONSET_UNEXPLAINED_SCORE, calibrated_score
    from tracelab.forensics.hypotheses import Hypothesis

    h = Hypothesis("bus-disturbance", "bus-disturbance", None, [])
    h.score = 1.0
    ev = cast(Any, None)
    assert calibrated_score(ev, h, [h], None, False, False, [], []) == 1.0
    h.facts["onset_cuts"] = 1
    assert calibrated_score(ev, h, [h], None, False, False, [], []) == 1.0  # CRC errors seen
    h.parts["types"] = -40.0  # no CRC error on the other senders' frames
    assert calibrated_score(ev, h, [h], None, False, False, [], []) == ONSET_UNEXPLAINED_SCORE < 0.9


@pytest.mark.parametrize("k,n", [(0, 40), (1, 500), (5, 60), (30, 100)])
def test_crc_deficit_is_the_binomial_likelihood_ratio(k: int, n: int) -> None:
    # source: scipy.stats.binom (a general-purpose reference): the ratio of the binomial
    # likelihoods at the whole-bus share and at the share seen (the coefficients cancel)
    from tracelab.forensics.hypotheses import P_CRC_BUS, crc_deficit

    want = binom.logpmf(k, n, P_CRC_BUS) - binom.logpmf(k, n, k / n)
    assert crc_deficit(k, n) == pytest.approx(want, abs=1e-9)


def test_a_whole_bus_verdict_with_a_decisive_crc_deficit_is_not_confident() -> None:
    # common practice, no source: a listen-only logger records CRC errors only where
    # corrupted bits were on the wire; a whole-bus disturbance puts them on every sender's
    # frames, so far too few of them leave the whole-bus reading as the least bad one only
    from typing import Any, cast

    from tracelab.forensics.bounds import (
        CRC_DEFICIT_DECISIVE,
        ONSET_UNEXPLAINED_SCORE,
        calibrated_score,
    )
    from tracelab.forensics.hypotheses import Hypothesis

    h = Hypothesis("bus-disturbance", "bus-disturbance", None, [])
    h.score = 1.0
    ev = cast(Any, None)
    h.parts["types"] = -CRC_DEFICIT_DECISIVE / 2  # a small deficit: chance at few errors
    assert calibrated_score(ev, h, [h], None, False, False, [], []) == 1.0
    h.parts["types"] = -CRC_DEFICIT_DECISIVE
    assert calibrated_score(ev, h, [h], None, False, False, [], []) == ONSET_UNEXPLAINED_SCORE


def test_a_receive_fault_named_by_a_few_nats_over_another_node_is_not_confident() -> None:
    # derived (docs/forensics.md section 8, seed 2035): which node a receive fault sits in
    # rests on small likelihood differences, so the node's score is its share among the
    # receive faults of every node with likelihoods tempered by NODE_TEMPER
    from typing import Any, cast

    from tracelab.forensics.bounds import NODE_TEMPER, calibrated_score
    from tracelab.forensics.hypotheses import Hypothesis

    def rx(node: int, loglik: float, score: float) -> Hypothesis:
        h = Hypothesis(f"receive-fault:n{node}", "receive-fault", node, [])
        h.loglik, h.score = loglik, score
        return h

    ev = cast(Any, None)
    best, near, far = rx(0, -831.5, 0.99), rx(1, -836.9, 0.01), rx(2, -900.0, 0.0)
    got = calibrated_score(ev, best, [best, near, far], None, False, False, [], [])
    want = 1 / (1 + math.exp(-5.4 / NODE_TEMPER) + math.exp(-68.5 / NODE_TEMPER))
    assert got == round(want, 3) and got < 0.9
    clear = rx(1, -860.0, 0.0)  # 28.5 nats behind: the node is not in doubt
    assert calibrated_score(ev, best, [best, clear], None, False, False, [], []) == 0.99


def test_a_clean_stretch_after_the_last_error_does_not_change_the_scores() -> None:
    # derived: each hypothesis fits its error rates over the stretch of the log that has
    # errors, so a fault burst followed by an hour of clean traffic is not read as a low rate
    # spread over the hour; without that the receive-fault reading (its node's passive time
    # is fixed, its active time grows with the clean tail) lost ground to the others as the
    # log got longer
    from tracelab.forensics.evidence import load_bus_evidence
    from tracelab.forensics.verdict import _catalog_view, analyse

    def error_parts(s: synth.Synth) -> dict[str, float]:
        ev = load_bus_evidence(s.connect(), synth.catalog(), "r1", "can0")
        an = analyse(ev, None, _catalog_view(synth.catalog(), "can0", ev.nodes))
        return {h.name: h.parts["errors"] for h in an.hyps if "errors" in h.parts}

    burst = synth.generate(400, fault="rx", culprit="charlie", p=0.5, attribute=False, seed=3)
    short = error_parts(burst)
    t = max(f["end_ns"] for f in burst.frames)
    line = len(burst.frames) + len(burst.errors)
    for k in range(20_000):  # clean frames in the usual pattern, back to back
        sender = synth.PATTERN[k % len(synth.PATTERN)]
        line += 1
        end = t + int(FRAME_NS)
        burst.frames.append({**burst.frames[0], "t_ns": end - int(3 * synth.BIT_NS),
                             "start_ns": t, "end_ns": end, "id": synth.IDS[sender],
                             "line": line})
        t = end
    long_ = error_parts(burst)
    assert short.keys() == long_.keys() and "receive-fault:charlie" in short
    base_s, base_l = short["bus-disturbance"], long_["bus-disturbance"]
    for name in short:
        if math.isfinite(short[name]):
            assert long_[name] - base_l == pytest.approx(short[name] - base_s, abs=1e-6)


def test_a_transmit_fault_named_by_a_few_nats_over_a_receive_fault_of_its_node_is_not_confident(
        ) -> None:
    # derived (docs/forensics.md section 9, seed 2039): a receive-faulty node fails its own
    # frames as well, so for a node with short frames the two kinds at that node differ by a
    # few nats; the verdict's score is the kind's share at the node, tempered by NODE_TEMPER
    from typing import Any, cast

    from tracelab.forensics.bounds import NODE_TEMPER, calibrated_score
    from tracelab.forensics.hypotheses import Hypothesis

    def h(kind: str, node: int, loglik: float, score: float) -> Hypothesis:
        x = Hypothesis(f"{kind}:n{node}", kind, node, [])
        x.loglik, x.score = loglik, score
        return x

    ev = cast(Any, None)
    tx, rx = h("transmit-fault", 4, -2222.1, 0.93), h("receive-fault", 4, -2224.7, 0.07)
    other = h("receive-fault", 1, float("-inf"), 0.0)
    got = calibrated_score(ev, tx, [tx, rx, other], None, False, False, [], [])
    assert got == round(1 / (1 + math.exp(-2.6 / NODE_TEMPER)), 3) and got < 0.9
    far = h("receive-fault", 4, -2300.0, 0.0)  # 78 nats behind: the kind is not in doubt
    assert calibrated_score(ev, tx, [tx, far], None, False, False, [], []) == 0.93
