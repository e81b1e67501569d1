"""One errored frame bit by bit: where each wire bit sits, and who detects what when.

The event loop knows frames only by their length; when an attempt fails (a rare event) the
simulator builds that frame's exact wire bits with
``tracelab.physics.bitlength.frame_wire_reference`` and labels every bit with its field and
the check a receiver applies to it (ISO 11898-1:2015 clauses 10.4 frame formats, 10.5 bit
stuffing, 10.9 error detection; clause numbers from memory). With those labels it answers:

- where a listen-only node detects an error flag that starts at wire bit ``d`` (a stuff
  error when the flag's six dominant bits make a sixth equal bit in a stuffed field or
  overwrite a CAN FD fixed stuff bit, a form error when they reach a fixed-form bit: CRC
  delimiter, ACK delimiter, EOF), :func:`flag_detection`;
- what a receiver detects when bit ``j`` is read wrong (stuff, form or CRC error),
  :func:`misread_detection`;
- what the transmitter's bit monitor makes of another node's flag: a lost arbitration (its
  recessive identifier bit overwritten), the stuff-bit exception of rule c, or a bit error,
  :func:`transmitter_reaction`.

Loops here run over the bits of one errored frame (a few hundred), never over frames.
"""

from __future__ import annotations

from dataclasses import dataclass

from tracelab.physics.bitlength import (
    FIXED_STUFF_PERIOD,
    LAYOUTS,
    STUFF_COUNT_BITS,
    STUFF_RUN,
    TRAILER,
    fd_crc_bits,
    frame_wire_reference,
    payload_bytes,
)

#: What a receiver checks at each wire bit.
STUFFED = 0  # dynamic bit stuffing applies (SOF .. CRC sequence; CAN FD: SOF .. data)
FIXED_STUFF = 1  # a CAN FD fixed stuff bit: must be the complement of the bit before it
FIXED = 2  # CAN FD stuff count and CRC sequence bits: no stuffing check
CRC_DELIMITER = 3  # fixed form, recessive
ACK_SLOT = 4  # anything goes for a receiver
ACK_DELIMITER = 5  # fixed form, recessive
EOF = 6  # fixed form, recessive
INTERFRAME = 7
FORM_REGIONS = (CRC_DELIMITER, ACK_DELIMITER, EOF)
_TRAILER_REGION = {"crc_delimiter": CRC_DELIMITER, "ack_slot": ACK_SLOT,
                   "ack_delimiter": ACK_DELIMITER, "eof": EOF, "intermission": INTERFRAME}
_TRAILER_FIELD = {"crc_delimiter": "crc", "ack_slot": "ack", "ack_delimiter": "ack",
                  "eof": "eof", "intermission": "interframe"}
#: Header fields (bitlength.LAYOUTS names) of the arbitration field; the rest is control.
_ARBITRATION = {"id", "id_hi", "id_lo", "srr", "rtr", "rrs"}
#: The bits a receiver needs before it knows the identifier and its format.
_ID_LAST = {False: ("ide",), True: ("rtr", "rrs")}  # base: ID, RTR, IDE; ext: .. ID_lo, RTR


@dataclass(frozen=True)
class WireLayout:
    bits: tuple[int, ...]
    region: tuple[int, ...]
    field: tuple[str, ...]
    stuff_bit: tuple[bool, ...]  # a dynamic stuff bit (inserted by the transmitter)
    id_done: int  # wire index of the last bit before the identifier is known
    crc_delimiter: int  # wire index of the CRC delimiter

    @property
    def ack_delimiter(self) -> int:
        return self.crc_delimiter + 2

    @property
    def eof(self) -> int:
        return self.crc_delimiter + 3


def wire_layout(ident: int, ext: bool, rtr: bool, fd: bool, brs: bool, esi: bool, dlc: int,
                data: bytes) -> WireLayout:
    """The frame's wire bits with a field and a receiver check per bit."""
    wf = frame_wire_reference(ident, ext, rtr, fd, brs, esi, dlc, data)
    wire = wf.bits
    n_bytes = payload_bytes(dlc, fd, rtr)
    labels: list[tuple[str, str]] = []  # (layout name, field) per source bit
    for name, width, _ in LAYOUTS[(fd, ext)]:
        if name == "sof":
            fld = "sof"
        elif name in _ARBITRATION or (name == "ide" and ext):
            fld = "arbitration"
        else:
            fld = "control"
        labels += [(name, fld)] * width
    labels += [("data", "data")] * (8 * n_bytes)
    if not fd:
        labels += [("crc", "crc")] * 15
    region: list[int] = []
    field: list[str] = []
    stuff: list[bool] = []
    id_done = -1
    last, run, w = -1, 0, 0

    def take(reg: int, fld: str, is_stuff: bool) -> int:
        nonlocal last, run, w
        bit = wire[w]
        run = run + 1 if bit == last else 1
        last = bit
        region.append(reg)
        field.append(fld)
        stuff.append(is_stuff)
        w += 1
        return bit

    id_last = _ID_LAST[ext]
    for i, (name, fld) in enumerate(labels):  # the stuffing walk of frame_wire_reference
        take(STUFFED, fld, False)
        if name in id_last:
            id_done = w - 1
        if run == STUFF_RUN and (not fd or i < len(labels) - 1):
            take(STUFFED, fld, True)
    if fd:
        tail = STUFF_COUNT_BITS + fd_crc_bits(n_bytes)
        for k in range(tail):
            if k % FIXED_STUFF_PERIOD == 0:
                take(FIXED_STUFF, "crc", False)
            take(FIXED, "crc", False)
    crc_delimiter = w
    for name, width, _ in TRAILER:
        for _ in range(width):
            take(_TRAILER_REGION[name], _TRAILER_FIELD[name], False)
    assert w == len(wire)
    return WireLayout(wire, tuple(region), tuple(field), tuple(stuff), id_done, crc_delimiter)


