"""Signals in payload bytes, vectorised: bit extraction and insertion, physical values, CRCs.

Everything here works on a byte matrix: one row per frame, one column per payload byte
(``byte_matrix`` builds it from an Arrow binary column without copying row by row). The bit
positions are those of docs/network-catalog.md: with ``n`` payload bytes,

    little: raw = (int.from_bytes(data, "little") >> lsb) & (2**length - 1)
    big:    lsb = 8*k + b, raw = (int.from_bytes(data, "big") >> (8*(n-1-k) + b)) & mask

``SignalSpec.shift`` is that right shift. The big-endian integer of a payload is the
little-endian integer of the reversed bytes, so both orders share one code path.
Both the analyses (decoding) and the simulator (encoding) use this module.
"""

from __future__ import annotations

from fractions import Fraction
from math import lcm

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from tracelab.network.catalog import CrcSpec, SignalSpec

#: Beyond this magnitude a float64 no longer holds every integer (2**53).
EXACT_FLOAT_INT = 1 << 53
_U64 = np.uint64


def byte_matrix(column: pa.Array | pa.ChunkedArray, nbytes: int) -> np.ndarray:
    """A binary column whose values all have ``nbytes`` bytes as an (n, nbytes) uint8 matrix.

    Reads the Arrow value buffer directly (one contiguous slice), never value by value.
    Raises ValueError when a value is null or has another length."""
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks() if column.num_chunks else pa.array([], pa.binary())
    if not (pa.types.is_binary(column.type) or pa.types.is_large_binary(column.type)):
        column = pc.cast(column, pa.large_binary())
    count = len(column)
    if count == 0:
        return np.zeros((0, nbytes), dtype=np.uint8)
    if column.null_count:
        raise ValueError("payload column holds nulls")
    _, offsets_buf, data_buf = column.buffers()
    kind = np.int64 if pa.types.is_large_binary(column.type) else np.int32
    offsets = np.frombuffer(offsets_buf, dtype=kind)[column.offset: column.offset + count + 1]
    if not np.all(np.diff(offsets) == nbytes):
        raise ValueError(f"payload values do not all have {nbytes} bytes")
    if nbytes == 0 or data_buf is None:
        return np.zeros((count, nbytes), dtype=np.uint8)
    data = np.frombuffer(data_buf, dtype=np.uint8)
    start = int(offsets[0])
    return data[start: start + count * nbytes].reshape(count, nbytes)


class PayloadWords:
    """64-bit little-endian words of a byte matrix, built once per (order, first byte) and
    shared by every signal of the message."""

    def __init__(self, rows: np.ndarray) -> None:
        self.rows = rows
        self._words: dict[tuple[str, int], np.ndarray] = {}

    def source(self, order: str) -> np.ndarray:
        return self.rows if order == "little" else self.rows[:, ::-1]

    def word(self, order: str, first: int) -> np.ndarray:
        """uint64 of bytes first..first+7 of the ``order`` integer (zero past the end)."""
        key = (order, first)
        if key not in self._words:
            src = self.source(order)
            count, nbytes = src.shape
            take = max(0, min(8, nbytes - first))
            if take == 8 and order == "little" and src.flags.c_contiguous and nbytes == 8:
                window = src
            else:
                window = np.zeros((count, 8), dtype=np.uint8)
                window[:, :take] = src[:, first:first + take]
            self._words[key] = window.view("<u8").reshape(count)
        return self._words[key]

    def raw(self, shift: int, length: int, order: str) -> np.ndarray:
        """The unsigned raw values (uint64) of a signal at right shift ``shift``."""
        nbytes = self.rows.shape[1]
        first = 0 if nbytes <= 8 else shift // 8
        within = shift - 8 * first
        out = self.word(order, first) >> _U64(within)
        if within + length > 64 and first + 8 < nbytes:  # the ninth byte of a long signal
            extra = self.source(order)[:, first + 8].astype(np.uint64)
            out |= extra << _U64(64 - within)
        if length < 64:
            out &= _U64((1 << length) - 1)
        return out


def extract_raw(rows: np.ndarray, spec: SignalSpec) -> np.ndarray:
    """Unsigned raw values (uint64) of one signal from an (n, nbytes) byte matrix."""
    return PayloadWords(rows).raw(spec.shift, spec.length, spec.order)


def signed_values(raw: np.ndarray, length: int, signed: bool) -> np.ndarray:
    """Raw values as int64: two's complement of ``length`` bits when ``signed``.

    An unsigned 64-bit value above 2**63 - 1 wraps (documented; ``physical`` is exact)."""
    if not signed:
        return raw.view(np.int64) if raw.dtype == np.uint64 else raw.astype(np.int64)
    if length == 64:
        return raw.view(np.int64)
    sign = 1 << (length - 1)
    return (raw ^ _U64(sign)).astype(np.int64) - np.int64(sign)


def decimal_fraction(number: float) -> Fraction:
    """The decimal a float was written as (its shortest repr: 0.1 -> 1/10)."""
    return Fraction(repr(float(number)))


