"""Candidate explanations of a bus's errors, replayed and scored against the evidence.

Each hypothesis fixes who detected unattributed errors first (which changes the replayed REC)
and predicts where the visible errors should fall: on every sender in proportion to its bus
time (whole-bus disturbance, or a receive fault while the faulty node is still error-active),
or on one node's frames only (a transmit fault, an isolated node, a receive-faulty node once it
is error-passive). The score is a log-likelihood of what the log shows: the sender and type of
every errored frame, ESI bits, silences, status records. docs/forensics.md gives the reasoning.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl

from tracelab.forensics.evidence import KIND_ERROR, BusEvidence, flag_lengths, with_extra_errors
from tracelab.forensics.framestore import Column, step_sample, steps_over
from tracelab.forensics.losses import trim_to_losses
from tracelab.forensics.replay import NodeReplay, replay_node
from tracelab.physics.confinement import (
    DEFAULT_CONFIG,
    RECOVERY_SEQUENCE_BITS,
    RECOVERY_SEQUENCES,
    ConfinementConfig,
)

#: Probability of a type a hypothesis does not expect (an isolated node's non-ACK error).
EPS = 0.02
#: Share of ACK errors among errors that a hypothesis does not attribute to a missing ACK.
P_ACK_OTHER = 0.05
#: Likelihood factor of one ESI bit contradicting the replayed state, and the cap per node.
P_ESI_MISMATCH = 0.2
ESI_CAP = 30
#: Factors for silences: a predicted bus-off without silence, an unexplained silence.
P_BUS_OFF_NOT_SILENT = 0.05
P_UNEXPLAINED_SILENCE = 0.05
#: Status records: Laplace scale of the counter difference, and the cap per record.
STATUS_SCALE = 8.0
STATUS_CAP = 10.0
#: Prior weight of the whole-bus explanation (the rest is split over node hypotheses).
PRIOR_BUS = 0.5
MIN_ERRORS = 3
#: A node hypothesis must change an error rate by at least this factor against the rest of
#: the bus; smaller differences come from frame lengths, arbitration and the noise model.
RATE_MARGIN = 2.0
#: A node-specific cause must explain at least this share of the errors in its window.
MIN_SHARE = 0.5
#: Errors a receive-fault replay may leave on others' frames while it calls the node passive
#: (replayed passive intervals can be off by a frame at each REC 119 <-> 128 toggle).
PASSIVE_BOUNDARY_ERRORS = 2
#: A flood: an identifier at least this many times its catalog rate, or absent from the
#: catalog, with at least FLOOD_MIN_FRAMES frames at FLOOD_MIN_PER_S or more.
FLOOD_FACTOR = 4.0
FLOOD_MIN_FRAMES = 200
FLOOD_MIN_PER_S = 200.0
#: Superposed (12-bit) error flags mean one node detected first; a whole-bus disturbance is
#: detected by every node on the same bit (6-bit flag). Share of long flags from which the
#: whole-bus reading is charged, the likelihood of a long flag under it, and the cap.
LONG_FLAG_SHARE = 0.7
P_LONG_FLAG_BUS = 0.1
FLAG_CAP = 40.0
#: A listen-only logger records a CRC error only when corrupted bits were on the wire: the
#: whole-bus reading expects at least this share of CRC errors among its errors.
P_CRC_BUS = 0.3
CRC_MIN_ERRORS = 5
#: Where in the frame an error is flagged (section 3 of docs/forensics.md): a transmitter
#: monitors every bit it sends and flags a bit error at once, anywhere in the frame (a
#: listen-only logger then records a stuff error, or a form error in a fixed-form field); a
#: receiver whose bits are corrupted mostly finds out only at the CRC check (flagged after the
#: ACK delimiter: the logger records a form error) unless the bit breaks the stuffing first.
#: So under a receive fault in N the stuff share of errors on N's own frames (its monitoring
#: while it transmits) differs from the share on others' frames (its reception). Minimum
#: errors in each group before the split is scored.
POSITION_MIN_ERRORS = 5
#: ACK errors a lone transmitter needs to go from TEC 0 to error-passive (16 x 8 = 128).
PASSIVE_ATTEMPTS = 16


@dataclass(frozen=True)
class Silence:
    node: int
    from_ns: int
    to_ns: int | None  # None: the node never came back before the end of the log
    latest_from_ns: int | None = None  # a logger loss after its last frame: the latest it
    #                                    can have vanished (None: exactly from_ns)


@dataclass(frozen=True)
class Flood:
    id: int
    ext: bool
    sender: int            # node index, -1 when the catalog does not know the identifier
    from_ns: int
    to_ns: int
    frames: int
    catalog_frames: float | None  # what the catalog's period predicts over the same span


@dataclass
class Hypothesis:
    name: str
    kind: str  # bus-disturbance | receive-fault | transmit-fault | isolation | silence | flood
    node: int | None
    replays: list[NodeReplay]
    loglik: float = 0.0
    parts: dict[str, float] = field(default_factory=dict)
    facts: dict[str, Any] = field(default_factory=dict)
    prior: float = 0.0
    score: float = 0.0
    why: str = ""
    flood: Flood | None = None
    #: the reading of the log this hypothesis was scored on when it is not the bus's own
    #: (unidentified errors charged to its node: verdict._attribution_variants)
    evidence: BusEvidence | None = None


def node_silences(ev: BusEvidence, gaps: pl.DataFrame | None = None,
                  catalog_keys: dict[int, set[tuple[int, bool]]] | None = None) -> list[Silence]:
    """Intervals in which all of a node's identifiers were silent, outside logger losses.

    With the timing analysis' per-message gaps, a node is silent where the gaps of all its
    periodic messages overlap; otherwise (and for the open end of the log) the silences are the
    gaps between the node's own frames longer than 8 median and 4 99th-percentile intervals
    and than the minimum bus-off recovery time.
    """
    min_ns = RECOVERY_SEQUENCES * RECOVERY_SEQUENCE_BITS * ev.bit_ns
    out: list[Silence] = []
    for n, own in enumerate(ev.own_t):  # loop over nodes
        if own.size == 0:
            if catalog_keys and catalog_keys.get(n) and ev.frames:
                out.append(Silence(n, ev.first_t_ns, None))
            continue
        if own.size > 1:
            sample = step_sample(own, 200_000)  # quantiles of a long run: sample
            median, p99 = (float(v) for v in np.percentile(sample, [50, 99]))
        else:
            median = p99 = float(ev.last_t_ns - ev.first_t_ns)
        limit = max(8.0 * median, 4.0 * p99, min_ns)
        found: list[tuple[int, int | None]] = []
        if gaps is not None and catalog_keys and catalog_keys.get(n) and gaps.height:
            found = _intersect_gaps(gaps, catalog_keys[n], own, min_ns)
        else:
            idx = steps_over(own, limit)
            found = [(int(own[i]), int(own[i + 1])) for i in idx.tolist()]
        if ev.last_t_ns - int(own[-1]) > limit:
            found.append((int(own[-1]), None))
        for a, b in found:  # loop over silences (rare)
            end = b if b is not None else ev.last_t_ns
            pieces = trim_to_losses(ev, a, end)
            outside = sum(y - x for x, y in pieces)
            if not pieces or outside < limit:
                continue  # the loss hides it: nothing outside the loss says it was silent
            # it vanished between its last frame seen and, when a loss follows that frame
            # before it was due again, the end of that loss
            if pieces[0][0] > a:
                latest = pieces[0][0]
            elif pieces[0][1] - a < limit and len(pieces) > 1:
                latest = pieces[1][0]
            else:
                latest = a
            out.append(Silence(n, a, b, latest))
    return sorted(out, key=lambda s: s.from_ns)


def _intersect_gaps(gaps: pl.DataFrame, keys: set[tuple[int, bool]], own: Column,
                    min_ns: float) -> list[tuple[int, int | None]]:
    """Where every one of ``keys`` is inside a gap at once, and no own frame falls inside."""
    mine = gaps.filter(pl.struct("id", "ext").map_elements(
        lambda s: (int(s["id"]), bool(s["ext"])) in keys, return_dtype=pl.Boolean))
    if mine.height == 0:
        return []
    per_key = mine.group_by("id", "ext").agg("from_ns", "to_ns")
    if per_key.height < len(keys):
        return []
    current: list[tuple[int, int]] | None = None
    for row in per_key.iter_rows(named=True):  # loop over a node's messages
        spans = sorted(zip(row["from_ns"], row["to_ns"], strict=True))
        if current is None:
            current = spans
            continue
        merged: list[tuple[int, int]] = []
        for a, b in current:
            for c, d in spans:
                lo, hi = max(a, c), min(b, d)
                if hi > lo:
                    merged.append((lo, hi))
        current = merged
    out: list[tuple[int, int | None]] = []
    for a, b in current or []:
        i = own.searchsorted(a, side="right")
        j = own.searchsorted(b, side="left")
        if j <= i and b - a >= min_ns:
            out.append((a, b))
    return out


def unexplained_silences(ev: BusEvidence, replays: list[NodeReplay],
                         silences: list[Silence]) -> list[Silence]:
    """Silences that no replayed bus-off episode of the same node falls into."""
    out = []
    for s in silences:  # loop over silences (rare)
        end = s.to_ns if s.to_ns is not None else ev.last_t_ns + 1
        if not any(s.from_ns <= off["from_ns"] <= end for off in replays[s.node].bus_off):
            out.append(s)
    return out


def find_floods(ev: BusEvidence, periods: dict[tuple[int, bool], int]) -> list[Flood]:
    """Identifiers sent far above their catalog rate, or absent from the catalog, at a rate
    no periodic message of a bus has (one query over the few suspects)."""
    by_id = ev.frames_by_id
    if by_id.height == 0 or ev.con is None:
        return []
    span_s = max(1e-9, (ev.last_t_ns - ev.first_t_ns) / 1e9)
    rows = [(int(i), bool(x), int(f or 0), int(c), periods.get((int(i), bool(x))))
            for i, x, f, c in by_id.select("id", "ext", "frames",
                                           pl.col("code").fill_null(-1)).iter_rows()]
    # how far the log's rates sit from the catalog's as a rule (a catalog whose periods are
    # all off does not make every identifier a flood): the median ratio and rate
    ratios = [f * p / (span_s * 1e9) for _i, _x, f, _c, p in rows if p is not None and f]
    usual = float(np.median(ratios)) if ratios else 1.0
    rates = [f / span_s for _i, _x, f, _c, p in rows if p is not None and f]
    usual_rate = float(np.median(rates)) if rates else 0.0
    suspects = []
    for fid, ext, frames, code, period in rows:
        if frames < FLOOD_MIN_FRAMES:
            continue
        if period is None and code >= 0:
            continue  # an event-driven message of the catalog
        if period is not None and frames < FLOOD_FACTOR * max(1.0, usual) * span_s * 1e9 / period:
            continue
        if period is None and frames / span_s < FLOOD_FACTOR * usual_rate:
            continue
        suspects.append((fid, ext, code, period))
    out = []
    for fid, ext, code, period in suspects:  # loop over suspect identifiers (rare)
        # the flood window: where this identifier runs at more than FLOOD_FACTOR x its
        # catalog rate (or FLOOD_MIN_PER_S), from its gaps
        t = np.asarray(ev.con.execute(
            f"SELECT t_ns FROM frames WHERE run = ? AND bus = ? AND id = {fid} AND ext = "
            f"{str(ext).lower()} ORDER BY t_ns", [ev.run, ev.bus]).fetchnumpy()["t_ns"],
            dtype=np.int64)
        fast_gap = min(1e9 / FLOOD_MIN_PER_S,
                       period / FLOOD_FACTOR if period is not None else math.inf)
        dense = np.flatnonzero(np.diff(t) <= fast_gap)
        if dense.size < FLOOD_MIN_FRAMES:
            continue
        a, b = int(t[dense[0]]), int(t[dense[-1] + 1])
        n = int(dense.size) + 1
        expect = (b - a) / period if period is not None else None
        out.append(Flood(fid, ext, code, a, b, n, expect))
    return out


def candidates(ev: BusEvidence, base: list[NodeReplay], first: list[NodeReplay],
               silences: list[Silence], floods: list[Flood] | None = None,
               rx_base: list[NodeReplay] | None = None) -> list[Hypothesis]:
    """The hypotheses worth scoring for this bus; ``rx_base``: the other nodes' replays
    under a receive fault (replay.base_replays with foreign_flags), default ``base``."""
    errors = ev.events.filter(pl.col("kind") == KIND_ERROR)
    tx = errors["tx"].to_numpy()
    ack = (errors["type"] == "ack").to_numpy()
    by = errors["by_node"].to_numpy()
    out = [Hypothesis("bus-disturbance", "bus-disturbance", None, list(base))]
    for n, name in enumerate(ev.nodes):  # loop over nodes
        on_own = int(np.sum(tx == n))
        if first[n].first_bonus_events or bool(np.any(by == n)):
            reps = list(base if rx_base is None else rx_base)
            reps[n] = first[n]
            out.append(Hypothesis(f"receive-fault:{name}", "receive-fault", n, reps))
        if on_own:
            out.append(Hypothesis(f"transmit-fault:{name}", "transmit-fault", n, list(base)))
        if int(np.sum((tx == n) & ack)):
            out.append(Hypothesis(f"isolation:{name}", "isolation", n, list(base)))
    unexplained = unexplained_silences(ev, base, silences)
    for n in sorted({s.node for s in unexplained}):
        out.append(Hypothesis(f"silence:{ev.nodes[n]}", "silence", n, list(base)))
        if f"isolation:{ev.nodes[n]}" in {h.name for h in out}:
            continue
        far = _far_side_isolation(ev, n, next(s for s in unexplained if s.node == n))
        if far is not None:
            reps = list(base)
            reps[n] = far
            h = Hypothesis(f"isolation:{ev.nodes[n]}", "isolation", n, reps)
            h.facts["far_side"] = True
            out.append(h)
    for h in out:
        h.facts["floods"] = list(floods or [])
    for f in floods or []:
        who = ev.nodes[f.sender] if f.sender >= 0 else None
        h = Hypothesis(f"flood:{f.id:03X}" + (f":{who}" if who else ""), "flood",
                       f.sender if f.sender >= 0 else None, list(base))
        h.flood = f
        h.facts["floods"] = list(floods or [])
        out.append(h)
    others = len(out) - 1
    for h in out:
        h.prior = PRIOR_BUS if h.kind == "bus-disturbance" else \
            (1 - PRIOR_BUS) / max(1, others)
    if others == 0:
        out[0].prior = 1.0
    return out


def _far_side_isolation(ev: BusEvidence, n: int, silence: Silence,
                        config: ConfinementConfig = DEFAULT_CONFIG) -> NodeReplay | None:
    """Replay of node n as cut off from the logger's side of the bus during its silence.

    Unseen by the logger, it retransmits its first missing frame back to back, each attempt
    an ACK error (+8) until error-passive at the 16th; further ACK errors do not count (rule c,
    exception 1). The first attempt is the first release of its periodic messages after the
    last frame seen (last start + period).
    """
    if ev.con is None or silence.node != n:
        return None
    ids = ev.frames_by_id.filter(pl.col("code") == n)
    if ids.height == 0:
        return None
    where = (f"run = '{ev.run.replace(chr(39), chr(39) * 2)}' AND bus = "
             f"'{ev.bus.replace(chr(39), chr(39) * 2)}'")
    keys = ", ".join(f"({int(i)}, {str(bool(x)).lower()})"
                     for i, x in ids.select("id", "ext").iter_rows())
    rows = ev.con.execute(
        f"SELECT id, ext, max(start_ns) AS last_start, "
        f"quantile_disc(t_ns - lag_t, 0.5) AS period_ns, avg(duration_ns) AS dur_ns FROM ("
        f"SELECT id, ext, start_ns, t_ns, duration_ns, lag(t_ns) OVER (PARTITION BY id, ext "
        f"ORDER BY t_ns) AS lag_t FROM frames WHERE {where} AND (id, ext) IN ({keys}) "
        f"AND t_ns <= {silence.from_ns}) GROUP BY id, ext").fetchall()
    best: tuple[float, float, int] | None = None
    for fid, _ext, last_start, period_ns, dur_ns in rows:  # loop over the node's messages
        if period_ns is None or last_start is None:
            continue
        release = float(last_start) + float(period_ns)
        if best is None or release < best[0]:
            best = (release, float(dur_ns), int(fid))
    if best is None:
        return None
    release, dur_ns, fid = best
    ack_at = dur_ns - 11 * ev.bit_ns  # the ACK delimiter: 11 bits before the frame's end
    attempt_ns = dur_ns + 6 * ev.bit_ns  # up to the ACK slot, then flag 6, delimiter 8, IFS 3
    times = [int(release + k * attempt_ns + ack_at) for k in range(PASSIVE_ATTEMPTS)]
    if silence.to_ns is not None:
        times = [t for t in times if t < silence.to_ns]
    if not times:
        return None
    return replay_node(with_extra_errors(ev, times, n, "ack", fid), n, False, config)


def _poisson(k: int, exposure_ns: float) -> float:
    """Log-likelihood of k errors over exposure_ns of bus time at the fitted rate k / exposure.

    Errors hit an attempt in proportion to its length (noise per bit), so each group of
    attempts has a rate per ns of bus time; the per-attempt terms common to every hypothesis
    (the lengths of the errored attempts) are left out.
    """
    if k <= 0 or exposure_ns <= 0:
        return 0.0
    return k * math.log(k / exposure_ns) - k


def _binomial(k: int, n: int) -> float:
    """Log-likelihood of k successes in n trials at the fitted probability k / n."""
    if n <= 0 or k <= 0 or k >= n:
        return 0.0
    p = k / n
    return k * math.log(p) + (n - k) * math.log(1 - p)


def crc_deficit(k: int, n: int, share: float = P_CRC_BUS) -> float:
    """How much less likely k CRC errors among n are at the share a whole-bus disturbance
    leaves than at the share seen: the log-likelihood ratio of two binomials (<= 0)."""
    if n <= 0:
        return 0.0
    at_bus = k * math.log(share) + (n - k) * math.log(1 - share)
    return at_bus - _binomial(k, n)


def _position_split(stuff: np.ndarray, usable: np.ndarray, group: np.ndarray,
                    penalty: float) -> float:
    """Gain in log-likelihood of the stuff share of errors when ``group`` gets its own share
    (against one share for all usable errors), minus a BIC penalty for the extra share; 0
    when either side has fewer than POSITION_MIN_ERRORS errors."""
    g = usable & group
    r = usable & ~group
    n_g, n_r = int(g.sum()), int(r.sum())
    if n_g < POSITION_MIN_ERRORS or n_r < POSITION_MIN_ERRORS:
        return 0.0
    k_g, k_r = int((stuff & g).sum()), int((stuff & r).sum())
    split = _binomial(k_g, n_g) + _binomial(k_r, n_r)
    return split - _binomial(k_g + k_r, n_g + n_r) - penalty


def _count_in(times: Column, intervals: list[tuple[int, int]]) -> int:
    """Number of sorted times inside the (a, b] intervals (vectorised per interval list)."""
    if not intervals or times.size == 0:
        return 0
    a = np.array([i[0] for i in intervals], dtype=np.int64)
    b = np.array([i[1] for i in intervals], dtype=np.int64)
    return int((times.searchsorted(b, side="right")
                - times.searchsorted(a, side="right")).sum())


def score(ev: BusEvidence, hyps: list[Hypothesis], silences: list[Silence]) -> None:
    """Log-likelihood of the evidence under each hypothesis; scores are posteriors.

    The bus time of all attempts (frames in the log, and the frames errors destroyed) is split
    into groups, each with its own fitted error rate per ns and a BIC penalty per rate: the
    whole bus (one rate); one node's frames vs the rest (transmit fault, isolation); and, for
    a receive fault, the time while the node could flag errors vs the time it was
    error-passive, its own frames apart (where a receive fault predicts no errors on others'
    frames). A hypothesis wins by predicting where and when errors are absent as well.
    Rates are fitted over the stretch from the first error to the last (the clean rest of the
    log says nothing about them). A hypothesis scored on its own reading of who sent the
    unidentified frames (``h.evidence``) pays one more penalty for that choice.
    """
    errors = ev.events.with_row_index("k").filter(pl.col("kind") == KIND_ERROR)
    k_idx = errors["k"].to_numpy()
    tx = errors["tx"].to_numpy().astype(np.int64)
    by = errors["by_node"].to_numpy().astype(np.int64)
    ack = (errors["type"] == "ack").to_numpy()
    known = tx >= 0
    n_err = int(tx.size)
    total_busy = float(ev.frames_by_id["busy_ns"].sum() or 0.0)
    mean_ns = total_busy / ev.frames if ev.frames else 250_000.0
    node_mean = np.array([ev.share[n] * total_busy / own.size if own.size else mean_ns
                          for n, own in enumerate(ev.own_t)])
    # the rates are fitted over the stretch of the log that has errors (a burst in a long
    # clean log is not a low rate spread over all of it): frames from the first error to the
    # last, a mean frame either side
    err_t = errors["t_ns"].to_numpy().astype(np.int64)
    lo = int(err_t.min()) - int(mean_ns) if err_t.size else ev.first_t_ns
    hi = int(err_t.max()) + int(mean_ns) if err_t.size else ev.last_t_ns + 1
    own_w = np.array([int(own.searchsorted(hi, side="right") - own.searchsorted(lo))
                      for own in ev.own_t], dtype=np.int64)
    frames_w = int(ev.frame_t.searchsorted(hi, side="right") - ev.frame_t.searchsorted(lo))
    node_busy = own_w * node_mean
    total_busy = float(node_busy.sum()) + max(0, frames_w - int(own_w.sum())) * mean_ns
    exposure = total_busy + n_err * mean_ns
    penalty = 0.5 * math.log(max(2, frames_w + n_err))
    lp_type_other = np.where(ack, math.log(P_ACK_OTHER), math.log(1 - P_ACK_OTHER))
    n_nodes = max(1, len(ev.nodes))
    attributed = (by >= 0) & known & (by != tx)
    lp_by_uniform = np.where(attributed, -math.log(n_nodes), 0.0)
    bus_rate = _poisson(n_err, exposure) - penalty
    short, long_ = flag_lengths(ev)
    flags_bus = 0.0
    if long_ + short >= 3 and long_ >= LONG_FLAG_SHARE * (long_ + short):
        flags_bus = max(-FLAG_CAP, long_ * math.log(P_LONG_FLAG_BUS)
                        + short * math.log(1 - P_LONG_FLAG_BUS))
    # CRC errors: a receive-side fault puts corrupted bits on the wire only on its own frames
    # once it is error-passive; a whole-bus disturbance on every sender's frames. So the
    # errors on frames of every sender but the one with most CRC errors should show some.
    types = errors["type"].fill_null("").to_numpy()
    is_crc = types == "crc"
    crc_top = int(np.bincount(tx[is_crc & known], minlength=1).argmax()) \
        if bool((is_crc & known).any()) else -1
    rest = ~ack & (tx != crc_top)
    crc_rest = int(np.sum(is_crc & rest))
    # where errors are flagged: the stuff share per sender group (POSITION_MIN_ERRORS)
    stuff = types == "stuff"
    usable = known & ~ack & np.isin(types, ["stuff", "form", "crc"])
    pos_penalty = 0.5 * math.log(max(2, int(usable.sum())))
    crc_bus = 0.0
    n_rest = int(rest.sum())
    if n_rest >= CRC_MIN_ERRORS and crc_rest < P_CRC_BUS * n_rest \
            and not bool(np.any(types == "bit")):
        crc_bus = max(-FLAG_CAP, crc_deficit(crc_rest, n_rest))
    for h in hyps:  # loop over hypotheses (a few per node)
        n = h.node
        tx_h, known_h = tx, known
        if h.evidence is not None:  # its own reading of who sent the unidentified frames
            tx_h = h.evidence.events.filter(pl.col("kind") == KIND_ERROR)["tx"].to_numpy(
                ).astype(np.int64)
            known_h = tx_h >= 0
        if h.kind in ("bus-disturbance", "silence", "flood") or n is None \
                or h.facts.get("far_side"):
            rate = bus_rate
            lp = lp_type_other + lp_by_uniform
        elif h.kind in ("transmit-fault", "isolation"):
            mine = known_h & (tx_h == n)
            k_own = int(mine.sum())
            own_exp = node_busy[n] + k_own * node_mean[n]
            rate = (_poisson(k_own, own_exp) + _poisson(n_err - k_own, exposure - own_exp)
                    - 2 * penalty)
            # per bus time (noise per bit) and per attempt (noise per frame): its frames must
            # fail clearly more often both ways, and it must explain most of the errors
            own_att = int(own_w[n]) + k_own
            oth_att = max(1, frames_w + n_err - own_att)
            h.facts["share"] = k_own / max(1, n_err)
            if k_own * (exposure - own_exp) <= RATE_MARGIN * (n_err - k_own) * own_exp \
                    or k_own * oth_att <= RATE_MARGIN * (n_err - k_own) * own_att \
                    or k_own < MIN_SHARE * n_err:
                rate = -math.inf  # its frames fail not clearly more often than the others'
            h.parts["positions"] = _position_split(stuff, usable, mine, pos_penalty)
            if h.kind == "isolation":
                lp = np.where(mine, np.where(ack, math.log(1 - EPS), math.log(EPS)),
                              lp_type_other) + lp_by_uniform
            else:
                lp = lp_type_other + lp_by_uniform
        else:  # receive-fault: errors anywhere while n can flag them, on its own frames after
            states = (np.array(h.replays[n].state_before, dtype=object)[k_idx]
                      if k_idx.size else np.zeros(0, dtype=object))
            passive = np.isin(states, ["error-passive", "bus-off"]) if states.size else \
                np.zeros(0, dtype=bool)
            spans = [(max(a, lo), min(b, hi)) for a, b in
                     h.replays[n].passive_intervals(ev.last_t_ns + 1) if b > lo and a < hi]
            f_in = _count_in(ev.frame_t, spans)
            own_in = _count_in(ev.own_t[n], spans)
            mine = known_h & (tx_h == n)
            k_pown, k_poth = int((passive & mine).sum()), int((passive & ~mine).sum())
            k_act = n_err - k_pown - k_poth
            pown_exp = (own_in + k_pown) * node_mean[n]
            poth_exp = (f_in - own_in + k_poth) * mean_ns
            act_exp = max(exposure - pown_exp - poth_exp, 1.0)
            # a fitted rate per group it has; on others' frames while passive it predicts
            # none (a prediction, not a fitted rate: no penalty; leaks are vetoed below)
            groups = 1 + int(pown_exp > 0)
            rate = (_poisson(k_act, act_exp) + _poisson(k_pown, pown_exp)
                    + _poisson(k_poth, poth_exp) - groups * penalty)
            leak = max(0, k_poth - PASSIVE_BOUNDARY_ERRORS)
            by_says = int(np.sum(attributed & (by == n))) > 0.5 * int(attributed.sum()) > 0
            h.facts["share"] = 1.0 - k_poth / max(1, n_err)
            if not by_says and (RATE_MARGIN * leak * act_exp >= k_act * poth_exp > 0
                                or h.facts["share"] < MIN_SHARE):
                rate = -math.inf  # errors on others' frames did not clearly drop
            lp_by = np.where(attributed & ~passive & (tx != n),
                             np.where(by == n, math.log(0.9), math.log(0.1 / n_nodes)),
                             lp_by_uniform)
            lp = lp_type_other + lp_by
            # its own frames (its monitoring flags them at once, passive or not: a passive
            # transmitter's flag still breaks its frame) against the rest
            h.parts["positions"] = _position_split(stuff, usable, mine, pos_penalty)
            h.facts["after_passive"] = k_pown + k_poth
            h.facts["after_passive_own"] = k_pown
            h.facts["passive_frames"] = f_in
        if h.evidence is not None:  # its own reading of the unidentified frames: a choice
            rate -= penalty         # fitted to the log, charged like a fitted rate
        h.parts["errors"] = float(rate + lp.sum())
        if h.kind in ("bus-disturbance", "silence", "flood") or h.facts.get("far_side"):
            h.parts["flags"] = flags_bus
            h.parts["types"] = crc_bus
        h.facts["flags"] = {"short": short, "long": long_}
        h.parts["esi"] = _esi_loglik(ev, h)
        h.parts["silences"] = _silence_loglik(ev, h, silences)
        h.parts["status"] = _status_loglik(h)
        h.loglik = float(sum(h.parts.values()))
        if n is not None:
            h.facts["own_errors"] = int(np.sum(known_h & (tx_h == n)))
            h.facts["own_ack"] = int(np.sum(known_h & (tx_h == n) & ack))
            h.facts["own_frames"] = int(ev.own_t[n].size)
        h.facts["errors"] = int(known.sum())
    finite = [h for h in hyps if math.isfinite(h.loglik)]
    best = max(h.loglik + math.log(h.prior) for h in finite)
    weights = [math.exp(h.loglik + math.log(h.prior) - best) if math.isfinite(h.loglik)
               else 0.0 for h in hyps]
    total = sum(weights)
    for h, w in zip(hyps, weights, strict=True):
        h.score = w / total


def _esi_loglik(ev: BusEvidence, h: Hypothesis) -> float:
    """FD frames: ESI set means the sender was error-passive (ISO 11898-1 ESI bit)."""
    total = 0.0
    if not ev.esi_t:
        return 0.0
    for n, rep in enumerate(h.replays):  # loop over nodes
        on, off = ev.esi_t[n]  # its FD frames with ESI set, clear
        if on.size + off.size == 0:
            continue
        # ESI set outside its passive intervals, or clear inside them (disjoint (a, b])
        spans = rep.passive_intervals(ev.last_t_ns + 1)
        wrong = on.size - _count_in(on, spans) + _count_in(off, spans)
        total += min(wrong, ESI_CAP) * math.log(P_ESI_MISMATCH)
    return total


def _silence_loglik(ev: BusEvidence, h: Hypothesis, silences: list[Silence]) -> float:
    total = 0.0
    explained: set[int] = set()
    for n, rep in enumerate(h.replays):  # loop over nodes and their bus-off episodes
        own = ev.own_t[n]
        for off in rep.bus_off:
            i = own.searchsorted(off["from_ns"], side="right")
            nxt = int(own[i]) if i < own.size else None
            need = off["from_ns"] + 0.9 * (off["to_ns"] - off["from_ns"])
            if nxt is not None and nxt < need:
                total += math.log(P_BUS_OFF_NOT_SILENT)
            for j, s in enumerate(silences):
                end = s.to_ns if s.to_ns is not None else ev.last_t_ns + 1
                if s.node == n and s.from_ns <= off["from_ns"] <= end:
                    explained.add(j)
    own_claim = h.kind == "silence" or bool(h.facts.get("far_side"))
    f = h.flood
    floods = h.facts.get("floods", [])
    # an identifier far above its rate (or unknown) that no hypothesis but a flood explains
    total += sum(math.log(P_UNEXPLAINED_SILENCE) for x in floods if x is not f)
    for j, s in enumerate(silences):
        if j in explained:
            continue
        if f is not None and s.from_ns <= f.to_ns and (s.to_ns is None or s.to_ns >= f.from_ns):
            continue  # starved by the flood
        if own_claim and s.node == h.node:
            own_claim = False  # the hypothesis explains its node's first unexplained silence
            continue
        total += math.log(P_UNEXPLAINED_SILENCE)
    return total


def _status_loglik(h: Hypothesis) -> float:
    total = 0.0
    for rep in h.replays:
        for check in rep.status_checks:  # loop over status records (rare)
            diff = abs(check["tec"] - check["status_tec"]) + abs(check["rec"] - check["status_rec"])
            total -= min(diff / STATUS_SCALE, STATUS_CAP)
    return total
