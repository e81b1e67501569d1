"""Discrete-event simulation of one bus over its bus-idle instants (ISO 11898-1).

The loop visits each instant the bus becomes idle, admits the releases due by then, lets the
highest-priority pending frame win arbitration and transmits it. Pending messages are a
bitmask over priority ranks (bit 0 = highest priority), so arbitration is one
lowest-set-bit operation. The per-frame fast path handles the error-free case while every
node's counters are zero; anything else (faults active, counters non-zero, error-passive
nodes, bus-off recovery, missing acknowledgement) goes through ``_attempt``, which applies
the fault-confinement rules of tracelab.physics.confinement. docs/simulator.md lists the
simplifications.
"""

from __future__ import annotations

import math
from array import array
from bisect import bisect_right
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tracelab.format.writer import error_line, status_line
from tracelab.physics.bitlength import (
    TRAILER_BITS,
    frame_bits_reference,
    frame_durations_ns,
    header_bits,
)
from tracelab.physics.confinement import (
    RECOVERY_SEQUENCE_BITS,
    RECOVERY_SEQUENCES,
    ConfinementConfig,
    NodeCounters,
)
from tracelab.simulate.scenario import NOISE_KINDS, FaultSpec, Scenario
from tracelab.simulate.schedule import BusSchedule
from tracelab.simulate.wire import (
    WireLayout,
    flag_detection,
    misread_detection,
    transmitter_reaction,
    wire_layout,
)

ACTIVE_FLAG_BITS = 6
SUPERPOSED_FLAG_BITS = 12  # a first detector's flag, then everybody else's (ISO 11898-1 10.4.4.2)
ERROR_DELIMITER_BITS = 8
INTERMISSION_BITS = 3
SUSPEND_BITS = 8
#: After the CRC sequence: CRC delimiter, ACK slot, ACK delimiter, EOF (7), intermission (3).
ACK_DELIMITER_FROM_END = 11  # bits from the ACK delimiter to the end of the intermission
EOF_FROM_END = 10
#: The recessive run that ends every frame: ACK delimiter + EOF + intermission = 11 bits, and
#: every error frame: error delimiter + intermission = 11 bits.
TAIL_RECESSIVE_BITS = 11
INF = 1 << 62
CHUNK = 1 << 16
#: Bits of the arbitration field (unstuffed) of base / extended frames, SOF excluded.
ARBITRATION_BITS = {False: 12, True: 32}
#: Wire layouts kept for retransmissions of the same errored frame.
LAYOUT_CACHE = 256


@dataclass
class NodeTruth:
    """True counter history of one controller (a node on one bus)."""

    node: str
    bus: str
    trajectory: list[list[Any]] = field(default_factory=list)
    transitions: list[dict[str, Any]] = field(default_factory=list)
    bus_off: list[dict[str, Any]] = field(default_factory=list)


@dataclass
class _Noise:
    spec: FaultSpec
    nodes: frozenset[int]  # empty: the whole bus
    start_ns: int
    end_ns: int
    count: int = 0

    def level_at(self, t_ns: int) -> float:
        """The per-frame rate or the per-bit error probability at t_ns (ramps linearly)."""
        per_bit = self.spec.ber is not None
        r0 = (self.spec.ber if per_bit else self.spec.rate) or 0.0
        r1 = self.spec.ber_end if per_bit else self.spec.rate_end
        if r1 is None:
            return r0
        span = max(1, self.end_ns - self.start_ns)
        return r0 + (r1 - r0) * min(1.0, max(0.0, (t_ns - self.start_ns) / span))


@dataclass
class _Hit:
    """What corrupted one attempt: ``kind`` bus (the whole wire), tx (the transmitter's own
    bit), rx (a local disturbance at ``detectors``) or ack; ``pos`` the bit the noise hit
    (per-bit noise; None: drawn later from the per-frame model)."""

    kind: str
    detectors: tuple[int, ...]
    pos: int | None = None


@dataclass(frozen=True)
class _Detection:
    """The first detectors' view of one error: flag start bit ``d`` (wire index from SOF),
    their classification, the frame's wire layout, and the detectors by state."""

    kind: str
    d: int
    dtype: str
    dfield: str
    lay: WireLayout | None
    active: tuple[int, ...]
    passive: tuple[int, ...]


