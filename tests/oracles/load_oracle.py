"""Brute-force bus-load oracle: one counter per nanosecond, for small logs (tests only).

Written from the definitions in docs/analyses.md (bus load) and nothing else: a frame
occupies the bus over [start_ns, start_ns + duration_ns); an error record at t_ns occupies it
from t_ns minus the bits of the aborted frame up to the end of the detecting field (classic
layout, no stuff bits, 8 data bytes) to t_ns plus error flag 6 + delimiter 8 + intermission 3
bit times. Windows of width W are [k W, (k + 1) W) for integer k (also below 0), from the
window holding the first busy nanosecond to the one holding the last. Busy time of a window =
the sum over its nanoseconds of how many spans cover it (overlaps count twice, as the package
documents). Imports nothing from tracelab.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Classic data-frame fields in wire order with their widths (from memory of ISO 11898-1's
# frame format; the same widths as tests/oracles/frame_oracle.py builds), extended format.
_BASE = [("sof", 1), ("id", 11), ("rtr", 1), ("ide", 1), ("r0", 1), ("dlc", 4),
         ("data", 64), ("crc", 15), ("crc_del", 1), ("ack_slot", 1), ("ack_del", 1),
         ("eof", 7)]
_EXT = [("sof", 1), ("id", 11), ("srr", 1), ("ide", 1), ("id_ext", 18), ("rtr", 1),
        ("r1", 1), ("r0", 1), ("dlc", 4), ("data", 64), ("crc", 15), ("crc_del", 1),
        ("ack_slot", 1), ("ack_del", 1), ("eof", 7)]
# the last wire field of each logged error field (the arbitration field ends with RTR, the
# control field with the DLC, the CRC field with its delimiter, the ACK field with its
# delimiter); interframe / unknown charge nothing before t_ns
_LAST_OF = {"sof": "sof", "arbitration": "rtr", "control": "dlc", "data": "data",
            "crc": "crc_del", "ack": "ack_del", "eof": "eof"}
AFTER_BITS = 6 + 8 + 3


def bits_before(field: str, ext: bool) -> int:
    """Bits from SOF to the end of ``field`` (derived from the field lists above)."""
    if field not in _LAST_OF:
        return 0
    total = 0
    for name, width in _EXT if ext else _BASE:
        total += width
        if name == _LAST_OF[field]:
            return total
    raise AssertionError(field)


@dataclass
class Window:
    t_ns: int
    busy_ns: int
    frames: int
    error_frames: int


def error_span(t_ns: int, field: str, ext: bool, bit_ns: int) -> tuple[int, int]:
    return t_ns - bits_before(field, ext) * bit_ns, t_ns + AFTER_BITS * bit_ns


def windows(frames: list[tuple[int, int]], errors: list[tuple[int, int]], window_ns: int
            ) -> list[Window]:
    """frames: (start_ns, end_ns) spans; errors: (s, e) spans. One bus, one run."""
    spans = frames + errors
    lo = min(s for s, _ in spans)
    hi = max(e for _, e in spans)
    first_k = lo // window_ns  # Python's // is floor division, also below 0
    last_k = (hi - 1) // window_ns
    origin = first_k * window_ns
    occ = np.zeros((last_k - first_k + 1) * window_ns, dtype=np.int16)
    for s, e in spans:  # a handful of spans: brute force, one slice each
        occ[s - origin:e - origin] += 1
    busy = occ.reshape(-1, window_ns).sum(axis=1, dtype=np.int64)
    out = []
    for i, k in enumerate(range(first_k, last_k + 1)):
        a, b = k * window_ns, (k + 1) * window_ns
        out.append(Window(a, int(busy[i]), sum(1 for s, _ in frames if a <= s < b),
                          sum(1 for s, _ in errors if a <= s < b)))
    return out
