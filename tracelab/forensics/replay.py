"""Event-driven replay of ISO 11898-1 fault-confinement counters from a bus log.

Counters only jump at error events. Between two events a node's TEC falls by its successful
transmissions and its REC by its successful receptions; both counts come from cumulative
frame counts per sender (``np.searchsorted`` over the time-sorted frame times), so the Python
loop runs over error and status events only, never over frames. The times of downward state
changes (error-passive -> warning -> error-active) and of bus-off recovery come from the same
sorted times.

A node's counters depend only on the events and on who detected each error first. The log
names the first detector only when an error record carries ``by``; otherwise the replay is
run twice per node: without the rule-b bonus (the node is never assumed to be first) and with
it (the node is assumed first detector of every unattributed error it received while it could
still send an active error flag). The hypotheses module picks between them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import polars as pl

from tracelab.forensics.evidence import (  # noqa: F401  (re-exported: the replay's inputs)
    KIND_ERROR,
    KIND_STATUS,
    SAMPLED_BY_ID_FRAMES,
    BusEvidence,
    CatalogLike,
    _split_by_node,
    frames_by_id,
    load_bus_evidence,
    prepare_counts,
    run_buses,
    single_pair,
    with_extra_errors,
)
from tracelab.forensics.recovery import recovery_end_ns
from tracelab.physics.confinement import (
    DEFAULT_CONFIG,
    FIRST_DETECTOR_EXTRA_REC,
    PASSIVE_LIMIT,
    RECEIVE_ERROR_REC,
    STATE_RANK,
    TRANSMIT_ERROR_TEC,
    ConfinementConfig,
    NodeCounters,
    State,
    state_of,
)

# --- helpers over the sorted times (called for rare events only) ----------------------


def nth_own_after(ev: BusEvidence, node: int, own_start: int, n: int) -> int | None:
    """t_ns of the n-th frame (1-based) sent by ``node`` at index >= own_start, or None."""
    own = ev.own_t[node]
    i = own_start + n - 1
    return int(own[i]) if i < own.size else None


def nth_reception_after(ev: BusEvidence, node: int, frame_start: int, own_start: int,
                        n: int) -> int | None:
    """t_ns of the n-th frame (1-based) not sent by ``node``, from global index frame_start."""
    own = ev.own_t[node]
    m = frame_start + n - 1
    while m < ev.frame_t.size:
        own_in = own.searchsorted(int(ev.frame_t[m]), side="right") - own_start
        received = (m - frame_start + 1) - own_in
        if received >= n:
            return int(ev.frame_t[m])
        m += n - received
    return None



# --- the replay of one node -----------------------------------------------------------------


@dataclass
class NodeReplay:
    """One node's replayed counters under one first-detector assumption."""

    node: str
    assume_first: bool
    rows: list[tuple[int, int, int, str, str, bool]] = field(default_factory=list)
    rows_frame: pl.DataFrame | None = None  # the same rows, built vectorised (quiet nodes)
    transitions: list[dict[str, Any]] = field(default_factory=list)
    bus_off: list[dict[str, int]] = field(default_factory=list)
    state_before: list[str] = field(default_factory=list)  # per event, before it applies
    status_checks: list[dict[str, Any]] = field(default_factory=list)
    first_bonus_events: int = 0
    max_tec: int = 0
    max_rec: int = 0

    def passive_intervals(self, end_ns: int) -> list[tuple[int, int]]:
        """[from, to) intervals in error-passive or bus-off."""
        out: list[tuple[int, int]] = []
        since: int | None = None
        for tr in self.transitions:  # loop over state transitions (rare)
            bad = STATE_RANK[tr["to"]] >= STATE_RANK["error-passive"]
            if bad and since is None:
                since = tr["t_ns"]
            elif not bad and since is not None:
                out.append((since, tr["t_ns"]))
                since = None
        if since is not None:
            out.append((since, end_ns))
        return out

    def first_degradation(self) -> dict[str, Any] | None:
        for tr in self.transitions:
            if tr["from"] == "error-active":
                return tr
        return None

    def worst(self) -> tuple[str, int | None]:
        worst: State = "error-active"
        at: int | None = None
        for tr in self.transitions:
            if STATE_RANK[tr["to"]] > STATE_RANK[worst]:
                worst, at = tr["to"], tr["t_ns"]
        return worst, at