@dataclass
class BusResult:
    """What one bus produced: transmitted frames, other records, counts and truth."""

    schedule: BusSchedule
    start_ns: np.ndarray  # int64, per transmitted frame
    release: np.ndarray  # int64 index into the schedule arrays
    end_ns: np.ndarray  # int64 end of intermission
    esi: np.ndarray  # bool
    records: list[tuple[int, int, str]]  # (t_ns, rank or -1, line): errors and status
    dropped: np.ndarray  # per rank
    nodes: list[NodeTruth]
    first_degraded: dict[str, Any] | None
    first_warning: dict[str, Any] | None
    error_frames: int
    busy_error_ns: int
    trace: list[tuple[int, str, str, int]] | None = None
    errors: list[dict[str, Any]] = field(default_factory=list)
    unacked: list[int] = field(default_factory=list)


class BusEngine:
    """One bus: nodes, their counters and the event loop."""

    def __init__(self, scenario: Scenario, schedule: BusSchedule, duration_ns: int,
                 rng: np.random.Generator, progress: Callable[[float], None] | None = None,
                 trace: bool = False) -> None:
        self.sc = scenario
        self.s = schedule
        self.bus = schedule.bus.alias
        self.duration_ns = duration_ns
        self.rng = rng
        self.progress = progress
        #: (t_ns, node, event kind, count) per counter event, for the independent reference
        #: in tests/oracles (kinds as there: tx_error, rx_error_first, ...); None when off.
        self.trace: list[tuple[int, str, str, int]] | None = [] if trace else None
        self.nominal_bps = schedule.bus.nominal_bps
        self.data_bps = schedule.bus.data_bps
        self.bit_ns = 1e9 / self.nominal_bps
        self.data_bit_ns = 1e9 / (self.data_bps or self.nominal_bps)
        self.stamp_end = schedule.bus.stamp == "end"
        self.attribute = scenario.run.attribute_errors
        self.names = scenario.catalog.nodes_on(self.bus)
        self.index = {n: i for i, n in enumerate(self.names)}
        nn = len(self.names)
        self.counters: list[NodeCounters] = []
        for name in self.names:
            b = scenario.behaviour[name]
            cfg = ConfinementConfig(recovery="software" if b.recovery == "software" else "auto",
                                    recovery_delay_ns=b.recovery_delay_ns)
            self.counters.append(NodeCounters(config=cfg))
        self.truth = [NodeTruth(n, self.bus, [[0, 0, 0, "error-active"]]) for n in self.names]
        self.state = ["error-active"] * nn
        self.isolated = [False] * nn
        self.msg_node = [self.index[m.sender] for m in schedule.messages]
        self.node_mask = [0] * nn
        for m in schedule.messages:
            self.node_mask[self.index[m.sender]] |= 1 << m.rank
        self.logger_ack = scenario.run.logger_ack
        self.own_view = scenario.run.logger_view == "own"
        self._layouts: dict[tuple[int, bool], WireLayout] = {}
        #: per error frame: who detected, where, the flag length and what the logger wrote
        self.errors: list[dict[str, Any]] = []
        #: output positions of frames the logger saw complete but nobody acknowledged (an
        #: error-passive transmitter's ACK error: its passive flag is recessive)
        self.unacked: list[int] = []
        self.susp_node = -1
        self.susp_until = INF
        self.rec_run_start: dict[int, float] = {}  # bus-off node -> start of recessive run
        self.rec_occ: dict[int, int] = {}
        self.rec_time: dict[int, int] = {}
        self.active: list[_Noise] = []
        self.records: list[tuple[int, int, str]] = []
        self.first_degraded: dict[str, Any] | None = None
        self.first_warning: dict[str, Any] | None = None
        self.error_frames = 0
        self.busy_error_ns = 0
        self._u = rng.random(4096)
        self._ui = 0
        self._esi: dict[int, int] = {}  # output position -> duration of an ESI frame
        self._esi_bits: dict[int, tuple[int, int, int]] = {}  # release -> bits, dpb, ns
        self.silent: dict[int, list[tuple[int, int]]] = {}
        for f in scenario.faults:
            if f.kind == "silent" and self.bus in f.buses and f.node is not None:
                end = duration_ns if f.end_ns is None else f.end_ns
                self.silent.setdefault(self.index[f.node], []).append((f.start_ns, end))
        self._static = self._static_events()
        self._si = 0
        self._recompute()

    # --- state helpers (rare events) ---------------------------------------------------

    def _participating(self, n: int) -> bool:
        return not self.counters[n].bus_off and not self.isolated[n]

    def _recompute(self) -> None:
        """Masks and flags that change only on rare events."""
        elig = dead = 0
        ackers = 1 if self.logger_ack else 0
        for n in range(len(self.names)):
            if self._participating(n):
                ackers += 1
                if n != self.susp_node:
                    elig |= self.node_mask[n]
            if self.counters[n].bus_off:
                dead |= self.node_mask[n]
        self.elig, self.dead, self.ackers = elig, dead, ackers
        # Counters of isolated nodes cannot change; a TEC above zero matters only for that
        # node's own frames (tecmask), a REC above zero for every frame.
        live = [n for n in range(len(self.names)) if self._participating(n)]
        rec_hot = any(self.counters[n].rec for n in live)
        self.tecmask = 0
        for n in live:
            if self.counters[n].tec:
                self.tecmask |= self.node_mask[n]
        self.slow = (bool(self.active) or ackers <= 1 or rec_hot or bool(self.rec_run_start)
                     or self.susp_node >= 0)

    def _uniform(self) -> float:
        if self._ui >= len(self._u):
            self._u = self.rng.random(4096)
            self._ui = 0
        self._ui += 1
        return float(self._u[self._ui - 1])

    def _event(self, t_ns: int, n: int, kind: str, count: int = 1) -> None:
        """Trace one counter event of node n (only when tracing; rare events)."""
        if self.trace is not None:
            self.trace.append((t_ns, self.names[n], kind, count))

    def _note(self, n: int, t_ns: int) -> None:
        """Record node n's counters at t_ns if they changed; track state transitions."""
        c = self.counters[n]
        truth = self.truth[n]
        state = c.state
        last = truth.trajectory[-1]
        if last[1] == c.tec and last[2] == c.rec and last[3] == state:
            return
        truth.trajectory.append([t_ns, c.tec, c.rec, state])
        if state != self.state[n]:
            truth.transitions.append({"t_ns": t_ns, "from": self.state[n], "to": state})
            event = {"bus": self.bus, "node": self.names[n], "state": state, "t_ns": t_ns}
            if state in ("error-passive", "bus-off") and self.first_degraded is None:
                self.first_degraded = event
            if state != "error-active" and self.first_warning is None:
                self.first_warning = event
            self.state[n] = state

    # --- events ------------------------------------------------------------------------

    def _static_events(self) -> list[tuple[int, int, str, Any]]:
        """Fault windows, status ticks, progress ticks and the end of the run, sorted."""
        ev: list[tuple[int, int, str, Any]] = []
        for f in self.sc.faults:
            if self.bus not in f.buses:
                continue
            end = self.duration_ns if f.end_ns is None else min(f.end_ns, self.duration_ns)
            if f.start_ns >= self.duration_ns:
                continue
            if f.kind in NOISE_KINDS:
                nodes = frozenset(self.index[n] for n in f.nodes)
                noise = _Noise(f, nodes, f.start_ns, end)
                ev.append((f.start_ns, 1, "noise-on", noise))
                ev.append((end, 0, "noise-off", noise))
            elif f.kind == "isolated":
                assert f.node is not None
                ev.append((f.start_ns, 1, "isolate", (self.index[f.node], end)))
                ev.append((end, 0, "rejoin", self.index[f.node]))
        every = self.sc.run.status_every_ns
        if every:
            ev.extend((t, 2, "status", None) for t in range(every, self.duration_ns, every))
        if self.progress is not None:
            step = max(1, self.duration_ns // 100)
            ev.extend((t, 3, "progress", step) for t in range(step, self.duration_ns, step))
        ev.append((self.duration_ns, 9, "end", None))
        ev.sort(key=lambda e: (e[0], e[1]))
        return ev

    def _next_event(self) -> int:
        t = self._static[self._si][0] if self._si < len(self._static) else INF
        if self.susp_node >= 0:
            t = min(t, self.susp_until)
        if self.rec_time:
            t = min(t, min(self.rec_time.values()))
        return t

    def _events(self, t: int, pending: int) -> tuple[bool, int]:
        """Apply every event due at or before t; returns (run over, pending)."""
        over = False
        if self.susp_node >= 0 and self.susp_until <= t:
            self.susp_node, self.susp_until = -1, INF
        for n, t_rec in sorted(self.rec_time.items()):
            if t_rec <= t:
                self._recover(n, t_rec)
        while self._si < len(self._static) and self._static[self._si][0] <= t:
            t_ev, _, kind, arg = self._static[self._si]
            self._si += 1
            if kind == "end":
                over = True
            elif kind == "status":
                self._status(t_ev)
            elif kind == "progress":
                assert self.progress is not None
                self.progress(arg)
            elif kind == "noise-on":
                self.active.append(arg)
            elif kind == "noise-off":
                self.active.remove(arg)
            elif kind == "isolate":
                self._isolate(arg[0], t_ev, pending, until_ns=arg[1])
            elif kind == "rejoin":
                self.isolated[arg] = False
        self._recompute()
        return over, pending

    def _status(self, t_ns: int) -> None:
        """Status records of every controller that can still talk (not bus-off, isolated or
        silent)."""
        for n, name in enumerate(self.names):
            quiet = any(a <= t_ns < b for a, b in self.silent.get(n, ()))
            # the counters as they were at t_ns: a frame in flight then has already been
            # applied (its error may fall after t_ns), so they come from the trajectory
            traj = self.truth[n].trajectory
            _, tec, rec, state = traj[bisect_right(traj, t_ns, key=lambda p: p[0]) - 1]
            if state != "bus-off" and not self.isolated[n] and not quiet:
                self.records.append((t_ns, -1, status_line(t_ns, self.bus, name, tec, rec)))

    def _recover(self, n: int, t_ns: int) -> None:
        """Rule l: 128 x 11 recessive bits seen while bus-off: restart with zero counters."""
        self.counters[n].recover()
        self._event(t_ns, n, "recessive_11", RECOVERY_SEQUENCES)
        del self.rec_time[n], self.rec_occ[n], self.rec_run_start[n]
        self.truth[n].bus_off[-1]["to_ns"] = t_ns
        self._note(n, t_ns)

    def _recovery_due(self, n: int) -> int:
        need = RECOVERY_SEQUENCES - self.rec_occ[n]
        return int(np.ceil(self.rec_run_start[n] + need * RECOVERY_SEQUENCE_BITS * self.bit_ns))

    def _count_recessive(self, sof_ns: int) -> None:
        """A SOF ends the recessive run of every recovering node: count its 11-bit groups."""
        group = RECOVERY_SEQUENCE_BITS * self.bit_ns
        for n, run_start in self.rec_run_start.items():
            if sof_ns > run_start:
                self.rec_occ[n] += int((sof_ns - run_start) / group + 1e-9)

    def _new_runs(self, end_ns: int) -> None:
        """The frame just sent ends with 11 recessive bits: a new run starts there."""
        for n in self.rec_run_start:
            start = end_ns - TAIL_RECESSIVE_BITS * self.bit_ns
            c = self.counters[n]
            if c.config.recovery == "software":
                start = max(start, self.truth[n].bus_off[-1]["from_ns"]
                            + c.config.recovery_delay_ns)
            self.rec_run_start[n] = start
            self.rec_time[n] = self._recovery_due(n)

    def _isolate(self, n: int, t_ns: int, pending: int, until_ns: int) -> None:
        """The node is alone on its own piece of wire: ACK errors until it is error-passive
        or it rejoins the bus at ``until_ns``, whichever comes first.

        A loop over at most 16 attempts (rare event); after that nothing changes, because an
        error-passive transmitter's ACK errors do not count (rule c, exception 1).
        """
        self.isolated[n] = True
        c = self.counters[n]
        mask = pending & self.node_mask[n]
        s = self.s
        if mask:
            rank = (mask & -mask).bit_length() - 1
            t = t_ns
        else:
            mine = np.flatnonzero((s.t_ns >= t_ns) & np.isin(
                s.rank, [m.rank for m in s.messages if self.msg_node[m.rank] == n]))
            if len(mine) == 0:
                return
            rank, t = int(s.rank[mine[0]]), int(s.t_ns[mine[0]])
        same = s.rank == rank
        bits = int(np.median(s.bits[same])) if np.any(same) else 64
        # a BRS frame's data phase runs at the data rate on its own piece of wire too
        dpb = int(np.median(s.data_phase_bits[same])) if np.any(same) else 0
        ack_after_ns = self._time_to_bit(bits - ACK_DELIMITER_FROM_END, bits, dpb)
        attempt_ns = ack_after_ns + int(
            (ACTIVE_FLAG_BITS + ERROR_DELIMITER_BITS + INTERMISSION_BITS) * self.bit_ns)
        stop_ns = min(until_ns, self.duration_ns)
        while not c.error_passive and not c.bus_off and t + ack_after_ns < stop_ns:
            c.transmit_error(ack_error=True)
            self._event(t + ack_after_ns, n, "tx_ack_error")
            self._note(n, t + ack_after_ns)
            t += attempt_ns

    # --- the loop ------------------------------------------------------------------------

    def run(self) -> BusResult:
        s = self.s
        n_rel = len(s.t_ns)
        bitof = [1 << r for r in range(len(s.messages))]
        inst = [0] * len(s.messages)
        idur = [0] * len(s.messages)
        dropped = [0] * len(s.messages)
        out_t = array("q")
        out_g = array("q")
        app_t, app_g = out_t.append, out_g.append
        pending = 0
        t = 0
        base = 0
        rt: list[int] = []
        rm: list[int] = []
        rd: list[int] = []
        ri = clen = 0

        def load(start: int) -> tuple[list[int], list[int], list[int], int]:
            stop = min(n_rel, start + CHUNK)
            lt = s.t_ns[start:stop].tolist()
            lt.append(INF if stop == n_rel else -1)  # -1: chunk end, load the next one
            return lt, s.rank[start:stop].tolist(), s.duration_ns[start:stop].tolist(), stop - start

        rt, rm, rd, clen = load(0)
        next_ev = self._next_event()
        elig, dead, slow, tecmask = self.elig, self.dead, self.slow, self.tecmask
        while True:
            # Admit every release due by the bus-idle instant t (the per-frame hot path).
            while True:
                tr = rt[ri]
                if tr > t:
                    break
                if tr < 0:  # end of chunk
                    base += clen
                    rt, rm, rd, clen = load(base)
                    ri = 0
                    continue
                r = rm[ri]
                b = bitof[r]
                if (pending | dead) & b:
                    dropped[r] += 1
                    if dead & b:
                        ri += 1
                        continue
                pending |= b
                inst[r] = base + ri
                idur[r] = rd[ri]
                ri += 1
            if t >= next_ev:
                over, pending = self._events(t, pending)
                if over:
                    break
                elig, dead, slow, tecmask = self.elig, self.dead, self.slow, self.tecmask
                next_ev = self._next_event()
                continue
            cand = pending & elig
            if not cand:  # idle until the next release or event (rt[ri] is never -1 here)
                nt = rt[ri]
                t = next_ev if nt >= next_ev else nt
                continue
            low = cand & -cand
            r = low.bit_length() - 1
            if slow or low & tecmask:
                t, pending = self._attempt(r, inst[r], idur[r], t, pending, out_t, out_g,
                                           dropped)
                elig, dead, slow, tecmask = self.elig, self.dead, self.slow, self.tecmask
                next_ev = self._next_event()
            else:
                pending ^= low
                app_t(t)
                app_g(inst[r])
                t += idur[r]
        return self._result(out_t, out_g, dropped)

    def _time_to_bit(self, d: int, bits: int, dpb: int) -> int:
        """ns from SOF to the start of bit d (0 = SOF), data phase at the data rate."""
        if not dpb:
            return int(round(d * self.bit_ns))
        prefix = bits - dpb - (TRAILER_BITS - 1)
        if d <= prefix:
            return int(round(d * self.bit_ns))
        fast = min(d - prefix, dpb)
        slow = prefix + max(0, d - prefix - dpb)
        return int(round(slow * self.bit_ns + fast * self.data_bit_ns))

    def _field_of(self, msg_ext: bool, fd: bool, nbytes: int, frac: float) -> str:
        """Field at a fraction of the way from SOF to the end of the CRC (unstuffed layout;
        stuff bits are taken as spread evenly, a documented simplification)."""
        arb_end = 33 if msg_ext else 13
        ctrl_end = header_bits(fd, msg_ext)
        data_end = ctrl_end + 8 * nbytes
        crc = (4 + (17 if nbytes <= 16 else 21)) if fd else 15
        q = frac * (data_end + crc)
        if q < 1:
            return "sof"
        if q < arb_end:
            return "arbitration"
        if q < ctrl_end:
            return "control"
        if q < data_end:
            return "data"
        return "crc"

    def _decide(self, x: int, t_ns: int, bits: int, ext: bool) -> _Hit | None:
        """Which error (if any) this attempt suffers (one draw per active fault)."""
        for f in self.active:
            kind = f.spec.kind
            detectors: tuple[int, ...]
            if kind == "bus-noise":
                hit_kind, detectors = "bus", ()
            elif x in f.nodes:
                hit_kind, detectors = "tx", (x,)  # its own bit, or its bit monitor's reading
            elif kind == "tx-noise":
                continue
            else:
                detectors = tuple(sorted(n for n in f.nodes if self._participating(n)))
                if not detectors:
                    continue
                hit_kind = "rx"
            f.count += 1
            pos = None
            if f.spec.every is not None:
                hit = f.count % f.spec.every == 0
            elif f.spec.ber is not None:
                # Per bit: the first corrupted bit is geometric; one uniform draw per frame.
                # Exposed bits: a transmitter's own bits after arbitration up to the CRC
                # delimiter (stuff bits of the arbitration field taken as none); a
                # receiver's SOF .. the 6th EOF bit.
                if hit_kind == "tx":
                    exposed = bits - TRAILER_BITS + 1 - ARBITRATION_BITS[ext]
                else:
                    exposed = bits - INTERMISSION_BITS - 1
                ber = f.level_at(t_ns)
                j = int(math.log1p(-self._uniform()) / math.log1p(-ber)) if ber > 0 else INF
                hit = j < exposed
                pos = j
            else:
                hit = self._uniform() < f.level_at(t_ns)
            if hit:
                return _Hit(hit_kind, detectors, pos)
        others = self.ackers - (1 if self._participating(x) else 0)
        if others <= 0:
            return _Hit("ack", (x,))
        return None

    def _layout(self, g: int, msg: Any, esi: bool) -> WireLayout:
        """The wire bits of release g (rare: errored attempts only; cached for retries)."""
        key = (g, esi)
        lay = self._layouts.get(key)
        if lay is None:
            if len(self._layouts) >= LAYOUT_CACHE:
                self._layouts.clear()
            data = bytes(self.s.payloads[msg.rank][int(self.s.k[g])])
            lay = wire_layout(msg.id, msg.ext, msg.rtr, msg.fd, msg.brs, esi, msg.dlc, data)
            self._layouts[key] = lay
        return lay

    def _attempt(self, r: int, g: int, dur: int, start: int, pending: int, out_t: array,
                 out_g: array, dropped: list[int]) -> tuple[int, int]:
        """One transmission attempt on the slow path: errors, counters, suspend, recovery."""
        s = self.s
        msg = s.messages[r]
        x = self.msg_node[r]
        cx = self.counters[x]
        bits, dpb = int(s.bits[g]), int(s.data_phase_bits[g])
        esi = msg.fd and cx.error_passive
        if esi:  # the ESI bit changes stuffing and CRC: recompute this one frame exactly
            if g not in self._esi_bits:
                data = bytes(s.payloads[r][int(s.k[g])])
                eb, ed = frame_bits_reference(msg.id, msg.ext, msg.rtr, msg.fd, msg.brs, True,
                                              msg.dlc, data)
                edur = int(frame_durations_ns(np.array([eb]), np.array([ed]), self.nominal_bps,
                                              self.data_bps if msg.brs else None)[0])
                self._esi_bits[g] = (eb, ed, edur)
            bits, dpb, dur = self._esi_bits[g]
        if self.rec_run_start:
            self._count_recessive(start)
        hit = self._decide(x, start, bits, msg.ext)
        err = None if hit is None else self._resolve(hit, g, msg, x, bits, esi)
        passive_only: tuple[int, ...] = ()
        if err is not None and err.kind == "rx" and not err.active:
            # Every detector is error-passive: their flags are recessive, only they lose the
            # frame (REC + 1 each); it succeeds for everybody else.
            passive_only = err.passive
            t_rx = start + self._time_to_bit(err.d, bits, dpb)
            for n in passive_only:
                self.counters[n].receive_error(first_detector=False)
                self._event(t_rx, n, "rx_error")
                self._note(n, t_rx)
            self.errors.append({"t_ns": t_rx, "tx": self.names[x], "id_hex": msg.id_hex,
                                "kind": "rx-passive",
                                "detectors": [self.names[n] for n in passive_only],
                                "flag_bits": 0, "detected_as": err.dtype, "logged": None,
                                "arbitration_lost": False, "tx_counted": False,
                                "passive_flag": True})
            err = None
        transmitted = True
        if err is None:
            end = start + dur
            pos = len(out_t)
            out_t.append(start)
            out_g.append(g)
            if esi:
                self._esi[pos] = dur
            pending &= ~(1 << r)
            t_eof = end - int(round(INTERMISSION_BITS * self.bit_ns))
            if cx.tec:
                cx.transmit_success()
                self._event(t_eof, x, "tx_success")
                self._note(x, t_eof)
            for n, c in enumerate(self.counters):
                if n != x and n not in passive_only and c.rec and self._participating(n):
                    c.receive_success()
                    self._event(t_eof, n, "rx_success")
                    self._note(n, t_eof)
        else:
            end, transmitted, seen_whole = self._error(err, r, msg, x, start, bits, dpb, esi)
            if seen_whole:  # the logger received it complete: it goes into the log
                pos = len(out_t)
                out_t.append(start)
                out_g.append(g)
                if esi:
                    self._esi[pos] = dur
                self.unacked.append(pos)
            if cx.bus_off:
                lost = pending & self.node_mask[x]
                while lost:  # a loop over the node's pending frames (a few), at bus-off only
                    low = lost & -lost
                    dropped[low.bit_length() - 1] += 1
                    lost ^= low
                pending &= ~self.node_mask[x]
        if self.rec_run_start:
            self._new_runs(end)
        if transmitted and cx.error_passive and not cx.bus_off:
            self.susp_node = x
            self.susp_until = end + int(round(SUSPEND_BITS * self.bit_ns))
        elif self.susp_node == x:
            self.susp_node, self.susp_until = -1, INF
        self._recompute()
        return end, pending

    def _resolve(self, hit: _Hit, g: int, msg: Any, x: int, bits: int, esi: bool
                 ) -> _Detection | None:
        """Where the first detectors detect (flag start ``d``) and what they call it; None
        when the corrupted bit does no harm (per-bit noise in the ACK slot)."""
        kind = hit.kind
        if kind == "ack":  # detected at the ACK slot, flagged from the ACK delimiter
            return _Detection("ack", bits - ACK_DELIMITER_FROM_END, "ack", "ack", None, (x,), ())
        lay = self._layout(g, msg, esi)
        stuffed_to_crc_end = bits - TRAILER_BITS
        if kind == "tx":
            if hit.pos is None:  # per frame: a bit error somewhere after arbitration
                frac = 0.25 + 0.75 * self._uniform()
                d = int(frac * stuffed_to_crc_end) + 1
            else:
                d = min(lay.field.index("control") + hit.pos, lay.crc_delimiter - 1) + 1
            dtype, dfield = "bit", lay.field[d - 1]
        elif hit.pos is None:  # per frame, a receiver's detection: stuff or CRC, even odds
            u = self._uniform()
            if u < 0.5:
                d = int(2 * u * stuffed_to_crc_end) + 1
                dtype, dfield = "stuff", lay.field[d - 1]
            else:
                d, dtype, dfield = bits - EOF_FROM_END, "crc", "crc"
        else:
            seen = misread_detection(lay, hit.pos)
            if seen is None:
                return None
            d, dtype, dfield = seen[0] + 1, seen[1], seen[2]
        if kind == "bus":
            return _Detection("bus", d, dtype, dfield, lay, (), ())
        detectors = hit.detectors
        active = tuple(n for n in detectors if not self.counters[n].error_passive)
        passive = tuple(n for n in detectors if self.counters[n].error_passive)
        return _Detection(kind, d, dtype, dfield, lay, active, passive)

    def _error(self, det: _Detection, r: int, msg: Any, x: int, start: int, bits: int,
               dpb: int, esi: bool) -> tuple[int, bool, bool]:
        """Error signalling and counter changes of one destroyed frame.

        Returns (end of the error frame, whether x was still the transmitter at the end (it
        did not lose arbitration), whether the logger saw the frame complete)."""
        kind, d, lay = det.kind, det.d, det.lay
        t_flag = start + self._time_to_bit(d, bits, dpb)
        receivers = [n for n in range(len(self.names)) if n != x and self._participating(n)]
        cx = self.counters[x]
        x_passive = cx.error_passive
        tx_role = "tx_error"
        reactors_active = 0
        flag_end = d + ACTIVE_FLAG_BITS
        seen_whole = False
        first_flag_dominant = True
        rx_first: tuple[int, ...] = ()
        if kind == "ack":
            tx_role = "tx_ack_error"
            first_flag_dominant = not x_passive
            log = (d, "form", "ack")  # the transmitter's flag overwrites the ACK delimiter
            # a passive flag is recessive: a listen-only logger sees the frame complete
            seen_whole = x_passive and self.own_view
        elif kind == "bus":  # every node detects on the same bit
            log = (d - 1, det.dtype, det.dfield)
            first_flag_dominant = any(not self.counters[n].error_passive
                                      for n in receivers) or not x_passive
        else:
            assert lay is not None
            rx_first = det.active if kind == "rx" else ()
            first_flag_dominant = bool(rx_first) or (kind == "tx" and not x_passive)
            react = flag_detection(lay, d, dominant=first_flag_dominant)
            log = react
            if kind == "tx":
                # the corrupted bit is on the wire: the logger may trip over it first
                seen = misread_detection(lay, d - 1)
                if seen is not None and seen[1] != "crc" and seen[0] <= react[0]:
                    log = seen
            for n in receivers:
                if n not in rx_first and n not in det.passive \
                        and not self.counters[n].error_passive:
                    reactors_active += 1
                    flag_end = max(flag_end, react[0] + 1 + ACTIVE_FLAG_BITS)
            if kind == "rx":
                role, p = transmitter_reaction(lay, d, react[0])
                if role == "lost":
                    tx_role, p = "lost", react[0]
                elif role == "arb-stuff":
                    tx_role = "tx_arb_stuff_error"
                if not x_passive:
                    reactors_active += 1
                    flag_end = max(flag_end, p + 1 + ACTIVE_FLAG_BITS)
            if self.logger_ack:  # a logger that acknowledges flags errors too
                reactors_active += 1
                flag_end = max(flag_end, react[0] + 1 + ACTIVE_FLAG_BITS)
            if not first_flag_dominant:
                flag_end = max(flag_end, d + ACTIVE_FLAG_BITS)
        flag_bits = flag_end - d
        end = t_flag + int(round((flag_bits + ERROR_DELIMITER_BITS + INTERMISSION_BITS)
                                 * self.bit_ns))
        self.error_frames += 1
        self.busy_error_ns += end - start
        # the error record, as the logger's controller or as the first detector saw it
        if kind == "rx":
            first = rx_first[0]
        elif kind in ("tx", "ack"):
            first = x
        else:
            first = -1
        by = self.names[first] if (self.attribute and first >= 0) else None
        form = msg.form + ("e" if esi else "")
        logged: dict[str, Any] | None = None
        if not seen_whole:
            if self.own_view:
                # the flag and everything after it go at the nominal bit rate
                t_rec = t_flag + int(round((log[0] + 1 - d) * self.bit_ns))
                etype, efield = log[1], log[2]
                unknown_id = lay is not None and (d - (kind in ("bus", "tx"))) <= lay.id_done
            else:
                t_rec, etype, efield, unknown_id = t_flag, det.dtype, det.dfield, False
            ident = None if unknown_id else msg.id
            self.records.append((t_rec, r, error_line(t_rec, self.bus, etype, efield, ident,
                                                      None if unknown_id else msg.ext,
                                                      None if unknown_id else form, by)))
            logged = {"t_ns": t_rec, "type": etype, "field": efield}
        self.errors.append({
            "t_ns": t_flag, "tx": self.names[x], "id_hex": msg.id_hex, "kind": kind,
            "detectors": ([self.names[n] for n in rx_first] if kind == "rx" else
                          [self.names[x]] if kind in ("tx", "ack") else
                          [self.names[n] for n in [x, *receivers]]),
            "flag_bits": flag_bits, "detected_as": det.dtype, "logged": logged,
            "arbitration_lost": tx_role == "lost",
            "tx_counted": tx_role in ("tx_error", "tx_ack_error"),
            "passive_flag": not first_flag_dominant})
        # counters (ISO 11898-1 rules a, b, c)
        was_off = cx.bus_off
        if tx_role == "lost":  # no longer the transmitter: a receiver that detects (rule a)
            cx.receive_error()
            self._event(t_flag, x, "rx_error")
        else:
            cx.transmit_error(ack_error=kind == "ack",
                              arbitration_stuff_error=tx_role == "tx_arb_stuff_error")
            self._event(t_flag, x, tx_role)
        self._note(x, t_flag)
        if cx.bus_off and not was_off:
            self.truth[x].bus_off.append({"from_ns": t_flag, "to_ns": None})
            self.rec_occ[x] = 0
            self.rec_run_start[x] = end - TAIL_RECESSIVE_BITS * self.bit_ns
        for n in receivers:
            # rule b: a first detector sees the others' flags right after its own
            first_n = n in rx_first and reactors_active > 0
            self.counters[n].receive_error(first_detector=first_n)
            self._event(t_flag, n, "rx_error_first" if first_n else "rx_error")
            self._note(n, t_flag)
        return end, tx_role != "lost", seen_whole

    def _result(self, out_t: array, out_g: array, dropped: list[int]) -> BusResult:
        s = self.s
        start = np.frombuffer(out_t, dtype=np.int64).copy() if len(out_t) else np.zeros(0, np.int64)
        release = np.frombuffer(out_g, dtype=np.int64).copy() if len(out_g) else np.zeros(0, np.int64)
        durations = s.duration_ns[release] if len(release) else np.zeros(0, np.int64)
        esi = np.zeros(len(release), dtype=bool)
        for pos, dur in self._esi.items():  # frames sent with ESI (error-passive FD senders)
            durations[pos] = dur
            esi[pos] = True
        return BusResult(s, start, release, start + durations, esi, self.records,
                         np.asarray(dropped, dtype=np.int64), self.truth,
                         self.first_degraded, self.first_warning, self.error_frames,
                         self.busy_error_ns, self.trace, self.errors, self.unacked)


__all__ = ["BusEngine", "BusResult", "NodeTruth"]
