"""The bit-level view of an errored frame: wire labels, flag detection, the transmitter's
monitor. Expected positions are worked out by hand from the rule text (``# derived``).

source of the rules: ISO 11898-1:2015 clause 10.4 (frame formats), 10.5 (bit stuffing: a
complementary bit after five equal bits, SOF .. CRC sequence; CAN FD fixed stuff bits in the
CRC field), 10.9 (bit, stuff, form errors; no bit error for a recessive bit overwritten in
arbitration or the ACK slot) (clause numbers from memory); Bosch CAN 2.0 Part B sections 5
and 7 (from memory).
"""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from tracelab.physics.bitlength import frame_bits_reference
from tracelab.simulate.wire import (
    ACK_SLOT,
    CRC_DELIMITER,
    EOF,
    FIXED_STUFF,
    flag_detection,
    misread_detection,
    transmitter_reaction,
    wire_layout,
)


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 0x1FFFFFFF), st.booleans(), st.booleans(), st.booleans(),
       st.integers(0, 15), st.binary(min_size=64, max_size=64))
def test_layout_covers_every_wire_bit(ident: int, ext: bool, fd: bool, brs: bool, dlc: int,
                                      data: bytes) -> None:
    ident &= 0x1FFFFFFF if ext else 0x7FF
    lay = wire_layout(ident, ext, False, fd, brs and fd, False, dlc, data)
    bits, _ = frame_bits_reference(ident, ext, False, fd, brs and fd, False, dlc, data)
    assert len(lay.bits) == len(lay.region) == len(lay.field) == bits
    # trailer: CRC delimiter, ACK slot, ACK delimiter, 7 EOF, 3 intermission = 13 bits
    assert lay.crc_delimiter == bits - 13  # derived
    assert lay.region[lay.crc_delimiter] == CRC_DELIMITER
    assert lay.region[lay.crc_delimiter + 1] == ACK_SLOT
    assert [lay.region[i] for i in range(lay.eof, lay.eof + 7)] == [EOF] * 7
    assert lay.field[0] == "sof" and lay.field[1] == "arbitration"
    # the identifier is known after ID + RTR + IDE (base) or .. ID_lo + RTR (extended):
    # at least 13 / 32 wire bits
    assert lay.id_done >= (32 if ext else 13)
    # every dynamic stuff bit follows five equal bits and is their complement
    for i, stuffed in enumerate(lay.stuff_bit):
        if stuffed:
            assert len(set(lay.bits[i - 5:i])) == 1 and lay.bits[i] != lay.bits[i - 1]
    if fd:
        assert sum(r == FIXED_STUFF for r in lay.region) in (6, 7)  # CRC-17 / CRC-21


def test_flag_detection_in_the_identifier() -> None:
    # ID 0x000: SOF + four dominant ID bits, then a recessive stuff bit at wire bit 5
    lay = wire_layout(0x000, False, False, False, False, False, 0, b"")
    assert lay.bits[:6] == (0, 0, 0, 0, 0, 1) and lay.stuff_bit[5]  # derived
    # a flag from bit 3: bits 0..2 were dominant, so the 6th equal bit is bit 5
    assert flag_detection(lay, 3) == (5, "stuff", "arbitration")  # derived
    # a flag right after the stuff bit: six dominant bits of its own, the 6th at bit 11
    assert flag_detection(lay, 6) == (11, "stuff", "arbitration")  # derived


def test_flag_detection_in_fixed_form_fields() -> None:
    lay = wire_layout(0x123, False, False, False, False, False, 2, b"\x55\xaa")
    d = lay.crc_delimiter
    assert flag_detection(lay, d) == (d, "form", "crc")
    # from the ACK slot (dominant is fine there) the ACK delimiter is the first violation
    assert flag_detection(lay, d + 1) == (d + 2, "form", "ack")
    assert flag_detection(lay, lay.eof) == (lay.eof, "form", "eof")


def test_fd_flag_in_the_crc_field_hits_a_fixed_stuff_bit() -> None:
    lay = wire_layout(0x123, False, False, True, True, False, 8, bytes(range(8)))
    fixed = [i for i, r in enumerate(lay.region) if r == FIXED_STUFF]
    for d in range(fixed[1] + 1, fixed[-1]):
        p, kind, field = flag_detection(lay, d)
        # fixed stuff bits come every 5 bits, so six dominant bits overwrite one
        assert kind == "stuff" and field == "crc" and d <= p <= d + 5 and p in fixed


def test_passive_flag_of_a_transmitter() -> None:
    lay = wire_layout(0x555, False, False, False, False, False, 8, b"\x55" * 8)
    data = lay.field.index("data")
    assert lay.bits[data:data + 2] == (0, 1)  # 0x55 = 01010101
    # six recessive bits from the second data bit: the 6th is a stuff error
    assert flag_detection(lay, data + 1, dominant=False) == (data + 6, "stuff", "data")
    # a passive flag over the last CRC bit and the delimiter breaks no stuffing rule (when
    # the bit before it is dominant) but has changed the CRC bits: a CRC error
    d = lay.crc_delimiter - 1
    assert lay.bits[d - 1] == 0 and not lay.stuff_bit[d]  # precondition of this frame
    assert flag_detection(lay, d, dominant=False) == (lay.ack_delimiter, "crc", "crc")


def test_transmitter_monitor_against_a_foreign_flag() -> None:
    # all-recessive identifier: the first flag bit overwrites a recessive ID bit: it lost
    # arbitration (no bit error during arbitration)
    ones = wire_layout(0x7FF, False, False, False, False, False, 0, b"")
    assert transmitter_reaction(ones, 1, 6) == ("lost", 1)
    # ID 0x000: its first recessive bit is the stuff bit at 5: rule c exception 2
    zeros = wire_layout(0x000, False, False, False, False, False, 0, b"")
    assert transmitter_reaction(zeros, 1, 5) == ("arb-stuff", 5)
    # after arbitration a recessive bit read dominant is a bit error
    lay = wire_layout(0x000, False, False, False, False, False, 1, b"\xff")
    data = lay.field.index("data")
    assert transmitter_reaction(lay, data, data + 5) == ("bit", data)
    # the ACK slot is no bit error for the transmitter
    d = lay.crc_delimiter + 1
    assert transmitter_reaction(lay, d, d)[0] == "none"


def test_misread_bits() -> None:
    lay = wire_layout(0x000, False, False, False, False, False, 1, b"\x55")
    assert misread_detection(lay, 5) == (5, "stuff", "arbitration")  # an inverted stuff bit
    data = lay.field.index("data")
    # 0x55 = 01010101: inverting one bit leaves no run of six: only the CRC can tell
    assert misread_detection(lay, data + 3) == (lay.ack_delimiter, "crc", "crc")
    assert misread_detection(lay, lay.crc_delimiter) == (lay.crc_delimiter, "form", "crc")
    assert misread_detection(lay, lay.crc_delimiter + 1) is None  # the ACK slot