def physical(raw: np.ndarray, scale: float, offset: float, unsigned64: bool = False
             ) -> np.ndarray:
    """raw * scale + offset as float64, rounded once from the exact decimal result when the
    numbers allow it (scale and offset taken as the decimals they were written as).

    With D the common denominator of scale and offset, S = scale * D and O = offset * D are
    integers; when |raw| * |S| + |O| < 2**53 the numerator raw * S + O is exact in int64 and in
    float64, and one IEEE division by D gives the float nearest the exact decimal value.
    Otherwise the plain float expression is used."""
    fs, fo = decimal_fraction(scale), decimal_fraction(offset)
    denominator = lcm(fs.denominator, fo.denominator)
    s_int = int(fs * denominator)
    o_int = int(fo * denominator)
    if len(raw) == 0:
        return np.zeros(0, dtype=np.float64)
    if unsigned64:
        reach = int(raw.view(np.uint64).max())
    else:
        reach = max(-int(raw.min()), int(raw.max()))
    if denominator < EXACT_FLOAT_INT and reach * abs(s_int) + abs(o_int) < EXACT_FLOAT_INT:
        if s_int == 1 and o_int == 0 and denominator == 1:
            return raw.astype(np.float64)
        numerator = raw.astype(np.int64) * np.int64(s_int)  # exact: below 2**53
        if o_int:
            numerator += np.int64(o_int)
        out = numerator.astype(np.float64)
        if denominator != 1:
            out /= float(denominator)  # one correctly rounded IEEE division
        return out
    values = raw.view(np.uint64).astype(np.float64) if unsigned64 else raw.astype(np.float64)
    values *= float(scale)
    values += float(offset)
    return values


def insert_raw(rows: np.ndarray, raw: np.ndarray, spec: SignalSpec) -> None:
    """Write ``raw`` (taken modulo 2**length) into the signal's bits of ``rows`` in place."""
    nbytes = rows.shape[1]
    values = raw.astype(np.int64).view(np.uint64) & _U64(spec.mask) if spec.length < 64 \
        else raw.astype(np.int64).view(np.uint64)
    shift = spec.shift
    # one pass per payload byte the signal touches (at most 9), vectorised over frames
    for j in range(shift // 8, (shift + spec.length - 1) // 8 + 1):
        byte_mask = ((spec.mask << shift) >> (8 * j)) & 0xFF
        if not byte_mask:
            continue
        part = values >> _U64(8 * j - shift) if 8 * j >= shift else values << _U64(shift - 8 * j)
        column = j if spec.order == "little" else nbytes - 1 - j
        keep = rows[:, column] & np.uint8(0xFF ^ byte_mask)
        rows[:, column] = keep | (part & _U64(byte_mask)).astype(np.uint8)


# --- CRCs over payload bytes --------------------------------------------------------------


def _reflect(value: int, width: int) -> int:
    return int(f"{value:0{width}b}"[::-1], 2)


def crc_reference(data: bytes, spec: CrcSpec) -> int:
    """Bit-by-bit CRC in the catalogue's parameter model (the definition; slow, for tests)."""
    mask = (1 << spec.width) - 1
    crc = spec.init
    for byte in data:
        if spec.refin:
            byte = _reflect(byte, 8)
        for i in range(7, -1, -1):
            top = ((crc >> (spec.width - 1)) & 1) ^ ((byte >> i) & 1)
            crc = (crc << 1) & mask
            if top:
                crc ^= spec.poly
    if spec.refout:
        crc = _reflect(crc, spec.width)
    return crc ^ spec.xorout


def crc_table(spec: CrcSpec) -> np.ndarray:
    """256 entries: the register after one byte x from a zero register (index = the byte
    xored with the register's top byte; registers narrower than 8 bits aligned to the top)."""
    plain = CrcSpec(spec.width, spec.poly)
    return np.array([crc_reference(bytes([x]), plain) for x in range(256)], dtype=np.uint64)


_REFLECT8 = np.array([_reflect(x, 8) for x in range(256)], dtype=np.uint8)


def crc_rows(rows: np.ndarray, spec: CrcSpec, columns: tuple[int, ...] | None = None
             ) -> np.ndarray:
    """The CRC of every row over ``columns`` (default all) in order, table-driven: one
    vectorised step per byte column, never a loop over frames."""
    width = spec.width
    mask = _U64((1 << width) - 1)
    table = crc_table(spec)
    crc = np.full(rows.shape[0], spec.init, dtype=np.uint64)
    for column in columns if columns is not None else range(rows.shape[1]):
        byte = rows[:, column]
        if spec.refin:
            byte = _REFLECT8[byte]
        byte64 = byte.astype(np.uint64)
        if width >= 8:
            index = ((crc >> _U64(width - 8)) ^ byte64) & _U64(0xFF)
            crc = ((crc << _U64(8)) & mask) ^ table[index]
        else:
            crc = table[((crc << _U64(8 - width)) ^ byte64) & _U64(0xFF)]
    if spec.refout:
        out = np.zeros_like(crc)
        for bit in range(width):  # a loop over the CRC's bits (<= 32)
            out |= ((crc >> _U64(bit)) & _U64(1)) << _U64(width - 1 - bit)
        crc = out
    return crc ^ _U64(spec.xorout)
