"""The header of a frame log: the magic line and the directives before the first record.

A handful of lines, parsed in Python; any fault here makes the whole file unreadable
(LogFormatError naming the line).
"""

from __future__ import annotations

from pathlib import Path
from typing import BinaryIO

from tracelab.errors import LogFormatError, did_you_mean
from tracelab.format.blocks import MAX_LINE_BYTES
from tracelab.format.grammar import (
    BUS_ALIAS_RE,
    BUS_OPTIONS,
    DIRECTIVES,
    HEADER_LINE,
    MAGIC,
    META_KEY_RE,
    ORIGIN_RE,
    STAMPS,
    VERSION,
    origin_problem,
)
from tracelab.format.writer import BusDecl, LogHeader

_HEADER_LINE_LIMIT = 64 * 1024  # a longer line cannot be a directive: it ends the header


def _text(line: bytes) -> str:
    return line.rstrip(b"\n").removesuffix(b"\r").decode("utf-8", errors="backslashreplace")


def _parse_magic(path: Path, line: bytes | None) -> None:
    if not line:
        raise LogFormatError(str(path), None, f"empty file: line 1 must be '{HEADER_LINE}'")
    text = _text(line)
    if text == HEADER_LINE:
        return
    words = text.split(" ")
    if words[0] == MAGIC and len(words) == 2 and words[1].isdigit() and int(words[1]) != VERSION:
        raise LogFormatError(str(path), 1, f"format version {words[1]} is not supported "
                             f"(this tracelab reads version {VERSION}); upgrade tracelab")
    if text.startswith("\ufeff"):
        raise LogFormatError(str(path), 1, "the file starts with a byte order mark (EF BB BF): "
                             f"line 1 must be exactly '{HEADER_LINE}'; save it as UTF-8 "
                             "without a BOM")
    shown = text if len(text) <= 40 else text[:40] + "..."
    raise LogFormatError(str(path), 1, f"not a tracelab frame log: line 1 must be "
                         f"'{HEADER_LINE}', found '{shown}'")


def _parse_options(path: Path, line_no: int, words: list[str],
                   what: str) -> dict[str, str]:
    options: dict[str, str] = {}
    for word in words:
        key, eq, value = word.partition("=")
        if not eq or not key or not value:
            raise LogFormatError(str(path), line_no, f"{what}: expected key=value, found '{word}'")
        if key in options:
            raise LogFormatError(str(path), line_no, f"{what}: '{key}' given twice")
        options[key] = value
    return options


def _parse_bus(path: Path, line_no: int, words: list[str], header: LogHeader) -> None:
    if not words:
        raise LogFormatError(str(path), line_no, "%bus needs an alias and nominal=<bit/s>")
    alias = words[0]
    if not BUS_ALIAS_RE.match(alias):
        raise LogFormatError(str(path), line_no, f"bus alias '{alias}' must match "
                             "[A-Za-z0-9_-]{1,16}")
    if any(bus.alias == alias for bus in header.buses):
        raise LogFormatError(str(path), line_no, f"bus '{alias}' is declared twice")
    options = _parse_options(path, line_no, words[1:], f"%bus {alias}")
    for key in options:
        if key not in BUS_OPTIONS:
            raise LogFormatError(str(path), line_no, f"%bus {alias}: unknown option '{key}'"
                                 f"{did_you_mean(key, BUS_OPTIONS)}")
    rates: dict[str, int | None] = {}
    for key in ("nominal", "data"):
        value = options.get(key)
        if value is None:
            rates[key] = None
        elif value.isdigit() and value.isascii() and int(value) > 0:
            rates[key] = int(value)
        else:
            raise LogFormatError(str(path), line_no, f"%bus {alias}: {key}='{value}' is not a "
                                 "positive integer bit rate (bit/s)")
    nominal = rates["nominal"]
    if nominal is None:
        raise LogFormatError(str(path), line_no, f"%bus {alias}: nominal=<bit/s> is required")
    stamp = options.get("stamp", "end")
    if stamp not in STAMPS:
        raise LogFormatError(str(path), line_no, f"%bus {alias}: stamp='{stamp}' must be "
                             "start or end")
    header.buses.append(BusDecl(alias, nominal, rates["data"], stamp, options.get("name")))


