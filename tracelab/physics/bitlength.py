"""Exact on-bus length of every frame: bits from SOF to the end of the intermission.

Why exact: bus load, frame start times (logs stamp the end of EOF) and gap analyses all
depend on it, and bit stuffing makes the length depend on the identifier and payload bits.
docs/frame-physics.md explains the layouts and rules; ISO 11898-1:2015 clause 10 is the source
(clause numbers here are from memory).

Three implementations, one answer (the tests hold them equal):
- :func:`frame_wire_reference`: builds the actual bit sequence on the wire, pure Python.
- :func:`frame_bits_bitwise`: vectorised over frames, one numpy step per bit position.
- :func:`frame_bits`: vectorised over frames, table-driven, eight bits per step (the fast path).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import cache
from typing import Any

import numpy as np
import polars as pl
import pyarrow as pa

from tracelab.physics import crc as crcmod

# --- the standard as data ---------------------------------------------------------------

#: Fields from SOF to the end of the DLC, in wire order: (name, width, constant or None
#: when the frame supplies it). ISO 11898-1:2015 clause 10.4 (figures of the frame formats).
#: Keys are (fd, ext). ``id`` is the 11-bit base identifier; an extended identifier is sent
#: as ``id_hi`` (its top 11 bits, the base part) and, after SRR and IDE, ``id_lo`` (18 bits).
Field = tuple[str, int, int | None]
LAYOUTS: dict[tuple[bool, bool], tuple[Field, ...]] = {
    (False, False): (
        ("sof", 1, 0), ("id", 11, None), ("rtr", 1, None), ("ide", 1, 0), ("r0", 1, 0),
        ("dlc", 4, None),
    ),
    (False, True): (
        ("sof", 1, 0), ("id_hi", 11, None), ("srr", 1, 1), ("ide", 1, 1), ("id_lo", 18, None),
        ("rtr", 1, None), ("r1", 1, 0), ("r0", 1, 0), ("dlc", 4, None),
    ),
    (True, False): (
        ("sof", 1, 0), ("id", 11, None), ("rrs", 1, 0), ("ide", 1, 0), ("fdf", 1, 1),
        ("res", 1, 0), ("brs", 1, None), ("esi", 1, None), ("dlc", 4, None),
    ),
    (True, True): (
        ("sof", 1, 0), ("id_hi", 11, None), ("srr", 1, 1), ("ide", 1, 1), ("id_lo", 18, None),
        ("rrs", 1, 0), ("fdf", 1, 1), ("res", 1, 0), ("brs", 1, None), ("esi", 1, None),
        ("dlc", 4, None),
    ),
}
#: After the CRC sequence, identical for all formats (recessive except the ACK slot,
#: which a receiver overwrites dominant); the intermission counts as part of the frame.
TRAILER: tuple[Field, ...] = (
    ("crc_delimiter", 1, 1), ("ack_slot", 1, 0), ("ack_delimiter", 1, 1), ("eof", 7, 0x7F),
    ("intermission", 3, 0b111),
)
TRAILER_BITS = sum(w for _, w, _ in TRAILER)
#: A stuff bit is inserted after this many equal consecutive bits (clause 10.5).
STUFF_RUN = 5
CLASSIC_CRC_BITS = 15
#: CAN FD: payloads up to 16 bytes use CRC-17, longer ones CRC-21 (clause 10.4.2.6).
FD_CRC17_MAX_BYTES = 16
#: CAN FD stuff count: Gray code of (dynamic stuff bits mod 8), then even parity over it.
GRAY3 = (0b000, 0b001, 0b011, 0b010, 0b110, 0b111, 0b101, 0b100)
STUFF_COUNT_BITS = 4
#: CAN FD fixed stuff bits: one before the stuff count, then one after every 4 bits.
FIXED_STUFF_PERIOD = 4
#: Table 5 of ISO 11898-1:2015, DLC -> data bytes (classic DLC 9..15 still carries 8 bytes).
FD_PAYLOAD_BYTES = (0, 1, 2, 3, 4, 5, 6, 7, 8, 12, 16, 20, 24, 32, 48, 64)
CLASSIC_PAYLOAD_BYTES = (0, 1, 2, 3, 4, 5, 6, 7, 8, 8, 8, 8, 8, 8, 8, 8)


def header_bits(fd: bool, ext: bool) -> int:
    """Unstuffed bits from SOF through the DLC (19, 39, 22 or 41)."""
    return sum(w for _, w, _ in LAYOUTS[(fd, ext)])


def brs_index(ext: bool) -> int:
    """Position of the BRS bit counted from SOF = 0 in an FD header."""
    pos = 0
    for name, width, _ in LAYOUTS[(True, ext)]:
        if name == "brs":
            return pos
        pos += width
    raise AssertionError("FD layout without BRS")


def fd_crc_bits(n_bytes: int) -> int:
    return 17 if n_bytes <= FD_CRC17_MAX_BYTES else 21


def fd_fixed_stuff_bits(n_bytes: int) -> int:
    """6 with CRC-17, 7 with CRC-21: one before the stuff count, then one per 4 bits."""
    return 1 + (STUFF_COUNT_BITS + fd_crc_bits(n_bytes) - 1) // FIXED_STUFF_PERIOD


def payload_bytes(dlc: int, fd: bool, rtr: bool) -> int:
    if rtr and not fd:
        return 0
    return FD_PAYLOAD_BYTES[dlc] if fd else CLASSIC_PAYLOAD_BYTES[dlc]


def _field_values(ident: Any, ext: bool, rtr: Any, brs: Any, esi: Any, dlc: Any
                  ) -> dict[str, Any]:
    """Frame-supplied header fields; works on Python ints and numpy arrays alike."""
    if ext:
        return {"id_hi": ident >> 18, "id_lo": ident & 0x3FFFF, "rtr": rtr, "brs": brs,
                "esi": esi, "dlc": dlc}
    return {"id": ident & 0x7FF, "rtr": rtr, "brs": brs, "esi": esi, "dlc": dlc}


def header_value(layout: tuple[Field, ...], values: dict[str, Any]) -> Any:
    """The header as one integer, SOF in the most significant bit; reads the layout table."""
    total = 0
    pos = sum(w for _, w, _ in layout)
    for name, width, const in layout:
        pos -= width
        part = const if const is not None else values[name]
        total = total + ((part & ((1 << width) - 1)) << pos)
    return total


# --- reference: the bit sequence on the wire -------------------------------------------


@dataclass(frozen=True)
class WireFrame:
    """One frame as sent: ``bits`` SOF..end of intermission, stuff bits included."""

    bits: tuple[int, ...]
    data_phase_bits: int
    crc: int
    dynamic_stuff_bits: int
    fixed_stuff_bits: int


def _int_bits(value: int, width: int) -> list[int]:
    return [(value >> (width - 1 - i)) & 1 for i in range(width)]


def frame_wire_reference(id: int, ext: bool, rtr: bool, fd: bool, brs: bool, esi: bool,
                         dlc: int, data: bytes) -> WireFrame:
    """Build the frame bit by bit, exactly as the rules read (slow; tests, rare paths)."""
    n_bytes = payload_bytes(dlc, fd, rtr)
    data = bytes(data[:n_bytes]).ljust(n_bytes, b"\0")
    layout = LAYOUTS[(fd, ext)]
    hdr_width = sum(w for _, w, _ in layout)
    values = _field_values(id, ext, int(rtr and not fd), int(brs and fd), int(esi and fd),
                           dlc)
    src = _int_bits(header_value(layout, values), hdr_width)
    for byte in data:
        src += _int_bits(byte, 8)

    wire: list[int] = []
    fast: list[bool] = []  # True where the bit is sent at the data bit rate
    last, run, dyn = -1, 0, 0
    switch_at = brs_index(ext) if (fd and brs) else None

    def put(bit: int, is_fast: bool) -> None:
        nonlocal last, run
        wire.append(bit)
        fast.append(is_fast)
        run = run + 1 if bit == last else 1
        last = bit

    if not fd:
        crc = crcmod.crc15_bits(src)
        stuffed = src + _int_bits(crc, CLASSIC_CRC_BITS)
        for bit in stuffed:
            put(bit, False)
            if run == STUFF_RUN:  # also after the last CRC bit (clause 10.5)
                put(1 - bit, False)
                dyn += 1
        fixed = 0
    else:
        crc_width = fd_crc_bits(n_bytes)
        for i, bit in enumerate(src):
            is_fast = switch_at is not None and i > switch_at
            put(bit, is_fast)
            # No dynamic stuff bit after the last data bit: the first fixed stuff bit follows.
            if run == STUFF_RUN and i < len(src) - 1:
                put(1 - bit, switch_at is not None and i >= switch_at)
                dyn += 1
        gray = GRAY3[dyn % 8]
        stuff_count = (gray << 1) | (bin(gray).count("1") & 1)
        sc_bits = _int_bits(stuff_count, STUFF_COUNT_BITS)
        # ISO 11898-1:2015: the FD CRC covers SOF..data with its dynamic stuff bits and the
        # stuff count, not the fixed stuff bits; the register starts with its top bit set.
        if crc_width == 17:
            crc = crcmod.crc17_bits(wire + sc_bits, crcmod.CRC17_FRAME_INIT)
        else:
            crc = crcmod.crc21_bits(wire + sc_bits, crcmod.CRC21_FRAME_INIT)
        tail = sc_bits + _int_bits(crc, crc_width)
        is_fast = switch_at is not None
        fixed = 0
        for k, bit in enumerate(tail):
            if k % FIXED_STUFF_PERIOD == 0:
                put(1 - last, is_fast)  # fixed stuff bit: complement of the bit before it
                fixed += 1
            put(bit, is_fast)
    for _, width, const in TRAILER:
        assert const is not None
        for bit in _int_bits(const, width):
            put(bit, False)
    data_phase = sum(fast) + 1 if (fd and brs) else 0  # +1: the CRC delimiter (see module doc)
    return WireFrame(tuple(wire), data_phase, crc, dyn, fixed)


def frame_bits_reference(id: int, ext: bool, rtr: bool, fd: bool, brs: bool, esi: bool,
                         dlc: int, data: bytes) -> tuple[int, int]:
    """``(bits, data_phase_bits)`` of one frame, bit by bit (tests, rare simulator paths)."""
    wf = frame_wire_reference(id, ext, rtr, fd, brs, esi, dlc, data)
    return len(wf.bits), wf.data_phase_bits


# --- vectorised: shared plumbing -----------------------------------------------------------

_FD_BYTES = np.array(FD_PAYLOAD_BYTES, dtype=np.int64)
_CLASSIC_BYTES = np.array(CLASSIC_PAYLOAD_BYTES, dtype=np.int64)


@dataclass
class _Columns:
    ident: np.ndarray
    ext: np.ndarray
    rtr: np.ndarray
    fd: np.ndarray
    brs: np.ndarray
    esi: np.ndarray
    dlc: np.ndarray
    n_bytes: np.ndarray
    offsets: np.ndarray
    lengths: np.ndarray
    values: np.ndarray


def _bool(frames: pl.DataFrame, name: str) -> np.ndarray:
    return frames[name].fill_null(False).cast(pl.Boolean).to_numpy().astype(bool, copy=False)


def _columns(frames: pl.DataFrame) -> _Columns:
    ident = frames["id"].cast(pl.Int64).to_numpy()
    ext, fd = _bool(frames, "ext"), _bool(frames, "fd")
    rtr = _bool(frames, "rtr") & ~fd
    brs, esi = _bool(frames, "brs") & fd, _bool(frames, "esi") & fd
    dlc = frames["dlc"].cast(pl.Int64).to_numpy()
    if dlc.size and (dlc.min() < 0 or dlc.max() > 15):
        raise ValueError(f"DLC must be 0..15, got {int(dlc.max() if dlc.max() > 15 else dlc.min())}")
    n_bytes = np.where(fd, _FD_BYTES[dlc], np.where(rtr, 0, _CLASSIC_BYTES[dlc]))
    arr = frames["data"].cast(pl.Binary).to_arrow()
    if hasattr(arr, "combine_chunks"):
        arr = arr.combine_chunks()
    if arr.type != pa.large_binary():  # int64 offsets, whatever the producer used
        arr = arr.cast(pa.large_binary())
    bufs = arr.buffers()
    offsets = np.frombuffer(bufs[1], dtype=np.int64)[arr.offset: arr.offset + len(arr) + 1]
    values = (np.frombuffer(bufs[2], dtype=np.uint8) if bufs[2] is not None
              else np.zeros(0, dtype=np.uint8))
    lengths = np.diff(offsets)
    if values.size == 0:  # masked reads of short payloads still need one readable byte
        values = np.zeros(1, dtype=np.uint8)
    if arr.null_count:
        lengths = np.where(arr.is_null().to_numpy(zero_copy_only=False), 0, lengths)
    return _Columns(ident, ext, rtr, fd, brs, esi, dlc, n_bytes, offsets[:-1], lengths, values)


def _data_columns(cols: _Columns, idx: np.ndarray, n: int) -> list[np.ndarray]:
    """Payload byte j of every frame in ``idx``, for j < n (uint8 columns, contiguous);
    short payloads are padded with zero bytes."""
    off = cols.offsets[idx]
    lengths = cols.lengths[idx]
    short = bool(len(idx)) and int(lengths.min()) < n
    out = []
    for j in range(n):  # bytes of a frame, not frames
        col = cols.values[off + j] if not short else np.where(
            lengths > j, cols.values[np.where(lengths > j, off + j, 0)], 0).astype(np.uint8)
        out.append(col)
    return out


def _groups(cols: _Columns) -> list[tuple[bool, bool, int, np.ndarray]]:
    """Frames grouped by layout (fd, ext, payload bytes); a loop over groups, not frames."""
    key = (cols.n_bytes.astype(np.uint16) << 2) | (cols.fd.astype(np.uint16) << 1) | cols.ext
    order = np.argsort(key, kind="stable")  # radix sort for 16-bit keys
    sorted_key = key[order]
    change = np.flatnonzero(sorted_key[1:] != sorted_key[:-1]) + 1
    bounds = [0, *change.tolist(), len(key)] if len(key) else [0]
    out = []
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        k = int(sorted_key[a])
        out.append((bool(k & 2), bool(k & 1), k >> 2, order[a:b]))
    return out


def _header_values(cols: _Columns, idx: np.ndarray, fd: bool, ext: bool) -> np.ndarray:
    vals = _field_values(cols.ident[idx], ext, cols.rtr[idx].astype(np.int64),
                         cols.brs[idx].astype(np.int64), cols.esi[idx].astype(np.int64),
                         cols.dlc[idx])
    return np.asarray(header_value(LAYOUTS[(fd, ext)], vals), dtype=np.int64)


#: Frames per vectorised step; about 64k int16 values (128 KB) per array stays in cache.
_SLICE_FRAMES = 1 << 16


GroupFn = Callable[[_Columns, np.ndarray, bool, bool, int], tuple[np.ndarray, np.ndarray]]


def _frame_bits_with(frames: pl.DataFrame, group_fn: GroupFn) -> pl.DataFrame:
    n = frames.height
    bits = np.zeros(n, dtype=np.uint16)
    dpb = np.zeros(n, dtype=np.uint16)
    if n:
        cols = _columns(frames)
        for fd, ext, n_bytes, group in _groups(cols):  # a handful of layouts per chunk
            # slices of a group keep the per-step arrays cache-sized (a loop over slices)
            for a in range(0, len(group), _SLICE_FRAMES):
                idx = group[a:a + _SLICE_FRAMES]
                b, d = group_fn(cols, idx, fd, ext, n_bytes)
                bits[idx] = b
                dpb[idx] = d
    return pl.DataFrame({"bits": bits, "data_phase_bits": dpb})


def _fd_fixed_part(n_bytes: int) -> int:
    """Stuff count, CRC and fixed stuff bits of an FD frame (27 or 32)."""
    return STUFF_COUNT_BITS + fd_crc_bits(n_bytes) + fd_fixed_stuff_bits(n_bytes)


# --- vectorised, bit by bit ----------------------------------------------------------------


def _group_bitwise(cols: _Columns, idx: np.ndarray, fd: bool, ext: bool, n_bytes: int
                   ) -> tuple[np.ndarray, np.ndarray]:
    m = len(idx)
    hw = header_bits(fd, ext)
    hv = _header_values(cols, idx, fd, ext)
    src = [((hv >> (hw - 1 - j)) & 1).astype(np.int16) for j in range(hw)]
    for byte in _data_columns(cols, idx, n_bytes):  # bytes of a frame, not frames
        src += [((byte >> (7 - j)) & 1).astype(np.int16) for j in range(8)]
    if not fd:
        crc = np.zeros(m, dtype=np.int16)
        for bit in src:  # bit positions, not frames
            feedback = bit ^ (crc >> 14)
            crc = ((crc << 1) & 0x7FFF) ^ (feedback * np.int16(crcmod.CRC15_POLY))
        src += [(crc >> (CLASSIC_CRC_BITS - 1 - j)) & 1 for j in range(CLASSIC_CRC_BITS)]
    last = np.full(m, -1, dtype=np.int16)
    run = np.zeros(m, dtype=np.int16)
    dyn = np.zeros(m, dtype=np.int16)
    fast_dyn = np.zeros(m, dtype=np.int16)
    n_src = len(src)
    switch_at = brs_index(ext) if fd else n_src
    for j, bit in enumerate(src):  # bit positions, not frames
        run = run * (bit == last) + 1  # same bit: run + 1, else a new run of 1
        if fd and j == n_src - 1:
            break  # no dynamic stuff bit right before the stuff count
        stuffed = (run == STUFF_RUN).astype(np.int16)
        dyn += stuffed
        if j >= switch_at:
            fast_dyn += stuffed
        last = bit ^ stuffed  # after a stuff bit the complement is the last bit
        run -= (STUFF_RUN - 1) * stuffed  # the stuff bit starts a run of 1
    if not fd:
        return n_src + dyn + TRAILER_BITS, np.zeros(m, dtype=np.int16)
    fixed = _fd_fixed_part(n_bytes)
    bits = n_src + dyn + fixed + TRAILER_BITS
    after_brs = hw - switch_at - 1 + 8 * n_bytes
    dpb = np.where(cols.brs[idx], after_brs + fast_dyn + fixed + 1, 0)
    return bits, dpb


# --- vectorised, table-driven (eight bits per step) ---------------------------------------
#
# Stuffing state after a bit: (last bit, run length 1..4), index last * 4 + run - 1; a run
# of five never survives a step because the stuff bit resets it. Each stream is front-padded
# to a byte boundary with alternating bits ending in 1, starting from state (0, run 1), so the
# pad inserts no stuff bit and SOF (dominant) starts a fresh run, exactly as after bus idle.
_START_STATE = 0


@cache
def _stuff_tables() -> tuple[np.ndarray, np.ndarray]:
    """STEP[c][(s << 8) | v] = next state | stuff bits << 3 for a c-bit chunk v (c = 0..8);
    END[(s << 8) | v] = 1 when the 8-bit chunk ends with a stuff bit (FD: suppressed)."""
    step = np.zeros((9, 8 * 256), dtype=np.int16)
    end = np.zeros(8 * 256, dtype=np.int16)
    for c in range(9):  # 9 x 8 x 256 table entries, built once per process
        for s in range(8):
            for v in range(1 << c):
                last, run, count, stuffed = s >> 2, (s & 3) + 1, 0, False
                for i in range(c - 1, -1, -1):
                    bit = (v >> i) & 1
                    run = run + 1 if bit == last else 1
                    last, stuffed = bit, False
                    if run == STUFF_RUN:
                        last, run, count, stuffed = 1 - bit, 1, count + 1, True
                step[c, (s << 8) | v] = (last * 4 + run - 1) | (count << 3)
                if c == 8:
                    end[(s << 8) | v] = stuffed
    step.flags.writeable = False
    end.flags.writeable = False
    return step, end


@cache
def _crc15_position_table(trailing_bytes: int) -> np.ndarray:
    """CRC-15 (init 0) of byte b followed by k zero bytes: a byte's share of the CRC at its
    position, since the CRC with init 0 is linear (XOR of the shares of all bytes)."""
    rows = np.zeros((256, 1 + trailing_bytes), dtype=np.uint8)
    rows[:, 0] = np.arange(256)
    out = crcmod.crc_rows(rows, CLASSIC_CRC_BITS, crcmod.CRC15_POLY).astype(np.int16)
    out.flags.writeable = False
    return out


def _pad_bits(header_width: int) -> tuple[int, int]:
    """(pad length, pad value): alternating bits ending in 1 up to the next byte boundary."""
    pad = -header_width % 8
    return pad, 0x55 & ((1 << pad) - 1)


def _stuff_step(acc: np.ndarray, chunk: np.ndarray, table: np.ndarray) -> np.ndarray:
    """acc = stuff count << 3 | state; one table lookup per frame for one chunk."""
    state = acc & 7
    return acc - state + table[(state << 8) | chunk]


def _group_table(cols: _Columns, idx: np.ndarray, fd: bool, ext: bool, n_bytes: int
                 ) -> tuple[np.ndarray, np.ndarray]:
    m = len(idx)
    step, end = _stuff_tables()
    hw = header_bits(fd, ext)
    pad, pad_value = _pad_bits(hw)
    n_hdr = (hw + pad) // 8
    hv = _header_values(cols, idx, fd, ext)
    hdr_crc = [((hv >> (8 * (n_hdr - 1 - j))) & 0xFF).astype(np.int16) for j in range(n_hdr)]
    hdr_stuff = list(hdr_crc)
    hdr_stuff[0] = hdr_stuff[0] | np.int16(pad_value << (8 - pad))
    data_t = _data_columns(cols, idx, n_bytes)
    stream = hdr_stuff + data_t
    acc = np.full(m, _START_STATE, dtype=np.int16)
    s8 = step[8]
    if not fd:
        n_msg = n_hdr + n_bytes
        crc = np.zeros(m, dtype=np.int16)
        for j, chunk in enumerate(hdr_crc + data_t):  # bytes of the frame, not frames
            crc ^= _crc15_position_table(n_msg - 1 - j)[chunk]
        for chunk in stream:  # bytes of the frame, not frames
            acc = _stuff_step(acc, chunk, s8)
        acc = _stuff_step(acc, crc >> 7, s8)
        acc = _stuff_step(acc, crc & 0x7F, step[7])
        dyn = acc >> 3
        return hw + 8 * n_bytes + CLASSIC_CRC_BITS + dyn + TRAILER_BITS, np.zeros(m, np.int16)
    switch = pad + brs_index(ext)
    switch_byte, switch_off = divmod(switch, 8)
    nominal = acc
    for j, chunk in enumerate(stream[:-1]):  # bytes of the frame, not frames
        if j == switch_byte:
            nominal = _stuff_step(acc, chunk >> (8 - switch_off), step[switch_off])
        acc = _stuff_step(acc, chunk, s8)
    last_chunk = stream[-1]
    if len(stream) - 1 == switch_byte:
        nominal = _stuff_step(acc, last_chunk >> (8 - switch_off), step[switch_off])
    suppressed = end[((acc & 7) << 8) | last_chunk]
    acc = _stuff_step(acc, last_chunk, s8)
    dyn = (acc >> 3) - suppressed
    fixed = _fd_fixed_part(n_bytes)
    bits = hw + 8 * n_bytes + dyn + fixed + TRAILER_BITS
    after_brs = hw - brs_index(ext) - 1 + 8 * n_bytes
    fast_dyn = dyn - (nominal >> 3)
    dpb = np.where(cols.brs[idx], after_brs + fast_dyn + fixed + 1, 0)
    return bits, dpb


def frame_bits_bitwise(frames: pl.DataFrame) -> pl.DataFrame:
    """Same result as :func:`frame_bits`, one vectorised step per bit (benchmark baseline)."""
    return _frame_bits_with(frames, _group_bitwise)


def frame_bits(frames: pl.DataFrame) -> pl.DataFrame:
    """``bits`` (u16, SOF..end of intermission) and ``data_phase_bits`` (u16) per frame.

    Input columns: id, ext, rtr, fd, brs, esi, dlc, data. Output has the same length and
    order. ``data_phase_bits`` is 0 without BRS; with BRS it counts ESI through the end of
    the CRC sequence (all stuff bits included) plus 1 for the CRC delimiter, because BRS and
    the CRC delimiter together last one nominal plus one data bit time.
    """
    return _frame_bits_with(frames, _group_table)


def frame_durations_ns(bits: np.ndarray, data_phase_bits: np.ndarray, nominal_bps: int,
                       data_bps: int | None) -> np.ndarray:
    """Time on the bus (int64 ns, nearest) of frames with these bit counts."""
    if nominal_bps <= 0:
        raise ValueError(f"nominal bit rate must be positive, got {nominal_bps}")
    bits_i = np.asarray(bits, dtype=np.int64)
    fast = np.asarray(data_phase_bits, dtype=np.int64)
    if data_bps is None:
        if fast.size and fast.max() > 0:
            raise ValueError("frames with bit-rate switch need a data bit rate (data=)")
        data_bps = nominal_bps
    if data_bps <= 0:
        raise ValueError(f"data bit rate must be positive, got {data_bps}")
    slow = bits_i - fast
    t_ns = (slow * 1e9) / nominal_bps + (fast * 1e9) / data_bps
    return np.floor(t_ns + 0.5).astype(np.int64)
