"""Payload bit extraction, insertion, physical values and CRCs against outside references."""

from __future__ import annotations

from decimal import Decimal

import numpy as np
import pyarrow as pa
import pytest
from crccheck.crc import Crc8Autosar, Crc8SaeJ1850, Crc8Smbus, Crc16Ibm3740, Crc32
from hypothesis import given, settings
from hypothesis import strategies as st

from tracelab.network.catalog import CrcSpec, SignalSpec
from tracelab.network.payload import (
    byte_matrix,
    crc_reference,
    crc_rows,
    extract_raw,
    insert_raw,
    physical,
    signed_values,
)


def python_raw(data: bytes, lsb: int, length: int, order: str) -> int:
    """The issue's formula with Python integers (arbitrary precision, no numpy)."""
    n = len(data)
    mask = (1 << length) - 1
    if order == "little":
        return (int.from_bytes(data, "little") >> lsb) & mask
    k, b = divmod(lsb, 8)
    return (int.from_bytes(data, "big") >> (8 * (n - 1 - k) + b)) & mask


@st.composite
def layouts(draw: st.DrawFn) -> tuple[int, str, int, int]:
    """(nbytes, order, lsb, length) of a signal that fits its payload."""
    nbytes = draw(st.integers(1, 64))
    order = draw(st.sampled_from(["little", "big"]))
    length = draw(st.integers(1, min(64, 8 * nbytes)))
    if order == "little":
        lsb = draw(st.integers(0, 8 * nbytes - length))
    else:  # shift = 8*(n-1-k) + b must leave room for length bits
        shift = draw(st.integers(0, 8 * nbytes - length))
        j, b = divmod(shift, 8)
        lsb = 8 * (nbytes - 1 - j) + b
    return nbytes, order, lsb, length


@settings(max_examples=300, deadline=None)
@given(layouts(), st.integers(1, 6), st.randoms(use_true_random=False))
def test_extraction_matches_python_integers(layout: tuple[int, str, int, int], count: int,
                                            rnd: object) -> None:
    # source: the bit-position formulas of docs/network-catalog.md evaluated with Python's
    # int.from_bytes and shifts (arbitrary-precision integers), independent of numpy
    nbytes, order, lsb, length = layout
    rng = np.random.default_rng(abs(hash((layout, count))) % 2**32)
    rows = rng.integers(0, 256, (count, nbytes), dtype=np.uint8)
    spec = SignalSpec("s", lsb, length, nbytes, order)
    got = extract_raw(rows, spec)
    want = [python_raw(bytes(r), lsb, length, order) for r in rows]
    assert [int(v) for v in got] == want


@settings(max_examples=200, deadline=None)
@given(layouts(), st.data())
def test_insertion_round_trips_and_leaves_other_bits(layout: tuple[int, str, int, int],
                                                     data: st.DataObject) -> None:
    nbytes, order, lsb, length = layout
    payload = data.draw(st.binary(min_size=nbytes, max_size=nbytes))
    value = data.draw(st.integers(0, (1 << length) - 1))
    spec = SignalSpec("s", lsb, length, nbytes, order)
    rows = np.frombuffer(payload, dtype=np.uint8).reshape(1, nbytes).copy()
    insert_raw(rows, np.array([value], dtype=np.uint64).view(np.int64), spec)
    # source: Python integers: clear the field in int.from_bytes(payload, order), or in the value
    shift = spec.shift
    whole = int.from_bytes(payload, order)  # type: ignore[arg-type]
    whole = (whole & ~(((1 << length) - 1) << shift)) | (value << shift)
    assert bytes(rows[0]) == whole.to_bytes(nbytes, order)  # type: ignore[arg-type]


def test_known_layouts() -> None:
    # common practice, no source: 0x12 0x34 read as a 16-bit big-endian value is 0x1234,
    # little-endian 0x3412
    rows = np.array([[0x12, 0x34]], dtype=np.uint8)
    assert int(extract_raw(rows, SignalSpec("s", 8, 16, 2, "big"))[0]) == 0x1234
    assert int(extract_raw(rows, SignalSpec("s", 0, 16, 2, "little"))[0]) == 0x3412
    # derived: lsb = 12, 10 bits little: bits 4..7 of byte 1 and 0..5 of byte 2
    rows = np.array([[0x00, 0xF0, 0x3F, 0x00]], dtype=np.uint8)
    assert int(extract_raw(rows, SignalSpec("s", 12, 10, 4))[0]) == 0x3FF


@pytest.mark.parametrize("length", [1, 2, 7, 8, 12, 16, 31, 32, 33, 63, 64])
def test_signed_edges(length: int) -> None:
    # source: two's complement definition: raw r of L bits means r - 2**L when r >= 2**(L-1)
    raw = np.array([0, 1, (1 << (length - 1)) - 1, 1 << (length - 1), (1 << length) - 1],
                   dtype=np.uint64)
    got = signed_values(raw, length, signed=True).tolist()
    want = [r - (1 << length) if r >= 1 << (length - 1) else r for r in
            [0, 1, (1 << (length - 1)) - 1, 1 << (length - 1), (1 << length) - 1]]
    assert got == want
    assert min(got) == -(1 << (length - 1)) and max(got) == (1 << (length - 1)) - 1
    unsigned = signed_values(raw, length, signed=False).tolist()
    assert unsigned[:4] == [0, 1, (1 << (length - 1)) - 1, 1 << (length - 1)] or length == 64


