"""An independent frame bit-string builder, written from the frame-format rules of
ISO 11898-1:2015 (clause 10; clause numbers from memory), for tests only.

Nothing here imports tracelab.physics: the field order of every format is spelled out as
its own list below, the CRCs are computed by polynomial long division (not by the shift
register the package uses), and bit stuffing is done by scanning the finished bit string.
A second formulation of each CRC (the standard's shift register, written here again) is
held equal to the long division in tests/oracles/test_frame_oracle.py.

Conventions (same meaning as the package's ``frame_bits``, from docs/frame-physics.md):
``bits`` counts SOF through the 3-bit intermission; ``data_phase_bits`` is 0 without BRS,
else the bits from ESI through the last CRC-field bit plus one (BRS and the CRC delimiter
together last one nominal plus one data bit time).
"""

from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction

# The three generator polynomials as exponent lists. source: CiA "CRC in CAN frames"
# (can-cia.org/can-knowledge/can/crc/) for CRC-15 and CRC-21; for CRC-17 that page prints
# x^17+x^16+x^14+x^13+x^11+x^6+x^4+x^1+1 without the x^3 term, while the public CRC catalogue
# entry CRC-17/CAN-FD (poly 0x1685B, as crccheck's Crc17CanFd defines it, check 0x4F03) has
# it; the catalogue's check value decides (tests/oracles/test_frame_oracle.py).
G15 = (15, 14, 10, 8, 7, 4, 3, 0)
G17 = (17, 16, 14, 13, 11, 6, 4, 3, 1, 0)
G21 = (21, 20, 13, 11, 7, 4, 3, 0)

# from memory (ISO 11898-1:2015): payload bytes per DLC; classic 9..15 carry 8.
_FD_LEN = {9: 12, 10: 16, 11: 20, 12: 24, 13: 32, 14: 48, 15: 64}


def n_data_bytes(dlc: int, fd: bool, rtr: bool) -> int:
    if fd:
        return dlc if dlc <= 8 else _FD_LEN[dlc]
    return 0 if rtr else min(dlc, 8)


def _poly(exps: tuple[int, ...]) -> int:
    return sum(1 << e for e in exps)


def crc_by_division(bits: list[int], gen: tuple[int, ...], init_msb: bool) -> int:
    """Remainder of M(x) x^n / G(x) by long division (derived: a register preloaded with
    its top bit set adds x^(n-1) x^len(M) to the dividend)."""
    n = gen[0]
    g = _poly(gen)
    dividend = 0
    for b in bits:
        dividend = (dividend << 1) | b
    dividend <<= n
    if init_msb:
        dividend ^= 1 << (n - 1 + len(bits))
    # long division over GF(2), most significant term first
    for shift in range(dividend.bit_length() - 1, n - 1, -1):
        if dividend >> shift & 1:
            dividend ^= g << (shift - n)
    return dividend


def crc_by_register(bits: list[int], gen: tuple[int, ...], init_msb: bool) -> int:
    """The standard's shift-register description (CRC_RG), written again here."""
    n = gen[0]
    reg = [0] * n  # reg[0] is the highest stage
    if init_msb:
        reg[0] = 1
    taps = [e for e in gen if e < n]
    for b in bits:
        fb = b ^ reg[0]
        reg = reg[1:] + [0]
        if fb:
            for e in taps:
                reg[n - 1 - e] ^= 1
    return int("".join(map(str, reg)), 2)


@dataclass(frozen=True)
class OracleFrame:
    wire: str                # '0'/'1' per bit, SOF .. end of intermission
    kinds: tuple[str, ...]   # per bit: field name, 'stuff' or 'fsb'
    data_phase_bits: int
    crc: int
    dynamic_stuff: int

    @property
    def bits(self) -> int:
        return len(self.wire)

    def duration_ns(self, nominal_bps: int, data_bps: int | None) -> int:
        nominal = self.bits - self.data_phase_bits
        t = Fraction(nominal * 10**9, nominal_bps)
        if self.data_phase_bits:
            assert data_bps is not None
            t += Fraction(self.data_phase_bits * 10**9, data_bps)
        return int(t + Fraction(1, 2))  # nearest ns, halves up


def _bits_of(value: int, width: int) -> list[int]:
    return [int(c) for c in format(value, f"0{width}b")]


