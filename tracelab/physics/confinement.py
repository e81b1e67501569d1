"""ISO 11898-1 fault confinement: the counter rules as a table, and one node's counters.

Both the simulator (which applies the rules frame by frame) and the forensic replay (which
applies them event by event, with success counts in between) use this module, so the two
cannot disagree about the rules.

Source of the rules: ISO 11898-1:2015, clause 12.1.4 "Fault confinement" (numbering from
memory); the same twelve rules appear in the Bosch CAN Specification 2.0 (1991), Part B,
section 8 (also quoted from memory here; tests/oracles/ holds an independent reference).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

State = Literal["error-active", "warning", "error-passive", "bus-off"]
STATES: tuple[State, ...] = ("error-active", "warning", "error-passive", "bus-off")
#: Severity order, for "worst state reached".
STATE_RANK = {s: i for i, s in enumerate(STATES)}


@dataclass(frozen=True)
class Rule:
    rule: str
    who: str
    event: str
    tec: int
    rec: int
    note: str = ""


#: ISO 11898-1:2015 clause 12.1.4 (Bosch CAN 2.0 Part B section 8), rules 1-12.
RULES: tuple[Rule, ...] = (
    Rule("a", "receiver", "detects an error", 0, +1,
         "not for a bit error while sending an active error flag or overload flag"),
    Rule("b", "receiver", "sees a dominant bit as the first bit after its own error flag", 0, +8,
         "this is the first detector: +1 (rule a) +8 = +9 per error"),
    Rule("c", "transmitter", "sends an error flag", +8, 0,
         "exception 1: error-passive, ACK error, no dominant bit during its passive flag; "
         "exception 2: stuff error during arbitration on a recessive stuff bit read dominant"),
    Rule("d", "transmitter", "bit error while sending an active error flag or overload flag", +8, 0),
    Rule("e", "receiver", "bit error while sending an active error flag or overload flag", 0, +8),
    Rule("f", "any", "14 dominant bits after an active flag / 8 after a passive flag, "
         "and each further 8", +8, +8, "applied to transmitters (TEC) and receivers (REC)"),
    Rule("g", "transmitter", "successful transmission", -1, 0, "not below 0"),
    Rule("h", "receiver", "successful reception", 0, -1,
         "1..127: -1; 0 stays 0; above 127: set to a value in 119..127"),
    Rule("i", "any", "TEC > 127 or REC > 127", 0, 0, "error-passive"),
    Rule("j", "any", "TEC > 255", 0, 0, "bus-off"),
    Rule("k", "any", "TEC <= 127 and REC <= 127", 0, 0, "error-active again"),
    Rule("l", "any", "128 occurrences of 11 consecutive recessive bits while bus-off", 0, 0,
         "error-active with TEC = REC = 0"),
)

TRANSMIT_ERROR_TEC = 8
RECEIVE_ERROR_REC = 1
FIRST_DETECTOR_EXTRA_REC = 8
PASSIVE_LIMIT = 127  # error-passive when a counter exceeds it
BUS_OFF_LIMIT = 255  # bus-off when TEC exceeds it
RECOVERY_SEQUENCES = 128
RECOVERY_SEQUENCE_BITS = 11


@dataclass(frozen=True)
class ConfinementConfig:
    """Choices the standard leaves to the controller.

    warning_level / warning_inclusive: the error warning limit (96 in most controllers; some
    flag at >= 96, others at > 96). rec_after_passive_reception: the value REC takes on a
    successful reception when above 127; the standard allows 119..127 and we default to 119.
    recovery: ``auto`` starts bus-off recovery at once, ``software`` after recovery_delay_ns.
    """

    warning_level: int = 96
    warning_inclusive: bool = True
    rec_after_passive_reception: int = 119
    recovery: Literal["auto", "software"] = "auto"
    recovery_delay_ns: int = 0

    def __post_init__(self) -> None:
        if not 119 <= self.rec_after_passive_reception <= 127:
            raise ValueError("rec_after_passive_reception must lie in 119..127 (ISO 11898-1)")


DEFAULT_CONFIG = ConfinementConfig()


def recovery_bits() -> int:
    """Minimum bus-off recovery: 128 x 11 recessive bit times (1408)."""
    return RECOVERY_SEQUENCES * RECOVERY_SEQUENCE_BITS


def state_of(tec: int, rec: int, bus_off: bool = False,
             config: ConfinementConfig = DEFAULT_CONFIG) -> State:
    """The fault-confinement state for these counters ('warning' is the error warning limit)."""
    if bus_off or tec > BUS_OFF_LIMIT:
        return "bus-off"
    if tec > PASSIVE_LIMIT or rec > PASSIVE_LIMIT:
        return "error-passive"
    level = config.warning_level
    hot = max(tec, rec)
    if hot >= level if config.warning_inclusive else hot > level:
        return "warning"
    return "error-active"


def rec_after_successes(rec: int, n: int, config: ConfinementConfig = DEFAULT_CONFIG) -> int:
    """REC after n successful receptions in a row (rule h applied n times)."""
    if n <= 0:
        return rec
    if rec > PASSIVE_LIMIT:
        rec, n = config.rec_after_passive_reception, n - 1
    return max(0, rec - n)


@dataclass
class NodeCounters:
    """TEC / REC and bus-off flag of one node; methods apply one rule each."""

    tec: int = 0
    rec: int = 0
    bus_off: bool = False
    config: ConfinementConfig = DEFAULT_CONFIG

    @property
    def state(self) -> State:
        return state_of(self.tec, self.rec, self.bus_off, self.config)

    @property
    def error_passive(self) -> bool:
        return self.tec > PASSIVE_LIMIT or self.rec > PASSIVE_LIMIT

    def transmit_error(self, ack_error: bool = False, saw_dominant_in_passive_flag: bool = False,
                       arbitration_stuff_error: bool = False) -> None:
        """Rule c with its two exceptions."""
        if self.bus_off:
            return
        if ack_error and self.error_passive and not saw_dominant_in_passive_flag:
            return
        if arbitration_stuff_error:
            return
        self.tec += TRANSMIT_ERROR_TEC
        if self.tec > BUS_OFF_LIMIT:
            self.bus_off = True

    def receive_error(self, first_detector: bool = False) -> None:
        """Rule a, plus rule b for the node that detected first."""
        if self.bus_off:
            return
        self.rec += RECEIVE_ERROR_REC + (FIRST_DETECTOR_EXTRA_REC if first_detector else 0)

    def transmit_success(self, n: int = 1) -> None:
        """Rule g, n times."""
        if not self.bus_off:
            self.tec = max(0, self.tec - n)

    def receive_success(self, n: int = 1) -> None:
        """Rule h, n times."""
        if not self.bus_off:
            self.rec = rec_after_successes(self.rec, n, self.config)

    def recover(self) -> None:
        """Rule l: after 128 x 11 recessive bits a bus-off node restarts with zero counters."""
        self.tec = self.rec = 0
        self.bus_off = False
