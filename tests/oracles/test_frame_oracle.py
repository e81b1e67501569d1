"""Frame bit lengths against the independent builder in tests/oracles/frame_oracle.py.

The builder imports nothing from tracelab.physics; hand-worked frames pin it (and the
package) bit for bit, the CRCs are checked against crccheck's catalogue entries, and
property tests compare every frame form with ``frame_bits``, ``frame_bits_bitwise``,
``frame_wire_reference`` and ``frame_durations_ns``.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest
from crccheck.crc import Crc15Can, Crc17CanFd, Crc21CanFd
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.oracles import frame_oracle as fo
from tracelab.physics import bitlength as bl

SCHEMA = {"id": pl.UInt32, "ext": pl.Boolean, "rtr": pl.Boolean, "fd": pl.Boolean,
          "brs": pl.Boolean, "esi": pl.Boolean, "dlc": pl.UInt8, "data": pl.Binary}
Frame = tuple[int, bool, bool, bool, bool, bool, int, bytes]
TRAILER = "1" "0" "1" "1111111" "111"  # CRC delimiter, ACK slot (d), ACK delimiter, EOF, IFS
#: (nominal, data) bit rates the durations are checked at
RATES = [(125_000, 2_000_000), (250_000, 2_000_000), (500_000, 2_000_000),
         (500_000, 5_000_000), (1_000_000, 5_000_000)]


def _df(frames: list[Frame]) -> pl.DataFrame:
    cols = list(zip(*frames, strict=True)) if frames else [[]] * 8
    return pl.DataFrame(dict(zip(SCHEMA, cols, strict=True)), schema=SCHEMA)


def _package(frames: list[Frame]) -> list[tuple[int, int]]:
    out = bl.frame_bits(_df(frames))
    return list(zip(out["bits"].to_list(), out["data_phase_bits"].to_list(), strict=True))


def _pack(bits: str) -> bytes:
    """Left-pad with zeros to whole bytes (an init-0 CRC ignores leading zeros)."""
    pad = -len(bits) % 8
    return int("0" * pad + bits, 2).to_bytes((len(bits) + pad) // 8, "big") if bits else b""


def _polymulmod(a: int, b: int, g: int) -> int:
    n = g.bit_length() - 1
    out = 0
    while b:
        if b & 1:
            out ^= a
        b >>= 1
        a <<= 1
        if a >> n & 1:
            a ^= g
    return out


def _catalogue_crc_with_msb_init(bits: str, width: int) -> int:
    """CRC with the register preloaded to 1 followed by zeros, computed with crccheck's
    catalogue CRC-17/CAN-FD or CRC-21/CAN-FD (init 0) by prefixing a derived bit pattern P:
    P(x) x^n = x^(n-1) (mod G), so P = x^(n-1) * (x^-1)^n, and x^-1 = (G + 1) / x."""
    ref = {17: Crc17CanFd, 21: Crc21CanFd}[width]
    g = (1 << width) | ref._poly
    x_inv = (g ^ 1) >> 1
    p = 1 << (width - 1)
    for _ in range(width):
        p = _polymulmod(p, x_inv, g)
    return int(ref.calc(_pack(format(p, f"0{width}b") + bits)))


# --- the builder's own CRCs against the catalogue -----------------------------------------


def test_oracle_crcs_give_the_catalogue_check_values() -> None:
    # source: public CRC catalogue check values of "123456789", as crccheck records them
    # (Crc15Can 0x059E, Crc17CanFd 0x04F03, Crc21CanFd 0x0ED841; all init 0, no reflection)
    msg = [int(c) for byte in b"123456789" for c in format(byte, "08b")]
    for gen, ref in ((fo.G15, Crc15Can), (fo.G17, Crc17CanFd), (fo.G21, Crc21CanFd)):
        assert fo.crc_by_division(msg, gen, init_msb=False) == ref._check_result
        assert fo.crc_by_register(msg, gen, init_msb=False) == ref._check_result
    assert (Crc15Can._check_result, Crc17CanFd._check_result, Crc21CanFd._check_result) == (
        0x059E, 0x04F03, 0x0ED841)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.integers(0, 1), max_size=300), st.sampled_from([17, 21]))
def test_msb_init_division_register_and_crccheck_agree(bits: list[int], width: int) -> None:
    # derived: three formulations of the preloaded register (long division, shift register,
    # crccheck's catalogue CRC behind a prefix); the init value itself is from memory.
    gen = fo.G17 if width == 17 else fo.G21
    a = fo.crc_by_division(bits, gen, init_msb=True)
    assert a == fo.crc_by_register(bits, gen, init_msb=True)
    assert a == _catalogue_crc_with_msb_init("".join(map(str, bits)), width)


# --- hand-worked frames -------------------------------------------------------------------


def test_hand_worked_classic_extended_data_frame() -> None:
    # Worked by hand. id 0x18FF0010 = 1 1000 1111 1111 0000 0000 0001 0000 (29 bits):
    # base part 11000111111, extension 110000000000010000; DLC 1, data 0x55.
    unstuffed = ("0" "11000111111" "1" "1" "110000000000010000" "0" "0" "0" "0001"
                 "01010101")
    # CRC-15 of those 47 bits. source: crccheck Crc15Can (catalogue CRC-15/CAN)
    crc = format(Crc15Can.calc(_pack(unstuffed)), "015b")
    assert crc == "110110111100011"
    # Stuffing by hand ([x] = stuff bit): 0 11000 11111[0] 1 SRR 1 IDE 1 | 11[0] 0000[1]
    # 00000[1] 00 1 0000 | RTR 0[1] r1 0 r0 0 DLC 000[1] 1 | data 01010101 | CRC, no run of 5.
    stuffed = ("0" "11000" "11111" "0" "1" "1" "1" "11" "0" "0000" "1" "00000" "1" "00" "1"
               "0000" "0" "1" "0" "0" "000" "1" "1" "01010101" + crc)
    assert len(stuffed) == 47 + 15 + 6
    f: Frame = (0x18FF0010, True, False, False, False, False, 1, b"\x55")
    oracle = fo.build(*f)
    assert oracle.wire == stuffed + TRAILER
    assert (oracle.bits, oracle.data_phase_bits, oracle.dynamic_stuff) == (81, 0, 6)
    assert "".join(map(str, bl.frame_wire_reference(*f).bits)) == stuffed + TRAILER
    assert _package([f]) == [(81, 0)]
    # 81 bits at 125 k / 250 k / 500 k / 1 M: 8 / 4 / 2 / 1 us per bit (derived)
    for bps, ns in ((125_000, 648_000), (250_000, 324_000), (500_000, 162_000),
                    (1_000_000, 81_000)):
        assert oracle.duration_ns(bps, None) == ns
        assert bl.frame_durations_ns(np.array([81]), np.array([0]), bps, None).tolist() == [ns]


def test_hand_worked_fd_base_brs_crc17() -> None:
    # Worked by hand. id 0x000, BRS, ESI recessive, DLC 4, data 00 00 00 00.
    # SOF + id + RRS + IDE are 14 dominant bits: 00000[1] 00000[1] 0000; FDF 1 res 0 BRS 1
    # ESI 1 DLC 0100; the data's 32 zeros continue the DLC's run of two: 000[1] then five
    # runs 00000[1] and 0000 (no stuff bit due at the end). 8 dynamic stuff bits -> 8 mod 8
    # = 0 -> Gray 000, parity 0: stuff count 0000.
    head = "00000" "1" "00000" "1" "0000" "1" "0" "1" "1" "0100"
    data = "000" "1" + ("00000" "1") * 5 + "0000"
    assert len(data) == 32 + 6
    sc = "0000"
    # CRC-17 (register preloaded 1 followed by zeros, from memory) over SOF..data with the
    # dynamic stuff bits, then the stuff count; computed with crccheck's catalogue
    # CRC-17/CAN-FD behind the derived prefix (see _catalogue_crc_with_msb_init).
    crc = format(_catalogue_crc_with_msb_init(head + data + sc, 17), "017b")
    assert crc == "10010010010010110"
    # fixed stuff bits: before the stuff count, then after every 4 bits, each the complement
    # of the bit before it: [1] 0000 [1] 1001 [0] 0010 [1] 0100 [1] 1011 [0] 0
    crc_field = ("1" + sc + "1" + crc[0:4] + "0" + crc[4:8] + "1" + crc[8:12] + "1"
                 + crc[12:16] + "0" + crc[16])
    wire = head + data + crc_field + TRAILER
    f: Frame = (0x000, False, False, True, True, True, 4, bytes(4))
    oracle = fo.build(*f)
    assert oracle.wire == wire
    ref = bl.frame_wire_reference(*f)
    assert "".join(map(str, ref.bits)) == wire and ref.crc == int(crc, 2)
    # data phase: ESI, DLC, data, their 6 stuff bits, 6 fixed stuff bits, stuff count,
    # CRC 17, + 1 (BRS and CRC delimiter together: one nominal + one data bit; derived)
    bits, dpb = 102, 1 + 4 + 32 + 6 + 6 + 4 + 17 + 1
    assert (oracle.bits, oracle.data_phase_bits) == (bits, dpb) == (len(wire), 71)
    assert _package([f]) == [(102, 71)]
    # 31 nominal + 71 data bits (derived): 500 k / 2 M: 62 us + 35.5 us; 1 M / 5 M: 31 + 14.2 us
    for (nbps, dbps), ns in (((500_000, 2_000_000), 97_500), ((1_000_000, 5_000_000), 45_200),
                             ((125_000, 2_000_000), 283_500), ((250_000, 5_000_000), 138_200)):
        assert oracle.duration_ns(nbps, dbps) == ns
        assert bl.frame_durations_ns(np.array([bits]), np.array([dpb]), nbps, dbps).tolist() == [ns]


def test_hand_worked_fd_extended_crc21() -> None:
    # Worked by hand. id 0x1FFFFFFF, no BRS, ESI dominant, DLC 11 (20 bytes), data 0xAA * 20.
    # SOF 0, then 31 recessive bits (11 id, SRR, IDE, 18 id) get a stuff bit after every
    # five: (11111[0]) x 6 then 1; RRS 0 FDF 1 res 0 BRS 0 ESI 0 DLC 1011; alternating data.
    # 6 dynamic stuff bits -> Gray 101, parity 0 -> stuff count 1010.
    head = "0" + ("11111" "0") * 6 + "1" + "0" "1" "0" "0" "0" "1011"
    data = "10101010" * 20
    sc = "1010"
    crc = format(_catalogue_crc_with_msb_init(head + data + sc, 21), "021b")
    assert crc == "100011100000010000001"
    # 7 fixed stuff bits: [1] before the stuff count (last data bit 0), [1] after it, then
    # one after each 4 CRC bits, the complement of the bit before it.
    field = "1" + sc + "1"
    for k in range(0, 20, 4):
        group = crc[k:k + 4]
        field += group + ("0" if group[-1] == "1" else "1")
    field += crc[20]
    wire = head + data + field + TRAILER
    f: Frame = (0x1FFFFFFF, True, False, True, False, False, 11, b"\xaa" * 20)
    oracle = fo.build(*f)
    assert oracle.wire == wire
    assert (oracle.bits, oracle.data_phase_bits) == (252, 0) == (len(wire), 0)
    assert "".join(map(str, bl.frame_wire_reference(*f).bits)) == wire
    assert _package([f]) == [(252, 0)]
    for bps, ns in ((125_000, 2_016_000), (500_000, 504_000), (1_000_000, 252_000)):
        assert oracle.duration_ns(bps, None) == ns


# --- every form, random frames --------------------------------------------------------------


@st.composite
def frames(draw: st.DrawFn, ext: bool | None = None, fd: bool | None = None) -> Frame:
    is_ext = draw(st.booleans()) if ext is None else ext
    is_fd = draw(st.booleans()) if fd is None else fd
    rtr = False if is_fd else draw(st.booleans())
    brs = draw(st.booleans()) if is_fd else False
    esi = draw(st.booleans()) if is_fd else False
    dlc = draw(st.integers(0, 15))
    top = (1 << (29 if is_ext else 11)) - 1
    ident = draw(st.one_of(st.integers(0, top), st.sampled_from([0, top, 0x155 & top,
                                                                  0x2AA & top])))
    n = fo.n_data_bytes(dlc, is_fd, rtr)
    fill = draw(st.sampled_from([None, 0x00, 0xFF, 0x0F, 0xF0, 0x55, 0x1F, 0x83]))
    data = draw(st.binary(min_size=n, max_size=n)) if fill is None else bytes([fill]) * n
    return (ident, is_ext, rtr, is_fd, brs, esi, dlc, data)


FORMS = [(False, False), (True, False), (False, True), (True, True)]


@pytest.mark.parametrize("ext,fd", FORMS, ids=["classic-base", "classic-ext", "fd-base",
                                               "fd-ext"])
@settings(max_examples=40, deadline=None)
@given(data=st.data())
def test_every_form_agrees_with_the_oracle(ext: bool, fd: bool, data: st.DataObject) -> None:
    batch = data.draw(st.lists(frames(ext=ext, fd=fd), min_size=1, max_size=15))
    want = [fo.build(*f) for f in batch]
    expected = [(w.bits, w.data_phase_bits) for w in want]
    assert _package(batch) == expected
    out = bl.frame_bits_bitwise(_df(batch))
    assert list(zip(out["bits"].to_list(), out["data_phase_bits"].to_list(),
                    strict=True)) == expected
    for f, w in zip(batch, want, strict=True):
        ref = bl.frame_wire_reference(*f)
        assert "".join(map(str, ref.bits)) == w.wire
        assert ref.crc == w.crc and ref.dynamic_stuff_bits == w.dynamic_stuff
    bits = np.array([b for b, _ in expected])
    dpb = np.array([d for _, d in expected])
    for nbps, dbps in RATES:
        got = bl.frame_durations_ns(bits, dpb, nbps, dbps).tolist()
        assert got == [w.duration_ns(nbps, dbps) for w in want]


def test_many_random_frames_of_every_form() -> None:
    # a larger batch in one go (vectorised path groups and slices), fixed seed
    rng = np.random.default_rng(17)
    batch: list[Frame] = []
    for _ in range(3000):  # test data generation
        ext, fd = bool(rng.integers(2)), bool(rng.integers(2))
        rtr = (not fd) and bool(rng.integers(2))
        dlc = int(rng.integers(16))
        n = fo.n_data_bytes(dlc, fd, rtr)
        fill = int(rng.integers(4))
        payload = (rng.integers(0, 256, n, dtype=np.uint8).tobytes() if fill == 0
                   else bytes([(0x00, 0xFF, 0x0F)[fill - 1]]) * n)
        batch.append((int(rng.integers(1 << (29 if ext else 11))), ext, rtr, fd,
                      fd and bool(rng.integers(2)), fd and bool(rng.integers(2)), dlc, payload))
    expected = [(w.bits, w.data_phase_bits) for w in (fo.build(*f) for f in batch)]
    assert _package(batch) == expected