def _header(ident: int, ext: bool, rtr: bool, fd: bool, brs: bool, esi: bool, dlc: int
            ) -> list[tuple[str, int]]:
    """SOF .. DLC as (field, bit) pairs, in wire order (d = 0, r = 1)."""
    out: list[tuple[str, int]] = [("SOF", 0)]
    if ext:
        base, extension = ident >> 18 & 0x7FF, ident & 0x3FFFF
        out += [("ID28-18", b) for b in _bits_of(base, 11)]
        out += [("SRR", 1), ("IDE", 1)]
        out += [("ID17-0", b) for b in _bits_of(extension, 18)]
        if fd:
            out += [("RRS", 0), ("FDF", 1), ("res", 0), ("BRS", int(brs)), ("ESI", int(esi))]
        else:
            out += [("RTR", int(rtr)), ("r1", 0), ("r0", 0)]
    else:
        out += [("ID10-0", b) for b in _bits_of(ident & 0x7FF, 11)]
        if fd:
            out += [("RRS", 0), ("IDE", 0), ("FDF", 1), ("res", 0), ("BRS", int(brs)),
                    ("ESI", int(esi))]
        else:
            out += [("RTR", int(rtr)), ("IDE", 0), ("r0", 0)]
    out += [("DLC", b) for b in _bits_of(dlc, 4)]
    return out


def _stuff(seq: list[tuple[str, int]], stop_before_last: bool) -> list[tuple[str, int]]:
    """Insert a complement bit after every five equal bits (the stuff bit counts in the next
    run). With ``stop_before_last`` no stuff bit is due after the final bit (CAN FD: the
    first fixed stuff bit stands there)."""
    out: list[tuple[str, int]] = []
    prev, count = None, 0
    for i, (name, b) in enumerate(seq):
        out.append((name, b))
        count = count + 1 if b == prev else 1
        prev = b
        if count == 5 and not (stop_before_last and i == len(seq) - 1):
            out.append(("stuff", 1 - b))
            prev, count = 1 - b, 1
    return out


# from memory (ISO 11898-1:2015): stuff count = Gray code of (count mod 8), then even parity
_GRAY = {0: "000", 1: "001", 2: "011", 3: "010", 4: "110", 5: "111", 6: "101", 7: "100"}


def build(ident: int, ext: bool, rtr: bool, fd: bool, brs: bool, esi: bool, dlc: int,
          data: bytes) -> OracleFrame:
    """The frame on the wire, field by field."""
    if fd:
        rtr = False
    else:
        brs = esi = False
    n = n_data_bytes(dlc, fd, rtr)
    payload = bytes(data[:n]).ljust(n, b"\0")
    seq = _header(ident, ext, rtr, fd, brs, esi, dlc)
    for byte in payload:
        seq += [("DATA", b) for b in _bits_of(byte, 8)]

    if not fd:
        crc = crc_by_division([b for _, b in seq], G15, init_msb=False)
        seq += [("CRC", b) for b in _bits_of(crc, 15)]
        body = _stuff(seq, stop_before_last=False)
        dyn = sum(1 for k, _ in body if k == "stuff")
        crc_field: list[tuple[str, int]] = []
    else:
        body = _stuff(seq, stop_before_last=True)
        dyn = sum(1 for k, _ in body if k == "stuff")
        gray = _GRAY[dyn % 8]
        count = [int(c) for c in gray] + [gray.count("1") % 2]
        gen = G17 if n <= 16 else G21
        # CRC over the stuffed stream (dynamic stuff bits in) plus the stuff count
        crc = crc_by_division([b for _, b in body] + count, gen, init_msb=True)
        plain = [("SC", b) for b in count] + [("CRC", b) for b in _bits_of(crc, gen[0])]
        crc_field = []
        prev = body[-1][1]
        for i, (name, b) in enumerate(plain):
            if i % 4 == 0:  # before the stuff count, then after every fourth bit
                crc_field.append(("fsb", 1 - prev))
            crc_field.append((name, b))
            prev = b
    tail = [("CRCdel", 1), ("ACK", 0), ("ACKdel", 1)] + [("EOF", 1)] * 7 + [("IFS", 1)] * 3
    frame = body + crc_field + tail
    wire = "".join(str(b) for _, b in frame)
    kinds = tuple(k for k, _ in frame)
    dpb = 0
    if fd and brs:
        # first data-phase bit: the bit after BRS on the wire (ESI, or a stuff bit after BRS)
        brs_at = kinds.index("BRS")
        crc_del_at = kinds.index("CRCdel")
        dpb = crc_del_at - (brs_at + 1) + 1
    return OracleFrame(wire, kinds, dpb, crc, dyn)