def _parse_directive(path: Path, line_no: int, text: str, header: LogHeader) -> None:
    name, *words = text[1:].split() or [""]
    if name == "origin":
        if header.origin is not None:
            raise LogFormatError(str(path), line_no, "%origin is given twice")
        if len(words) != 1 or not ORIGIN_RE.match(words[0]):
            raise LogFormatError(str(path), line_no, "%origin must be a UTC time like "
                                 "2026-11-30T21:04:05.000000000Z (ISO 8601, Z, <= 9 decimals)")
        problem = origin_problem(words[0])
        if problem:
            raise LogFormatError(str(path), line_no, f"%origin {words[0]}: {problem}")
        header.origin = words[0]
    elif name == "bus":
        _parse_bus(path, line_no, words, header)
    elif name == "meta":
        if not words:
            raise LogFormatError(str(path), line_no, "%meta needs at least one key=value")
        for key, value in _parse_options(path, line_no, words, "%meta").items():
            if not META_KEY_RE.match(key):
                raise LogFormatError(str(path), line_no, f"%meta key '{key}' must match [a-z0-9_]+")
            if key in header.meta:
                raise LogFormatError(str(path), line_no, f"%meta key '{key}' is given twice")
            header.meta[key] = value
    else:
        raise LogFormatError(str(path), line_no, f"unknown directive '%{name}'"
                             f"{did_you_mean(name, DIRECTIVES)}; expected %origin, %bus or %meta")


def _skip_rest_of_line(path: Path, stream: BinaryIO, line_no: int, seen: int) -> bool:
    """Read past the rest of a long comment line a piece at a time (memory stays at one
    piece); False when the file ends inside it."""
    while True:
        piece = stream.readline(_HEADER_LINE_LIMIT)
        seen += len(piece)
        if seen > MAX_LINE_BYTES:
            raise LogFormatError(str(path), line_no, "line is longer than "
                                 f"{MAX_LINE_BYTES >> 20} MiB: not a frame log?")
        if not piece:
            return False
        if piece.endswith(b"\n"):
            return True


def parse_header(path: Path, stream: BinaryIO) -> tuple[LogHeader, int, bytes]:
    """Parse lines up to the first record: (header, lines consumed, the bytes read of the
    first record line, which may be only its start: the block splitter reads on)."""
    _parse_magic(path, stream.readline(_HEADER_LINE_LIMIT))
    header = LogHeader(buses=[])
    line_no = 1
    while True:
        line = stream.readline(_HEADER_LINE_LIMIT)
        if not line:
            return header, line_no, b""
        whole = line.endswith(b"\n") or len(line) < _HEADER_LINE_LIMIT  # else: a long line
        if line.startswith(b"#"):
            line_no += 1
            if not whole and not _skip_rest_of_line(path, stream, line_no, len(line)):
                return header, line_no, b""
            continue
        if not line.startswith(b"%"):
            if whole and line.strip(b" \t\r\n") == b"":
                line_no += 1
                continue
            return header, line_no, line  # the first record (or a long blank line)
        line_no += 1
        if not whole:
            raise LogFormatError(str(path), line_no, "directive is longer than "
                                 f"{_HEADER_LINE_LIMIT >> 10} KiB")
        if not line.endswith(b"\n"):
            raise LogFormatError(str(path), line_no, "truncated final line (no line end)")
        try:
            text = line.rstrip(b"\n").removesuffix(b"\r").decode("utf-8")
        except UnicodeDecodeError as error:
            raise LogFormatError(str(path), line_no,
                                 f"directive is not valid UTF-8 ({error.reason})") from error
        _parse_directive(path, line_no, text, header)
