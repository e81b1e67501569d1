"""An independent reference of the fault-confinement counters, one event at a time.

Written from the rule text of ISO 11898-1 (fault confinement, rules a..l as numbered in
docs/forensics.md section 1), NOT from tracelab's code: this module imports nothing from
tracelab. Tests replay the same event streams through it and through
``tracelab.physics.confinement.NodeCounters``, the simulator and the forensic replay, and
require equal trajectories.

Clause numbers: ISO 11898-1:2015 clause 12.1.4 "Fault confinement" (from memory, the
numbering is not checkable here). The same rules, numbered 1..12, are in the Bosch CAN
Specification 2.0 (1991), Part B, section 8 "Fault confinement" (from memory); rule letters
a..l below follow that order: rule 1 = a, ..., rule 12 = l.

Usage::

    from tests.oracles.counters_reference import Event, replay_events
    traj = replay_events([Event(10, "ecu_a", "tx_error"), Event(20, "ecu_a", "tx_success")])
    traj["ecu_a"]  # [[0, 0, 0, "error-active"], [10, 8, 0, "error-active"], [20, 7, 0, ...]]

Event kinds (``Event.kind``), one node's view of one bus event:

==================== ====== ===========================================================
kind                 rule   meaning
==================== ====== ===========================================================
rx_error             a      the node, a receiver, detects an error (REC +1)
rx_error_first       a + b  the node, a receiver, detects an error and sees a dominant bit
                            as the first bit after its own error flag, i.e. it detected
                            first and the others' flags follow (REC +1 +8)
rx_flag_bit_error    e      receiver: bit error while sending an active error flag (+8)
rx_dominant_8        f      receiver: 14 dominant bits after an active flag / 8 after a
                            passive one / each further 8 (REC +8)
tx_error             c      the node, a transmitter, sends an error flag (TEC +8)
tx_ack_error         c      transmitter: ACK error; ``dominant_in_passive_flag`` says whether
                            it saw a dominant bit during its passive flag (exception 1)
tx_arb_stuff_error   c      transmitter: stuff error during arbitration on a recessive stuff
                            bit before RTR monitored dominant (exception 2: TEC unchanged)
tx_flag_bit_error    d      transmitter: bit error while sending an active error flag (+8)
tx_dominant_8        f      transmitter: as rx_dominant_8 (TEC +8)
tx_success           g      successful transmission (TEC -1, not below 0)
rx_success           h      successful reception (REC -1 when 1..127; 0 stays 0; above 127
                            set to a value in 119..127)
recessive_11         l      ``count`` occurrences of 11 consecutive recessive bits, counted
                            while bus-off; the 128th ends bus-off (TEC = REC = 0)
==================== ====== ===========================================================

States: rule i (TEC > 127 or REC > 127: error-passive), rule j (TEC > 255: bus-off), rule k
(both <= 127 again: error-active). "warning" is the error warning limit, 96 in the Bosch
specification's note on "heavily disturbed" buses (from memory); controllers differ in
whether 96 itself counts, so it is a parameter.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

RX_KINDS = ("rx_error", "rx_error_first", "rx_flag_bit_error", "rx_dominant_8", "rx_success")
TX_KINDS = ("tx_error", "tx_ack_error", "tx_arb_stuff_error", "tx_flag_bit_error",
            "tx_dominant_8", "tx_success")
KINDS = RX_KINDS + TX_KINDS + ("recessive_11",)


@dataclass(frozen=True)
class Event:
    t_ns: int
    node: str
    kind: str
    #: recessive_11: how many 11-bit recessive occurrences this event stands for
    count: int = 1
    #: tx_ack_error: did the node see a dominant bit while sending its passive error flag?
    dominant_in_passive_flag: bool = False


@dataclass
class ReferenceNode:
    """One controller's counters, changed only by :meth:`apply`."""

    warning_level: int = 96
    warning_inclusive: bool = True
    rec_after_passive: int = 119
    tec: int = 0
    rec: int = 0
    bus_off: bool = False
    recessive_seen: int = 0
    trajectory: list[list[object]] = field(default_factory=lambda: [[0, 0, 0, "error-active"]])

    def state(self) -> str:
        if self.bus_off:  # rule j
            return "bus-off"
        if self.tec > 127 or self.rec > 127:  # rule i
            return "error-passive"
        hot = max(self.tec, self.rec)  # rule k: error-active again; the warning limit
        warn = hot >= self.warning_level if self.warning_inclusive else hot > self.warning_level
        return "warning" if warn else "error-active"

    def apply(self, ev: Event) -> None:
        kind = ev.kind
        if kind not in KINDS:
            raise ValueError(f"unknown event kind {kind!r}")
        if self.bus_off:
            # A bus-off node takes no part in bus traffic; it only watches for recovery.
            if kind == "recessive_11":
                self.recessive_seen += ev.count
                if self.recessive_seen >= 128:  # rule l
                    self.tec = self.rec = 0
                    self.bus_off = False
                    self.recessive_seen = 0
            return
        passive = self.tec > 127 or self.rec > 127
        if kind == "rx_error":  # rule a
            self.rec += 1
        elif kind == "rx_error_first":  # rules a and b
            self.rec += 1 + 8
        elif kind in ("rx_flag_bit_error", "rx_dominant_8"):  # rules e, f
            self.rec += 8
        elif kind in ("tx_error", "tx_flag_bit_error", "tx_dominant_8"):  # rules c, d, f
            self.tec += 8
        elif kind == "tx_ack_error":  # rule c, exception 1
            if not (passive and not ev.dominant_in_passive_flag):
                self.tec += 8
        elif kind == "tx_arb_stuff_error":  # rule c, exception 2
            pass
        elif kind == "tx_success":  # rule g
            if self.tec > 0:
                self.tec -= 1
        elif kind == "rx_success":  # rule h
            if 1 <= self.rec <= 127:
                self.rec -= 1
            elif self.rec > 127:
                self.rec = self.rec_after_passive
        if self.tec > 255:  # rule j
            self.bus_off = True
            self.recessive_seen = 0

    def note(self, t_ns: int) -> None:
        row = [t_ns, self.tec, self.rec, self.state()]
        if self.trajectory[-1][1:] != row[1:]:
            self.trajectory.append(row)


