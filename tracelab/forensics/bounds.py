"""How sure a verdict is: the interval [earliest_ns, latest_ns] of the first degradation
(through logger losses and errors whose sender is a guess) and the calibrated score."""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
import polars as pl

from tracelab.forensics.evidence import KIND_ERROR, BusEvidence, prepare_counts
from tracelab.forensics.hypotheses import Hypothesis
from tracelab.forensics.losses import filled_evidence, loss_before
from tracelab.forensics.replay import replay_node
from tracelab.physics.confinement import ConfinementConfig

#: The confidence falls with the width of [earliest_ns, latest_ns]: halved at this width.
HALF_CONFIDENCE_WIDTH_NS = 50_000_000


#: The score of a whole-bus verdict whose log holds a transmit-side onset run (SEGMENT_RUN)
#: that no window explained and whose errors lack the CRC errors a whole-bus disturbance
#: leaves on every sender's frames: two signs against the whole bus. (Onset runs alone come
#: by chance under a busy whole-bus disturbance: the run test is scanned over every error
#: and node.)
ONSET_UNEXPLAINED_SCORE = 0.5
#: The same cap when the CRC errors alone make the whole-bus reading this much less likely
#: (log-likelihood ratio) than the share seen: it is then only the least bad reading (a
#: mixture of two node faults, most likely, which no single hypothesis describes).
CRC_DEFICIT_DECISIVE = 10.0


def bound_first(ev: BusEvidence, h: Hypothesis, first: dict[str, Any],
                 config: ConfinementConfig) -> None:
    """earliest_ns / latest_ns of the first degradation through logger losses before it:
    the reading with as many errors as each loss can hold, and the one with none."""
    t = int(first["t_ns"])
    first["earliest_ns"] = first["latest_ns"] = t
    n = ev.node_index(first["node"])
    if n < 0:
        return
    bonus = h.kind == "receive-fault" and h.node == n
    foreign = h.kind == "receive-fault" and h.node is not None and h.node != n
    _bound_guessed(ev, n, bonus, first, config, foreign)
    lo = loss_before(ev, t + 1)
    if lo is None:
        return
    tx = h.node if h.kind in ("transmit-fault", "isolation") else None
    up = filled_evidence(ev, "upper", tx, t)
    readings = [t]
    for src in (up, ev):
        if src is None:
            continue
        rep = replay_node(src, n, bonus, config, keep_rows=False, foreign_flags=foreign)
        tr = rep.first_degradation()
        if tr is not None:
            readings.append(int(tr["t_ns"]))
    earliest = max(min(readings), lo[0]) if min(readings) < t else min(readings)
    widened = earliest < int(first["earliest_ns"]) or max(readings) > int(first["latest_ns"])
    first["earliest_ns"] = min(earliest, int(first["earliest_ns"]))
    first["latest_ns"] = max(max(readings), int(first["latest_ns"]))
    first["uncertain"] = first["earliest_ns"] != first["latest_ns"]
    if widened:
        first.setdefault("bounds_from", []).append("a logger loss")


#: At most this many frames of the back-to-back run after an unidentified error are taken as
#: its possible retransmission (docs/forensics.md section 2 gives the coverage on the sweep).
GUESS_RUN_FRAMES = 6