ROLE_NONE, ROLE_TX, ROLE_TX_ACK, ROLE_RX, ROLE_RX_FIRST, ROLE_RX_UNKNOWN, ROLE_STATUS = range(7)


def _role_array(ev: BusEvidence, node: int, foreign_flags: bool = False) -> np.ndarray:
    """What each event is to this node (vectorised over events).

    ``foreign_flags``: the reading has another node's receiver detect first (a receive
    fault elsewhere). An error flag that arrives during arbitration then overwrites a
    recessive bit of this node's identifier (it has lost arbitration and goes on as a
    receiver, rule a) or its recessive stuff bit (rule c exception 2): either way its TEC
    does not rise, so its errors logged in the arbitration field count as receptions.
    """
    e = ev.events
    kind = e["kind"].to_numpy()
    tx = e["tx"].to_numpy()
    if foreign_flags:
        tx = np.where((e["field"] == "arbitration").fill_null(False).to_numpy(), -1, tx)
    by = e["by_node"].to_numpy()
    ack = (e["type"] == "ack").fill_null(False).to_numpy()
    status = kind == KIND_STATUS
    role = np.where(tx == node, np.where(ack, ROLE_TX_ACK, ROLE_TX),
                    np.where(ack, ROLE_NONE, np.where(by == node, ROLE_RX_FIRST,
                                                      np.where(by < 0, ROLE_RX_UNKNOWN,
                                                               ROLE_RX))))
    role = np.where(status, np.where(e["node"].to_numpy() == node, ROLE_STATUS, ROLE_NONE),
                    role)
    return role.astype(np.int64)


def _roles(ev: BusEvidence, node: int, foreign_flags: bool = False) -> list[int]:
    return [int(r) for r in _role_array(ev, node, foreign_flags).tolist()]


def _reflected_walk(jumps: np.ndarray, declines: np.ndarray) -> np.ndarray:
    """Counter after each event: c_k = jumps_k + max(0, c_{k-1} - declines_k), c_-1 = 0.

    The unrolled form c_k = max_j (sum jumps[j..k] - sum declines[j+1..k]) is a cumulative
    maximum, so the whole trajectory is three numpy passes (rules a/b/c with g/h below 128).
    """
    a = np.cumsum(jumps)
    d = np.cumsum(declines)
    a_before = np.concatenate([[0], a[:-1]])
    return a - d + np.maximum.accumulate(d - a_before)


def base_replays(ev: BusEvidence, config: ConfinementConfig = DEFAULT_CONFIG,
                 keep_rows: bool = True, foreign_flags: bool = False) -> list[NodeReplay]:
    """Every node's replay without the first-detector bonus; which nodes could flag actively
    before each event is kept on the evidence for others_active (computed once).
    ``foreign_flags``: as seen by the nodes other than a receive fault's (see _role_array)."""
    reps = [replay_node(ev, m, False, config, keep_rows=keep_rows, foreign_flags=foreign_flags)
            for m in range(len(ev.nodes))]
    if foreign_flags:
        return reps
    states = np.array([rep.state_before for rep in reps], dtype=object).reshape(
        len(ev.nodes), len(ev.ev_t))
    ev._active_cache[config] = (ev.events, (states == "error-active") | (states == "warning"))
    return reps


def others_active(ev: BusEvidence, node: int, config: ConfinementConfig) -> np.ndarray:
    """Per event: whether a node other than ``node`` could flag actively just before it
    (error-active or warning in its replay without the first-detector bonus).

    Rule b (REC +8) needs a dominant bit right after the first detector's flag: the flags of
    the others, which only nodes that are not error-passive send. Once every other node is
    error-passive, an assumed first detector gets REC +1 per error, as any receiver.
    """
    cached = ev._active_cache.get(config)
    if cached is None or cached[0] is not ev.events:
        base_replays(ev, config, keep_rows=False)
        cached = ev._active_cache[config]
    active = cached[1]
    return (active.sum(axis=0) - active[node]) > 0


