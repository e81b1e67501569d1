"""Frame-log format version 1 as data: magic, record kinds and their fields, vocabularies.

docs/frame-log-format.md is the normative text; this module is its machine-readable twin.
"""

from __future__ import annotations

import datetime as dt
import re

MAGIC = "%tracelab-frames"
VERSION = 1
HEADER_LINE = f"{MAGIC} {VERSION}"

#: Fields after ``t_ns``, ``bus``, ``kind`` for each record kind, in order.
RECORD_FIELDS: dict[str, tuple[str, ...]] = {
    "frame": ("id", "form", "dlc", "data"),
    "error": ("type", "field", "id", "form", "by"),
    "status": ("node", "tec", "rec"),
    "mark": ("text",),
    "loss": ("count", "until_ns"),
}
RECORD_KINDS = tuple(RECORD_FIELDS)

#: ISO 11898-1 error types and the frame field in which an error was detected.
ERROR_TYPES = ("bit", "stuff", "crc", "form", "ack", "other")
ERROR_FIELDS = (
    "sof", "arbitration", "control", "data", "crc", "ack", "eof", "interframe", "unknown",
)

DIRECTIVES = ("origin", "bus", "meta")
BUS_OPTIONS = ("nominal", "data", "stamp", "name")
STAMPS = ("start", "end")
ALL_BUSES = "*"  # allowed as the bus of a ``mark`` only
NONE = "-"  # an absent optional field

BUS_ALIAS_RE = re.compile(r"^[A-Za-z0-9_-]{1,16}$")
META_KEY_RE = re.compile(r"^[a-z0-9_]+$")
ORIGIN_RE = re.compile(r"^([0-9]{4}-[0-9]{2}-[0-9]{2}T[0-9]{2}:[0-9]{2}:[0-9]{2})(?:\.([0-9]{1,9}))?Z$")
#: ``s``/``x`` then, in this order: ``r`` (classic only) or ``f`` [``b``] [``e``] (FD only).
FORM_RE = re.compile(r"^[sx](r|f?|fb|fe|fbe)$")
HEX_ID_RE = re.compile(r"^[0-9A-Fa-f]{1,8}$")

MAX_BASE_ID = 0x7FF
MAX_EXTENDED_ID = 0x1FFFFFFF

#: An upper bound on the bits of any frame, stuffing and the 3-bit intermission included (the
#: longest, a 64-byte extended CAN FD frame, stays below 800; tests check it against
#: physics.frame_bits): the room a frame's t_ns must leave below 2^63-1 for its end_ns.
FRAME_BITS_BOUND = 1024
MAX_T_NS = 2**63 - 1


def last_frame_t_ns(nominal_bps: int, data_bps: int | None) -> int:
    """The latest t_ns of a frame on a bus with these rates whose end_ns still fits in int64
    (a bound: FRAME_BITS_BOUND bits at the slower rate)."""
    slowest = min(nominal_bps, data_bps or nominal_bps)
    return MAX_T_NS - -(-FRAME_BITS_BOUND * 1_000_000_000 // slowest)


#: ISO 11898-1:2015, Table 5 (DLC to number of data bytes) for CAN FD frames.
FD_PAYLOAD_BYTES = (0, 1, 2, 3, 4, 5, 6, 7, 8, 12, 16, 20, 24, 32, 48, 64)
#: Classic frames: DLC 9..15 still carries 8 bytes (ISO 11898-1:2015, Table 5).
CLASSIC_PAYLOAD_BYTES = (0, 1, 2, 3, 4, 5, 6, 7, 8, 8, 8, 8, 8, 8, 8, 8)


def payload_bytes(dlc: int, fd: bool, rtr: bool = False) -> int:
    """Number of data bytes a frame with this DLC carries (0 for a remote frame)."""
    if rtr:
        return 0
    return FD_PAYLOAD_BYTES[dlc] if fd else CLASSIC_PAYLOAD_BYTES[dlc]


def id_text(frame_id: int, ext: bool) -> str:
    """An identifier as the format writes it: 3 hex digits (11-bit) or 8 (29-bit), upper case."""
    return f"{frame_id:08X}" if ext else f"{frame_id:03X}"


def form_letters(ext: bool, rtr: bool = False, fd: bool = False, brs: bool = False,
                 esi: bool = False) -> str:
    """The ``form`` field for these flags, e.g. ``sfb``."""
    return ("x" if ext else "s") + ("r" if rtr else "") + ("f" if fd else "") + (
        "b" if brs else "") + ("e" if esi else "")


def parse_form(form: str) -> tuple[bool, bool, bool, bool, bool] | None:
    """``(ext, rtr, fd, brs, esi)`` for a valid form, else None."""
    if not FORM_RE.match(form):
        return None
    return form[0] == "x", "r" in form, "f" in form, "b" in form, "e" in form


def _origin_ns(origin: str) -> int | None:
    """Nanoseconds since 1970-01-01 UTC of a ``%origin`` text; None when it is not a real
    time (month 13, February 30, hour 24, a leap second)."""
    match = ORIGIN_RE.match(origin)
    if not match:
        return None
    try:
        base = dt.datetime.strptime(match.group(1), "%Y-%m-%dT%H:%M:%S").replace(tzinfo=dt.UTC)
    except ValueError:
        return None
    frac_ns = int((match.group(2) or "0").ljust(9, "0"))
    seconds = (base - dt.datetime(1970, 1, 1, tzinfo=dt.UTC)) // dt.timedelta(seconds=1)
    return seconds * 1_000_000_000 + frac_ns


#: The wall times a report can show: datetime's years 1 .. 9999.
_LAST_NS = (dt.datetime(9999, 12, 31, 23, 59, 59, tzinfo=dt.UTC)
            - dt.datetime(1970, 1, 1, tzinfo=dt.UTC)) // dt.timedelta(seconds=1) * 1_000_000_000


def origin_problem(origin: str) -> str | None:
    """Why a ``%origin`` that matches ORIGIN_RE cannot be used, or None when it can: it must be
    a real calendar time, and every t_ns after it (up to 2^63-1 ns, about 292 years) a wall
    time before the year 10000."""
    epoch_ns = _origin_ns(origin)
    if epoch_ns is None:
        return "not a real date and time (month 01-12, a day of that month, 00:00:00-23:59:59)"
    if epoch_ns + MAX_T_NS > _LAST_NS:
        return "too late: a t_ns up to 2^63-1 ns after it must stay before the year 10000"
    return None


def wall_time(origin: str | None, t_ns: int | None) -> str | None:
    """ISO 8601 UTC with nanoseconds: ``%origin`` (the wall time of t_ns = 0) plus t_ns."""
    if origin is None or t_ns is None:
        return None
    origin_ns = _origin_ns(origin)
    if origin_ns is None:
        return None
    seconds, ns = divmod(origin_ns + int(t_ns), 1_000_000_000)
    stamp = (dt.datetime(1970, 1, 1, tzinfo=dt.UTC) + dt.timedelta(seconds=seconds)).strftime(
        "%Y-%m-%dT%H:%M:%S")
    return f"{stamp}.{ns:09d}Z"