def replay_events(events: Iterable[Event], nodes: Iterable[str] = (), warning_level: int = 96,
                  warning_inclusive: bool = True, rec_after_passive: int = 119
                  ) -> dict[str, list[list[object]]]:
    """Trajectories ``[t_ns, tec, rec, state]`` per node: a row after every event that changes
    TEC, REC or the state, starting with ``[0, 0, 0, "error-active"]``.

    Events are applied in the order given (the caller sorts them by time).
    """
    if not 119 <= rec_after_passive <= 127:
        raise ValueError("rule h: the value after a passive reception lies in 119..127")
    state: dict[str, ReferenceNode] = {}

    def node(name: str) -> ReferenceNode:
        if name not in state:
            state[name] = ReferenceNode(warning_level, warning_inclusive, rec_after_passive)
        return state[name]

    for name in nodes:
        node(name)
    for ev in events:
        n = node(ev.node)
        n.apply(ev)
        n.note(ev.t_ns)
    return {name: n.trajectory for name, n in state.items()}


def transitions(trajectory: list[list[object]]) -> list[dict[str, object]]:
    """State changes ``{t_ns, from, to}`` of one trajectory."""
    out: list[dict[str, object]] = []
    for before, row in zip(trajectory, trajectory[1:], strict=False):
        if row[3] != before[3]:
            out.append({"t_ns": row[0], "from": before[3], "to": row[3]})
    return out


__all__ = ["KINDS", "Event", "ReferenceNode", "replay_events", "transitions"]