def _quiet_replay(ev: BusEvidence, node: int, assume_first: bool,
                  config: ConfinementConfig, keep_rows: bool,
                  foreign_flags: bool = False) -> NodeReplay | None:
    """The replay of a node that never reaches the warning level, without a Python loop.

    Below the warning level no exception of the rules applies (no ACK exception, no REC
    reset, no bus-off, the node can always flag), so TEC and REC are two reflected walks.
    Returns None when the node does reach it, or when status records or logger losses need
    the event loop.
    """
    if ev.losses.shape[0] or not ev.ev_t:
        return None
    role = _role_array(ev, node, foreign_flags)
    if bool(np.any(role == ROLE_STATUS)):
        return None
    own = np.asarray(ev.ev_own_before[node], dtype=np.int64)
    all_ = np.asarray(ev.ev_frames_before, dtype=np.int64)
    own_d = np.diff(own, prepend=0)
    recv_d = np.diff(all_, prepend=0) - own_d
    tx = (role == ROLE_TX) | (role == ROLE_TX_ACK)
    assumed = (role == ROLE_RX_UNKNOWN) & assume_first
    if assume_first and assumed.any():
        assumed &= others_active(ev, node, config)
    rx_first = (role == ROLE_RX_FIRST) | assumed
    rx = rx_first | (role == ROLE_RX) | (role == ROLE_RX_UNKNOWN)
    a_tec = np.where(tx, TRANSMIT_ERROR_TEC, 0)
    a_rec = np.where(rx, RECEIVE_ERROR_REC, 0) + np.where(rx_first, FIRST_DETECTOR_EXTRA_REC, 0)
    tec = _reflected_walk(a_tec, own_d)
    rec = _reflected_walk(a_rec, recv_d)
    level = config.warning_level + (0 if config.warning_inclusive else 1)
    if int(tec.max()) >= level or int(rec.max()) >= level:
        return None
    out = NodeReplay(ev.nodes[node], assume_first)
    out.state_before = ["error-active"] * len(ev.ev_t)
    out.first_bonus_events = int(np.sum(assumed))
    out.max_tec, out.max_rec = int(tec.max()), int(rec.max())
    if keep_rows:
        t = np.asarray(ev.ev_t, dtype=np.int64)
        pre_tec, pre_rec = tec - a_tec, rec - a_rec
        prev_tec = np.concatenate([[0], tec[:-1]])
        prev_rec = np.concatenate([[0], rec[:-1]])
        declined = (pre_tec != prev_tec) | (pre_rec != prev_rec)
        hit = tx | rx
        order = np.sort(np.concatenate([2 * np.flatnonzero(declined),
                                        2 * np.flatnonzero(hit) + 1]))
        k, o = order // 2, order % 2  # per event: the decline row first, then the jump
        out.rows_frame = pl.DataFrame({
            "t_ns": t[k], "tec": np.where(o == 1, tec[k], pre_tec[k]).astype(np.int32),
            "rec": np.where(o == 1, rec[k], pre_rec[k]).astype(np.int32),
            "state": "error-active",
            # from a table of two: polars builds the strings 30x faster than numpy's where
            "cause": pl.Series(["successes", "error"]).gather(o), "uncertain": False})
    return out