def guess_candidates(ev: BusEvidence, t_ns: np.ndarray) -> np.ndarray:
    """Per error whose frame the logger could not identify: the transmitters it can have had,
    one column per frame of the run that follows it (-1 past the run's end).

    A destroyed frame is retransmitted at the next bus idle (ISO 11898-1 automatic
    retransmission) and wins arbitration again unless frames of higher priority were released
    meanwhile; those go first, back to back, and the retransmission follows them. A bus idle
    ends that: the pending retransmission would have started in it. So the candidates are the
    senders of the frames that follow the error back to back (each within the longest frame
    of the bus and an 11-bit gap, an error-passive transmitter's suspend time and the
    intermission, of the one before), up to GUESS_RUN_FRAMES.
    """
    ft, fn = ev.frame_t, ev.frame_node
    out = np.full((t_ns.size, GUESS_RUN_FRAMES), -1, dtype=np.int64)
    if ft.size == 0 or t_ns.size == 0:
        return out
    by_id = ev.frames_by_id
    per_frame = (by_id["busy_ns"].cast(pl.Float64)
                 / by_id["frames"].cast(pl.Float64).clip(1)).to_numpy()
    longest = float(np.nanmax(per_frame)) if per_frame.size else 0.0
    reach = longest + 11 * ev.bit_ns
    # an error frame in between keeps the bus busy too: up to a frame and 31 bits more each
    # (flag superposed 12, delimiter 8, intermission 3, suspend 8)
    err_t = np.sort(ev.events.filter(pl.col("kind") == KIND_ERROR)["t_ns"].to_numpy())
    per_error = longest + 31 * ev.bit_ns
    i = ft.searchsorted(t_ns, side="right")
    alive = i < ft.size
    for k in range(GUESS_RUN_FRAMES):  # loop over a few positions in the run
        j = np.minimum(i + k, ft.size - 1)
        if k:
            prev = np.minimum(i + k - 1, ft.size - 1)
            between = (np.searchsorted(err_t, ft[j], side="left")
                       - np.searchsorted(err_t, ft[prev], side="right"))
            alive &= (i + k < ft.size) & (ft[j] - ft[prev] <= reach + between * per_error)
        else:  # from the error itself to the first frame after it
            first_gap = ft[j] - t_ns
            between = (np.searchsorted(err_t, ft[j], side="left")
                       - np.searchsorted(err_t, t_ns, side="right"))
            alive &= first_gap <= reach + (between + 1) * per_error
        out[:, k] = np.where(alive, fn[j], -1)
    return out


def _bound_guessed(ev: BusEvidence, n: int, bonus: bool, first: dict[str, Any],
                   config: ConfinementConfig, foreign: bool = False) -> None:
    """Errors whose transmitter was guessed (flag inside the identifier): the first
    degradation of node n with every such error that n can have sent charged to n, and with
    only those that nobody else can have sent (guess_candidates); the others go to another
    candidate."""
    t = int(first["t_ns"])
    if "tx_inferred" not in ev.events.columns:
        return
    guessed_np = (ev.events["tx_inferred"].fill_null(False).to_numpy()
                  & (ev.events["t_ns"].to_numpy() <= t))
    if not guessed_np.any():
        return
    cand = guess_candidates(ev, ev.events["t_ns"].to_numpy()[guessed_np].astype(np.int64))
    tx_now = ev.events["tx"].to_numpy().astype(np.int64)
    is_n = cand == n
    someone = (cand >= 0) & ~is_n
    # n is one of those it can have been (or nothing follows back to back: anyone)
    may = is_n.any(axis=1) | (cand[:, 0] < 0)
    must = may & ~someone.any(axis=1)   # n and nobody else
    # someone else it can have been (the first such in the run)
    other = np.where(someone.any(axis=1), cand[np.arange(cand.shape[0]),
                                                someone.argmax(axis=1)], -1)
    times = []
    for charge in (np.where(may, n, tx_now[guessed_np]),
                   np.where(must, n, np.where(may, other, tx_now[guessed_np]))):
        tx_alt = tx_now.copy()
        tx_alt[guessed_np] = charge
        if np.array_equal(tx_alt, tx_now):
            continue
        alt = ev.events.with_columns(pl.Series("tx", tx_alt, dtype=pl.Int16))
        src = dataclasses.replace(ev, events=alt, _recovery_cache={})
        prepare_counts(src)
        tr = replay_node(src, n, bonus, config, keep_rows=False,
                         foreign_flags=foreign).first_degradation()
        if tr is not None:
            times.append(int(tr["t_ns"]))
    if times:
        first["earliest_ns"] = min(times + [t])
        first["latest_ns"] = max(times + [t])
        first["uncertain"] = first["earliest_ns"] != first["latest_ns"]
        if first["uncertain"]:
            first.setdefault("bounds_from", []).append(
                "errors whose frame the logger could not identify")