def _run_before(lay: WireLayout, d: int, level: int) -> int:
    """Consecutive wire bits at ``level`` right before bit d, inside the stuffed region."""
    k = 0
    q = d - 1
    while q >= 0 and lay.bits[q] == level and lay.region[q] == STUFFED and k < STUFF_RUN:
        k += 1
        q -= 1
    return k


def flag_detection(lay: WireLayout, d: int, dominant: bool = True) -> tuple[int, str, str]:
    """(bit, type, field) where a receiver whose own bits were fine detects an error flag
    that starts at wire bit d: six dominant bits (an active flag), or six recessive ones
    (the passive flag of an error-passive transmitter).

    An active flag always breaks a rule within its six bits. A passive flag that breaks no
    stuffing rule before the stuffed bits end has still replaced some of the frame's
    dominant bits: the receivers fail the CRC check (flagged after the ACK delimiter).
    """
    level = 0 if dominant else 1
    before = _run_before(lay, d, level)
    for p in range(d, min(d + 6, len(lay.bits))):
        reg = lay.region[p]
        if reg in FORM_REGIONS:
            if dominant:
                return p, "form", lay.field[p]
            break
        if reg == FIXED_STUFF and (p > d or lay.bits[p - 1] == level):
            return p, "stuff", lay.field[p]
        if reg == STUFFED and before + (p - d + 1) > STUFF_RUN:
            return p, "stuff", lay.field[p]
    if not dominant:
        return lay.ack_delimiter, "crc", "crc"
    # not reached for a flag that starts before EOF: six dominant bits always break a rule
    last = min(d + 5, len(lay.bits) - 1)
    return last, "form", lay.field[last]


def misread_detection(lay: WireLayout, j: int) -> tuple[int, str, str] | None:
    """What a receiver that reads wire bit j inverted detects: (bit, type, field), where bit
    is the last bit before its flag; None when nothing is detected (the ACK slot).

    A misread that makes a sixth equal bit (or inverts a stuff bit) is a stuff error there;
    one in a fixed-form bit a form error; any other leaves the stuffing intact and fails the
    CRC check, flagged after the ACK delimiter (ISO 11898-1 clause 10.9, from memory).
    """
    reg = lay.region[j]
    if reg in (ACK_SLOT, INTERFRAME):
        return None
    if reg in FORM_REGIONS:
        return j, "form", lay.field[j]
    if reg == FIXED_STUFF:
        return j, "stuff", lay.field[j]
    if reg == STUFFED:
        v = 1 - lay.bits[j]
        left = 0
        q = j - 1
        while q >= 0 and lay.region[q] == STUFFED and lay.bits[q] == v and left < STUFF_RUN:
            left += 1
            q -= 1
        right = 0
        q = j + 1
        while q < len(lay.bits) and lay.region[q] == STUFFED and lay.bits[q] == v \
                and right < STUFF_RUN:
            right += 1
            q += 1
        if left + 1 + right > STUFF_RUN:
            p = j + max(0, STUFF_RUN - left)
            return p, "stuff", lay.field[p]
    return lay.ack_delimiter, "crc", "crc"


def transmitter_reaction(lay: WireLayout, d: int, until: int) -> tuple[str, int]:
    """The transmitter's bit monitor against another node's flag starting at bit d, up to
    bit ``until`` (where it would detect the flag as a receiver does): ("lost", p) when a
    recessive identifier bit of its own is overwritten at p (it lost arbitration and carries
    on as a receiver), ("arb-stuff", p) for a recessive stuff bit inside the arbitration
    field (rule c exception 2), ("bit", p) for a bit error, ("none", until) otherwise.

    source: ISO 11898-1 bit monitoring / arbitration (clauses 10.9.2 and 10.8, from memory):
    no bit error is flagged for a recessive bit monitored dominant during arbitration or in
    the ACK slot.
    """
    for p in range(d, min(until + 1, len(lay.bits))):
        if lay.bits[p] != 1 or lay.region[p] == ACK_SLOT:
            continue
        if lay.field[p] == "arbitration":
            return ("arb-stuff" if lay.stuff_bit[p] else "lost"), p
        return "bit", p
    return "none", until


__all__ = ["WireLayout", "flag_detection", "misread_detection", "transmitter_reaction",
           "wire_layout"]