def replay_node(ev: BusEvidence, node: int, assume_first: bool = False,
                config: ConfinementConfig = DEFAULT_CONFIG, keep_rows: bool = True,
                foreign_flags: bool = False) -> NodeReplay:
    """Apply the rules table to one node, event by event (a loop over error/status events).

    keep_rows=False keeps transitions, bus-off episodes and status checks but not every
    counter change (for candidate replays that may not win). ``foreign_flags``: see
    _role_array (the node's replay under a receive fault of another node).

    The hot path (successes, receive errors) is written out with the rule constants of
    tracelab.physics.confinement; rare paths (transmit errors with their exceptions, bus-off,
    recovery, status records) go through NodeCounters.
    """
    quiet = _quiet_replay(ev, node, assume_first, config, keep_rows, foreign_flags)
    if quiet is not None:
        return quiet
    out = NodeReplay(ev.nodes[node], assume_first)
    c = NodeCounters(config=config)
    state: State = "error-active"
    recovery_at: int | None = None
    uncertain = False
    own_before = ev.ev_own_before[node]
    frames_before = ev.ev_frames_before
    loss_since = ev.ev_loss_since_prev
    roles = _roles(ev, node, foreign_flags)
    reactors = others_active(ev, node, config).tolist() \
        if assume_first and ROLE_RX_UNKNOWN in roles else None
    fb_prev = ob_prev = 0
    t_prev = ev.first_t_ns
    status_tec = ev.events["tec"].to_list()
    status_rec = ev.events["rec"].to_list()
    rows = out.rows
    state_before = out.state_before
    warn = config.warning_level
    inclusive = config.warning_inclusive
    rec_reset = config.rec_after_passive_reception
    max_tec = max_rec = 0

    def state_now() -> State:
        if c.bus_off:
            return "bus-off"
        tec, rec = c.tec, c.rec
        if tec > PASSIVE_LIMIT or rec > PASSIVE_LIMIT:
            return "error-passive"
        hot = tec if tec > rec else rec
        if hot >= warn if inclusive else hot > warn:
            return "warning"
        return "error-active"

    def record(t_ns: int, cause: str) -> None:
        nonlocal state
        new = state_now()
        if keep_rows or new != state:
            rows.append((t_ns, c.tec, c.rec, new, cause, uncertain))
        if new != state:
            out.transitions.append({"t_ns": t_ns, "from": state, "to": new})
            state = new

    # Loop over error and status events (rare compared with frames), never over frames.
    for k, t_e in enumerate(ev.ev_t):
        fb, ob = frames_before[k], own_before[k]
        if loss_since[k]:
            uncertain = True
        # 1. successes since the previous event, with the downward state changes among them
        if c.bus_off:
            if recovery_at is not None and recovery_at <= t_e:
                c.recover()
                uncertain = False  # recovery sets TEC = REC = 0: re-anchored (rule l)
                out.bus_off[-1]["to_ns"] = recovery_at
                record(recovery_at, "recovery")
                recovery_at = None
        elif fb > fb_prev and (c.tec or c.rec):
            own_n = ob - ob_prev
            recv_n = fb - fb_prev - own_n
            if state != "error-active":
                _downward(ev, node, c, config, fb_prev, ob_prev, own_n, recv_n, record)
            tec0, rec0 = c.tec, c.rec
            c.tec = tec0 - own_n if tec0 > own_n else 0  # rule g, own_n times
            if recv_n:  # rule h, recv_n times
                if rec0 > PASSIVE_LIMIT:
                    c.rec = max(0, rec_reset - (recv_n - 1))
                else:
                    c.rec = rec0 - recv_n if rec0 > recv_n else 0
            if (c.tec != tec0 or c.rec != rec0) and (not rows
                                                      or (c.tec, c.rec) != rows[-1][1:3]):
                record(t_e, "successes")
        fb_prev, ob_prev, t_prev = fb, ob, t_e
        state_before.append(state)
        # 2. the event itself
        role = roles[k]
        if role == ROLE_NONE:
            continue
        if role == ROLE_STATUS:
            tec_s, rec_s = int(status_tec[k]), int(status_rec[k])
            out.status_checks.append({"t_ns": t_e, "tec": c.tec, "rec": c.rec, "state": state,
                                      "status_tec": tec_s, "status_rec": rec_s,
                                      "status_state": state_of(tec_s, rec_s, config=config),
                                      "uncertain": uncertain})
            if (c.tec, c.rec) != (tec_s, rec_s):
                c.tec, c.rec = tec_s, rec_s
                c.bus_off = c.bus_off or tec_s > 255
                max_tec, max_rec = max(max_tec, c.tec), max(max_rec, c.rec)
                uncertain = False
                record(t_e, "status")
            uncertain = False
            continue
        if c.bus_off:
            continue
        if role in (ROLE_TX, ROLE_TX_ACK):
            c.transmit_error(ack_error=role == ROLE_TX_ACK)
            if c.tec > max_tec:
                max_tec = c.tec
        else:
            bonus = role == ROLE_RX_FIRST
            if role == ROLE_RX_UNKNOWN and assume_first and state in (
                    "error-active", "warning") and reactors is not None and reactors[k]:
                bonus = True
                out.first_bonus_events += 1
            c.rec += RECEIVE_ERROR_REC + (FIRST_DETECTOR_EXTRA_REC if bonus else 0)  # a, b
            if c.rec > max_rec:
                max_rec = c.rec
        record(t_e, "error")
        if c.bus_off and recovery_at is None:
            recovery_at = recovery_end_ns(ev, t_e, config)
            out.bus_off.append({"from_ns": t_e, "to_ns": recovery_at})
    out.max_tec, out.max_rec = max_tec, max_rec
    # tail: successes after the last event up to the end of the log
    if c.bus_off and recovery_at is not None and recovery_at <= max(ev.last_t_ns, t_prev):
        c.recover()
        record(recovery_at, "recovery")
    elif not c.bus_off and state != "error-active":
        fb, ob = ev.frame_t.size, ev.own_t[node].size
        own_n, recv_n = ob - ob_prev, (fb - fb_prev) - (ob - ob_prev)
        _downward(ev, node, c, config, fb_prev, ob_prev, own_n, recv_n, record)
        tec0, rec0 = c.tec, c.rec
        c.transmit_success(own_n)
        c.receive_success(recv_n)
        if (c.tec, c.rec) != (tec0, rec0) and fb > fb_prev:
            record(int(ev.frame_t[-1]), "successes")
    return out


