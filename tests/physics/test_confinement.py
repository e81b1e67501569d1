"""Rule facts of ISO 11898-1 fault confinement, checked on NodeCounters.

The rules are quoted from memory of ISO 11898-1:2015's fault-confinement clause and of the
Bosch CAN Specification 2.0 (1991), Part B, section 8 (rules 1-12, lettered a-l in
tracelab.physics.confinement); clause and rule numbers are not verified against the texts.
The per-event reference in tests/oracles/ checks the package against an independent
implementation of the same rules.
"""

from __future__ import annotations

import pytest

from tracelab.physics.confinement import (
    ConfinementConfig,
    NodeCounters,
    rec_after_successes,
    recovery_bits,
    state_of,
)


def test_lone_node_without_ack_reaches_128_at_16th_attempt_and_stays() -> None:
    # from memory: ISO 11898-1 fault-confinement rule c exception 1 (error-passive transmitter, ACK error, no dominant
    # bit during its passive flag): a lone node stops at TEC 128, never bus-off.
    node = NodeCounters()
    tecs = []
    for _ in range(100):
        node.transmit_error(ack_error=True)
        tecs.append(node.tec)
    assert tecs[14] == 120 and node.state != "bus-off"
    assert tecs[15] == 128  # the 16th attempt
    assert set(tecs[15:]) == {128}
    assert node.state == "error-passive" and not node.bus_off


def test_persistent_transmit_error_passive_after_16_bus_off_after_32() -> None:
    # from memory: ISO 11898-1 fault-confinement rules c and j: +8 per transmit error, bus-off when TEC > 255
    node = NodeCounters()
    states = []
    for _ in range(32):
        node.transmit_error()
        states.append(node.state)
    assert states[14] != "error-passive" and states[15] == "error-passive"  # after 16
    assert states[30] == "error-passive" and states[31] == "bus-off"  # after 32
    assert node.tec == 256


def test_alternating_error_success_tec_7k_plus_1() -> None:
    # from memory: ISO 11898-1 fault-confinement rules c and g (+8 / -1); the sequence is derived.
    node = NodeCounters()
    passive_at = bus_off_at = None
    for k in range(1, 40):
        node.transmit_error()
        if node.state == "error-passive" and passive_at is None:
            passive_at = (k, node.tec)
        if node.bus_off:
            bus_off_at = (k, node.tec)
            break
        node.transmit_success()
        assert node.tec == 7 * k  # after the success
    assert passive_at == (19, 134)
    assert bus_off_at == (37, 260)


def test_tec_after_kth_error_in_alternation() -> None:
    # from memory: ISO 11898-1 fault-confinement rules c and g; TEC = 7k + 1 right after the k-th error (derived)
    node = NodeCounters()
    for k in range(1, 30):
        node.transmit_error()
        assert node.tec == 7 * k + 1
        node.transmit_success()


def test_first_detector_gains_9_others_1() -> None:
    # from memory: ISO 11898-1 fault-confinement rules a and b (first detector sees a dominant bit after its flag)
    first, other = NodeCounters(), NodeCounters()
    first.receive_error(first_detector=True)
    other.receive_error()
    assert (first.rec, other.rec) == (9, 1)


@pytest.mark.parametrize("after", [119, 123, 127])
def test_rec_above_127_returns_into_119_127_after_one_good_reception(after: int) -> None:
    # from memory: ISO 11898-1 fault-confinement rule h: REC > 127 is set to a value between 119 and 127
    config = ConfinementConfig(rec_after_passive_reception=after)
    node = NodeCounters(rec=140, config=config)
    assert node.state == "error-passive"
    node.receive_success()
    assert 119 <= node.rec <= 127 and node.rec == after
    assert node.state == "warning"  # REC >= 96: still above the warning limit
    assert rec_after_successes(140, 1, config) == after


def test_rec_out_of_range_is_refused() -> None:
    # from memory (rule h): the value lies in 119..127, both ends allowed
    for bad in (118, 128):
        with pytest.raises(ValueError, match=r"rec_after_passive_reception must lie in 119\.\.127"):
            ConfinementConfig(rec_after_passive_reception=bad)
    for good in (119, 127):
        assert ConfinementConfig(rec_after_passive_reception=good).rec_after_passive_reception == good


def test_bus_off_recovery_128_x_11_bits_is_2816_us_at_500k() -> None:
    # from memory: ISO 11898-1 fault-confinement rule l (128 occurrences of 11 consecutive recessive bits)
    assert recovery_bits() == 1408
    bit_ns = 1e9 / 500_000
    assert recovery_bits() * bit_ns == pytest.approx(2_816_000)  # 2.816 ms
    node = NodeCounters(tec=300, bus_off=True)
    node.recover()
    assert (node.tec, node.rec, node.state) == (0, 0, "error-active")


def test_state_thresholds() -> None:
    # from memory: ISO 11898-1 fault-confinement rules i, j, k: passive above 127, bus-off above 255
    assert state_of(127, 127) == "warning"
    assert state_of(128, 0) == "error-passive" and state_of(0, 128) == "error-passive"
    assert state_of(255, 0) == "error-passive" and state_of(256, 0) == "bus-off"
    # warning limit 96, controllers differ on >= or > (common practice, no source)
    assert state_of(96, 0) == "warning"
    assert state_of(96, 0, config=ConfinementConfig(warning_inclusive=False)) == "error-active"
    assert state_of(95, 95) == "error-active"


def test_bus_off_node_ignores_further_events() -> None:
    node = NodeCounters(tec=250)
    node.transmit_error()
    assert node.bus_off
    node.transmit_error()
    node.receive_error()
    node.transmit_success(10)
    assert (node.tec, node.rec, node.state) == (258, 0, "bus-off")
