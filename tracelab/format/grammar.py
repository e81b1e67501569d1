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
ORIGIN_RE = re.compile(r"^(\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2})(?:\.(\d{1,9}))?Z$")
#: ``s``/``x`` then, in this order: ``r`` (classic only) or ``f`` [``b``] [``e``] (FD only).
FORM_RE = re.compile(r"^[sx](r|f?|fb|fe|fbe)$")
HEX_ID_RE = re.compile(r"^[0-9A-Fa-f]{1,8}$")

MAX_BASE_ID = 0x7FF
MAX_EXTENDED_ID = 0x1FFFFFFF

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


def wall_time(origin: str | None, t_ns: int | None) -> str | None:
    """ISO 8601 UTC with nanoseconds: ``%origin`` (the wall time of t_ns = 0) plus t_ns."""
    if origin is None or t_ns is None:
        return None
    match = ORIGIN_RE.match(origin)
    if not match:
        return None
    base = dt.datetime.strptime(match.group(1), "%Y-%m-%dT%H:%M:%S").replace(tzinfo=dt.UTC)
    frac_ns = int((match.group(2) or "0").ljust(9, "0"))
    epoch_ns = int(base.timestamp()) * 1_000_000_000 + frac_ns + int(t_ns)
    seconds, ns = divmod(epoch_ns, 1_000_000_000)
    stamp = dt.datetime.fromtimestamp(seconds, tz=dt.UTC).strftime("%Y-%m-%dT%H:%M:%S")
    return f"{stamp}.{ns:09d}Z"
