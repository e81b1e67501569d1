"""The three CRCs of ISO 11898-1:2015: CRC-15 (classic), CRC-17 and CRC-21 (CAN FD).

All three are MSB-first, unreflected, with no final XOR. The ``*_bits`` functions run the
shift register of ISO 11898-1:2015 (CRC field clause; number from memory) bit by bit (the reference); the byte-wise
functions and :func:`crc_rows` use a 256-entry table, the same register eight bits at a time.

Initial values: the byte-wise functions default to 0, the parameters of the public CRC
catalogue (CRC-15/CAN, CRC-17/CAN-FD, CRC-21/CAN-FD), so they can be checked against its
check values (crccheck records them). Inside an ISO CAN FD frame the register starts with its top bit set
(``CRC17_FRAME_INIT`` / ``CRC21_FRAME_INIT``); a classic frame starts from 0.
"""

from __future__ import annotations

from collections.abc import Iterable
from functools import cache

import numpy as np

CRC15_POLY = 0x4599
CRC17_POLY = 0x1685B
CRC21_POLY = 0x102899
#: ISO 11898-1:2015: the CAN FD CRC registers start as 1 followed by zeros (from memory).
CRC17_FRAME_INIT = 1 << 16
CRC21_FRAME_INIT = 1 << 20


def crc_bits(bits: Iterable[int], width: int, poly: int, init: int = 0) -> int:
    """Bit-serial CRC register: the reference every faster path is tested against."""
    mask = (1 << width) - 1
    crc = init & mask
    top = width - 1
    for bit in bits:
        feedback = (bit & 1) ^ (crc >> top)
        crc = (crc << 1) & mask
        if feedback:
            crc ^= poly
    return crc


def crc15_bits(bits: Iterable[int], init: int = 0) -> int:
    return crc_bits(bits, 15, CRC15_POLY, init)


def crc17_bits(bits: Iterable[int], init: int = 0) -> int:
    """CRC-17; pass ``init=CRC17_FRAME_INIT`` for the value inside an ISO CAN FD frame."""
    return crc_bits(bits, 17, CRC17_POLY, init)


def crc21_bits(bits: Iterable[int], init: int = 0) -> int:
    """CRC-21; pass ``init=CRC21_FRAME_INIT`` for the value inside an ISO CAN FD frame."""
    return crc_bits(bits, 21, CRC21_POLY, init)


@cache
def crc_table(width: int, poly: int) -> np.ndarray:
    """T[b]: the register after shifting byte b (placed in its top 8 bits) eight times."""
    top = 1 << (width - 1)
    mask = (1 << width) - 1
    table = np.zeros(256, dtype=np.int64)
    for byte in range(256):  # 256 table entries, built once
        crc = byte << (width - 8)
        for _ in range(8):
            crc = ((crc << 1) ^ poly) & mask if crc & top else (crc << 1) & mask
        table[byte] = crc
    table.flags.writeable = False
    return table


def _crc_bytes(data: bytes, width: int, poly: int, init: int) -> int:
    table = crc_table(width, poly)
    mask = (1 << width) - 1
    shift = width - 8
    crc = init & mask
    for byte in data:
        crc = ((crc << 8) & mask) ^ int(table[((crc >> shift) ^ byte) & 0xFF])
    return crc


def crc15(data: bytes, init: int = 0) -> int:
    """CRC-15/CAN of whole bytes (catalogue parameters)."""
    return _crc_bytes(data, 15, CRC15_POLY, init)


def crc17(data: bytes, init: int = 0) -> int:
    """CRC-17/CAN-FD of whole bytes (catalogue parameters: init 0)."""
    return _crc_bytes(data, 17, CRC17_POLY, init)


def crc21(data: bytes, init: int = 0) -> int:
    """CRC-21/CAN-FD of whole bytes (catalogue parameters: init 0)."""
    return _crc_bytes(data, 21, CRC21_POLY, init)


def crc_rows(rows: np.ndarray, width: int, poly: int, init: np.ndarray | int = 0) -> np.ndarray:
    """CRC of every row of an (m, n) uint8 matrix at once; loops over the n columns only."""
    table = crc_table(width, poly)
    mask = (1 << width) - 1
    shift = width - 8
    crc = np.zeros(rows.shape[0], dtype=np.int64) + init
    for j in range(rows.shape[1]):  # columns (bytes of a frame), not frames
        crc = ((crc << 8) & mask) ^ table[((crc >> shift) ^ rows[:, j]) & 0xFF]
    return crc