#: Which node a receive fault sits in rests on small differences (where its passive spells
#: fall, where errors are flagged on its own frames): the score of the node read from the
#: receive-fault hypotheses' likelihoods tempered by this factor (seed 2035's ho23: a
#: 60 ms burst, 46 errors, the wrong node by 5.4 nats, scored 0.99 untempered).
NODE_TEMPER = 3.0


def _tempered_share(h: Hypothesis, rivals: list[Hypothesis]) -> float:
    """h's posterior among ``rivals`` (h one of them) with likelihoods tempered by
    NODE_TEMPER; 1 when h has no finite rival but itself."""
    lls = [x.loglik for x in rivals if math.isfinite(x.loglik)]
    if len(lls) < 2 or not math.isfinite(h.loglik):
        return 1.0
    best = max(lls)
    total = sum(math.exp((ll - best) / NODE_TEMPER) for ll in lls)
    return math.exp((h.loglik - best) / NODE_TEMPER) / total


def _node_share(h: Hypothesis, hyps: list[Hypothesis]) -> float:
    """The tempered posterior of h's node among the receive faults of every node."""
    if not any(x is h for x in hyps):
        return 1.0
    return _tempered_share(h, [x for x in hyps if x.kind == "receive-fault"])


def _kind_share(h: Hypothesis, hyps: list[Hypothesis]) -> float:
    """The tempered posterior of h's kind (a transmit or a receive fault) at its node,
    against the other of the two at the same node: a receive-faulty node fails its own
    frames too, so when it sends short frames the two readings differ by a few nats only."""
    kinds = ("transmit-fault", "receive-fault")
    if h.kind not in kinds or h.node is None or not any(x is h for x in hyps):
        return 1.0
    return _tempered_share(h, [x for x in hyps if x.kind in kinds and x.node == h.node])


def calibrated_score(ev: BusEvidence, h: Hypothesis, hyps: list[Hypothesis],
                first: dict[str, Any] | None, thin: bool, clean: bool,
                alternatives: list[dict[str, Any]], findings: list[dict[str, Any]]) -> float:
    """The verdict's score: the posterior of what it states, lowered by what the sweep
    (bench/forensics_sweep.py, docs/forensics.md) shows to be less reliable."""
    if clean:
        return 1.0
    if alternatives:
        p = sum(a["score"] for a in alternatives)
    else:
        p = h.score
    if thin:
        p = min(p, 0.5)
    if h.kind == "receive-fault" and not alternatives:
        p = min(p, _node_share(h, hyps))
    if not alternatives:
        p = min(p, _kind_share(h, hyps))
    crc_deficit = h.parts.get("types", 0.0)
    if h.kind == "bus-disturbance" and (crc_deficit <= -CRC_DEFICIT_DECISIVE
                                        or (h.facts.get("onset_cuts") and crc_deficit < 0)):
        p = min(p, ONSET_UNEXPLAINED_SCORE)
    if first is not None:
        width = int(first.get("latest_ns", first["t_ns"])) - int(first.get("earliest_ns",
                                                                         first["t_ns"]))
        # a logger loss before the first degradation hid errors: the hypotheses were scored
        # on part of the evidence, and the wider the loss's reach the less the rest says.
        # Bounds from unidentified frames hide nothing (every error is logged, only its
        # sender is in doubt among the frames that follow it): they do not lower the score.
        lost = ("a logger loss" in (first.get("bounds_from") or [])
                or loss_before(ev, int(first.get("latest_ns", first["t_ns"])) + 1) is not None)
        if first.get("state") != "silent" and width > 0 and lost:
            p *= HALF_CONFIDENCE_WIDTH_NS / (HALF_CONFIDENCE_WIDTH_NS + width)
            if "a logger loss" not in first.setdefault("bounds_from", []):
                first["bounds_from"].append("a logger loss")
    return round(float(min(max(p, 0.0), 1.0)), 3)