def _downward(ev: BusEvidence, node: int, c: NodeCounters, config: ConfinementConfig,
              frame_start: int, own_start: int, own_n: int, recv_n: int, record: Any) -> None:
    """Record the state changes a run of successes causes, at the frame that causes each.

    Candidate thresholds: TEC back to 127 (passive limit) and below the warning level; REC
    reset into 119..127 by the first reception above 127, then down past the warning level.
    """
    level = config.warning_level - (0 if config.warning_inclusive else -1)  # first "warm" value
    tec0, rec0 = c.tec, c.rec
    own_steps = sorted({s for s in (tec0 - PASSIVE_LIMIT, tec0 - level + 1) if 0 < s <= own_n})
    if rec0 > PASSIVE_LIMIT:
        after = config.rec_after_passive_reception
        rec_steps = {1, 1 + after - level + 1}
    else:
        rec_steps = {rec0 - level + 1}
    recv_steps = sorted(s for s in rec_steps if 0 < s <= recv_n)
    times: list[int] = []
    for s in own_steps:  # at most two thresholds per counter
        t = nth_own_after(ev, node, own_start, s)
        if t is not None:
            times.append(t)
    for s in recv_steps:
        t = nth_reception_after(ev, node, frame_start, own_start, s)
        if t is not None:
            times.append(t)
    own = ev.own_t[node]
    for t in sorted(set(times)):
        i_all = ev.frame_t.searchsorted(t, side="right") - frame_start
        i_own = own.searchsorted(t, side="right") - own_start
        probe = NodeCounters(tec0, rec0, False, config)
        probe.transmit_success(min(i_own, own_n))
        probe.receive_success(min(i_all - i_own, recv_n))
        if probe.state != c.state:
            c.tec, c.rec = probe.tec, probe.rec
            record(t, "successes")
    c.tec, c.rec = tec0, rec0