@pytest.mark.parametrize(("raw", "scale", "offset", "text"), [
    (1234, 0.1, -40.0, "83.4"), (0, 0.1, -40.0, "-40"), (1900, 0.1, -40.0, "150"),
    (3, 0.1, 0.0, "0.3"), (7, 0.01, 0.07, "0.14"), (-32768, 0.001, 0.0, "-32.768"),
    (65535, 0.05, -1600.0, "1676.75"), (123456, 0.0001, 0.0, "12.3456"),
    (1, 3, 0.5, "3.5"), (255, 0.4, -50.0, "52"),
])
def test_scale_offset_exact_decimal(raw: int, scale: float, offset: float, text: str) -> None:
    # source: exact decimal arithmetic (Python's decimal module) on the decimals as written;
    # the stored float is the one nearest that exact value
    exact = Decimal(raw) * Decimal(repr(scale)) + Decimal(repr(offset))
    assert exact == Decimal(text)
    got = physical(np.array([raw], dtype=np.int64), scale, offset)[0]
    assert got == float(Decimal(text))


@settings(max_examples=200, deadline=None)
@given(st.integers(-(1 << 20), 1 << 20), st.sampled_from(
    ["0.1", "0.01", "0.05", "0.125", "0.0625", "0.3", "2.5", "1", "0.001", "0.02"]),
    st.sampled_from(["0", "-40", "-40.5", "0.1", "-1600", "273.15", "-0.01"]))
def test_scale_offset_is_nearest_float_of_the_decimal(raw: int, scale: str, offset: str) -> None:
    # source: Python's decimal module (exact), rounded once to float by float(Decimal)
    exact = Decimal(raw) * Decimal(scale) + Decimal(offset)
    got = physical(np.array([raw], dtype=np.int64), float(scale), float(offset))[0]
    assert got == float(exact)


CHECK = b"123456789"


@pytest.mark.parametrize(("spec", "check", "ref"), [
    # source: public CRC catalogue (reveng "Catalogue of parametrised CRC algorithms"),
    # check value over the ASCII bytes "123456789"
    (CrcSpec(8, 0x1D, 0xFF, 0xFF), 0x4B, Crc8SaeJ1850),   # CRC-8/SAE-J1850
    (CrcSpec(8, 0x2F, 0xFF, 0xFF), 0xDF, Crc8Autosar),    # CRC-8/AUTOSAR
    (CrcSpec(8, 0x07), 0xF4, Crc8Smbus),                  # CRC-8/SMBUS
    (CrcSpec(16, 0x1021, 0xFFFF), 0x29B1, Crc16Ibm3740),  # CRC-16/IBM-3740
    (CrcSpec(32, 0x04C11DB7, 0xFFFFFFFF, 0xFFFFFFFF, True, True), 0xCBF43926, Crc32),
])
def test_crc_check_values(spec: CrcSpec, check: int, ref: type) -> None:
    rows = np.frombuffer(CHECK, dtype=np.uint8).reshape(1, -1)
    assert crc_reference(CHECK, spec) == check
    assert int(crc_rows(rows, spec)[0]) == check
    assert ref.calc(CHECK) == check  # source: crccheck library, same algorithm


@pytest.mark.parametrize(("spec", "check"), [
    (CrcSpec(4, 0x3, 0, 0, True, True), 0x7),   # source: CRC catalogue, CRC-4/G-704
    (CrcSpec(3, 0x3, 0x7, 0, True, True), 0x6),  # source: CRC catalogue, CRC-3/ROHC
    (CrcSpec(5, 0x09, 0x09, 0), 0x00),          # source: CRC catalogue, CRC-5/EPC-C1G2
])
def test_narrow_crcs(spec: CrcSpec, check: int) -> None:
    rows = np.frombuffer(CHECK, dtype=np.uint8).reshape(1, -1)
    assert int(crc_rows(rows, spec)[0]) == check


@settings(max_examples=100, deadline=None)
@given(st.lists(st.binary(min_size=7, max_size=7), min_size=1, max_size=20))
def test_crc_rows_against_crccheck(payloads: list[bytes]) -> None:
    rows = np.frombuffer(b"".join(payloads), dtype=np.uint8).reshape(len(payloads), 7)
    for spec, ref in ((CrcSpec(8, 0x1D, 0xFF, 0xFF), Crc8SaeJ1850),
                      (CrcSpec(8, 0x2F, 0xFF, 0xFF), Crc8Autosar), (CrcSpec(8, 0x07), Crc8Smbus)):
        # source: crccheck library, payload by payload
        assert crc_rows(rows, spec).tolist() == [ref.calc(p) for p in payloads]
    picked = crc_rows(rows, CrcSpec(8, 0x1D, 0xFF, 0xFF), (6, 0, 3))
    assert picked.tolist() == [Crc8SaeJ1850.calc(bytes([p[6], p[0], p[3]])) for p in payloads]


def test_byte_matrix_reads_the_arrow_buffer() -> None:
    column = pa.chunked_array([pa.array([b"\x01\x02", b"\x03\x04"]),
                               pa.array([b"\x05\x06"])], pa.binary())
    assert byte_matrix(column.slice(1), 2).tolist() == [[3, 4], [5, 6]]
    view = pa.array([b"\x07\x08", b"\x09\x0a"], pa.binary_view())
    assert byte_matrix(view, 2).tolist() == [[7, 8], [9, 10]]
    with pytest.raises(ValueError, match="2 bytes"):
        byte_matrix(pa.array([b"\x01", b"\x01\x02"]), 2)
