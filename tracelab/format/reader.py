"""Streaming, vectorised reader of frame-log format v1: byte chunks -> typed polars tables.

The header (magic line and directives) is parsed in Python: it is a handful of lines. The
records are read in byte chunks split at the last LF, numbered, split into fields with polars
string operations and validated with vectorised expressions; each line goes to its record
table or to ``rejects`` with a precise reason. Python touches single lines only on rare paths
(a chunk that is not valid UTF-8, "did you mean" suggestions for rejected names).
"""

from __future__ import annotations

import gzip
import io
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np
import polars as pl
import pyarrow as pa
import zstandard

from tracelab.errors import LogFormatError, did_you_mean
from tracelab.format.compression import GZIP_MAGIC, ZSTD_MAGIC
from tracelab.format.grammar import (
    ALL_BUSES,
    BUS_ALIAS_RE,
    BUS_OPTIONS,
    CLASSIC_PAYLOAD_BYTES,
    DIRECTIVES,
    ERROR_FIELDS,
    ERROR_TYPES,
    FD_PAYLOAD_BYTES,
    FORM_RE,
    HEADER_LINE,
    MAGIC,
    MAX_BASE_ID,
    MAX_EXTENDED_ID,
    META_KEY_RE,
    NONE,
    ORIGIN_RE,
    RECORD_FIELDS,
    STAMPS,
    VERSION,
)
from tracelab.format.writer import BusDecl, LogHeader

CHUNK_BYTES = 8 * 1024 * 1024
MAX_LINE_BYTES = 64 * 1024 * 1024
_HEADER_LINE_LIMIT = 64 * 1024  # a longer line cannot be a directive: it ends the header
_MAX_FIELDS = 3 + max(len(v) for v in RECORD_FIELDS.values())
_DIGITS = r"^[0-9]{1,19}$"  # up to int64; to_integer(strict=False) nulls an overflow
_HEX_ID = r"^[0-9A-Fa-f]{1,8}$"
_CORRUPT = (OSError, EOFError, zlib.error, zstandard.ZstdError)

#: Every form FORM_RE accepts, for a cheap is_in() on the fast path.
VALID_FORMS = tuple(f"{k}{rest}" for k in "sx" for rest in ("", "r", "f", "fb", "fe", "fbe"))
_FAST_SCHEMA = {f"field_{i}": pl.String for i in range(_MAX_FIELDS + 1)}
_FORM_ENUM = pl.Enum(list(VALID_FORMS))
_DLC_ENUM = pl.Enum([str(dlc) for dlc in range(16)])

#: Value of each byte as a hex digit, 255 for any other byte.
_HEX_VALUE = np.full(256, 255, dtype=np.uint8)
_HEX_VALUE[np.frombuffer(b"0123456789", dtype=np.uint8)] = np.arange(10)
_HEX_VALUE[np.frombuffer(b"abcdef", dtype=np.uint8)] = np.arange(10, 16)
_HEX_VALUE[np.frombuffer(b"ABCDEF", dtype=np.uint8)] = np.arange(10, 16)


def _decode_hex(text: pl.Series) -> pl.Series | None:
    """Hex text -> bytes by a table lookup over the column's whole character buffer (about
    half the cost of ``str.decode("hex")``). None when any value is not an even number of
    hex digits: the caller then decodes with polars, which gives null for those."""
    arr = text.to_arrow(compat_level=pl.CompatLevel.oldest())
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    if arr.type != pa.large_string() or arr.offset:
        return None
    validity, offsets_buf, data_buf = arr.buffers()
    raw_offsets = np.frombuffer(offsets_buf, dtype=np.int64)[: len(arr) + 1]
    offsets = raw_offsets - raw_offsets[0]
    if (offsets & 1).any():  # every length even <=> every offset even
        return None
    data = (np.frombuffer(data_buf, dtype=np.uint8)[raw_offsets[0]: raw_offsets[-1]]
            if data_buf is not None else np.zeros(0, dtype=np.uint8))
    values = np.take(_HEX_VALUE, data)
    if values.size and values.max() == 255:
        return None
    out = (values[0::2] << 4) | values[1::2]
    decoded = pa.LargeBinaryArray.from_buffers(
        pa.large_binary(), len(arr), [validity, pa.py_buffer(offsets >> 1), pa.py_buffer(out)])
    return pl.Series(text.name, decoded)


FRAME_COLUMNS = ("bus", "t_ns", "id", "ext", "rtr", "fd", "brs", "esi", "dlc", "data", "line")


@dataclass
class Chunk:
    """The records of one byte chunk, typed, plus the rejects and the bookkeeping."""

    frames: pl.DataFrame  # FRAME_COLUMNS
    errors: pl.DataFrame  # bus t_ns type field id ext form by line
    status: pl.DataFrame  # bus t_ns node tec rec line
    marks: pl.DataFrame  # bus t_ns text line
    losses: pl.DataFrame  # bus t_ns count until_ns line
    rejects: pl.DataFrame  # line raw reason
    lines: int  # lines in this chunk
    other_lines: int  # comment and blank lines
    backward_steps: int = 0
    first_backward_line: int | None = None
    first_t_ns: int | None = None
    last_t_ns: int | None = None
    bytes_read: int = 0  # bytes of the file on disk consumed so far (for progress bars)
    bus_first: dict[str, tuple[int, int]] = field(default_factory=dict)  # bus: (t_ns, line)
    bus_last: dict[str, int] = field(default_factory=dict)  # bus: last t_ns

    @property
    def records(self) -> int:
        return (self.frames.height + self.errors.height + self.status.height
                + self.marks.height + self.losses.height)


@dataclass(frozen=True)
class Block:
    """Raw bytes of whole lines (the last one unterminated only at the end of the file)."""

    body: bytes
    first_line: int
    terminated: bool
    bytes_read: int
    newlines: int | None = None  # LF count of body when the splitter counted it already


# --- opening and the header ---------------------------------------------------------------


class _ZstdStream(io.RawIOBase):
    """Decompress zstd frames one after another; a stream cut inside a frame is an error
    (the library's stream reader reports a cut stream as a quiet end of file)."""

    def __init__(self, raw: BinaryIO, block_bytes: int = 1 << 20) -> None:
        self._raw = raw
        self._block_bytes = block_bytes
        self._obj = zstandard.ZstdDecompressor().decompressobj()
        self._pending = b""
        self._in_frame = False

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        while not self._pending:
            block = self._raw.read(self._block_bytes)
            if not block:
                if self._in_frame:
                    raise zstandard.ZstdError("stream ends inside a zstd frame")
                return 0
            while block:
                self._in_frame = True
                self._pending += self._obj.decompress(block)
                block = b""
                if self._obj.eof:
                    block = self._obj.unused_data
                    self._obj = zstandard.ZstdDecompressor().decompressobj()
                    self._in_frame = False
        size = min(len(buffer), len(self._pending))
        buffer[:size] = self._pending[:size]
        self._pending = self._pending[size:]
        return size


def _open(path: Path, block_bytes: int = 1 << 20) -> tuple[BinaryIO, BinaryIO]:
    """(decompressed stream, raw file); compression is recognised by the first bytes.
    ``block_bytes``: compressed bytes a zstd read takes at a time."""
    raw = open(path, "rb")  # noqa: SIM115 - closed by the caller
    head = raw.read(4)
    raw.seek(0)
    if head.startswith(GZIP_MAGIC):
        return gzip.GzipFile(fileobj=raw, mode="rb"), raw  # type: ignore[return-value]
    if head.startswith(ZSTD_MAGIC):
        return io.BufferedReader(_ZstdStream(raw, block_bytes), 1 << 20), raw  # type: ignore[return-value]
    return raw, raw


def _compression_name(path: Path) -> str:
    with open(path, "rb") as raw:
        head = raw.read(4)
    return "gzip" if head.startswith(GZIP_MAGIC) else "zstd" if head.startswith(ZSTD_MAGIC) else ""


def _corrupt(path: Path, error: BaseException) -> LogFormatError:
    kind = _compression_name(path) or "file"
    return LogFormatError(str(path), None, f"corrupt or truncated {kind} data ({error})")


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


def _read_header(path: Path, stream: BinaryIO) -> tuple[LogHeader, int, bytes]:
    """Parse lines up to the first record: (header, lines consumed, first record line)."""
    _parse_magic(path, stream.readline(_HEADER_LINE_LIMIT))
    header = LogHeader(buses=[])
    line_no = 1
    while True:
        line = stream.readline(_HEADER_LINE_LIMIT)
        if not line:
            return header, line_no, b""
        if not line.startswith((b"%", b"#")) and line.strip(b" \t\r\n") != b"":
            return header, line_no, line
        line_no += 1
        if line.startswith(b"%"):
            if not line.endswith(b"\n"):
                raise LogFormatError(str(path), line_no, "truncated final line (no line end)")
            try:
                text = line.rstrip(b"\n").removesuffix(b"\r").decode("utf-8")
            except UnicodeDecodeError as error:
                raise LogFormatError(str(path), line_no,
                                     f"directive is not valid UTF-8 ({error.reason})") from error
            _parse_directive(path, line_no, text, header)


def read_header(path: str | Path) -> LogHeader:
    """The header of a log (origin, buses, meta); LogFormatError when it is broken."""
    path = Path(path)
    # small zstd reads: the header is the first lines, a 1 MiB block would decompress ~10 MB
    # (29 ms a log where 0.6 ms do; the fleet batch reads every new log's header)
    stream, raw = _open(path, 1 << 16)
    try:
        return _read_header(path, stream)[0]
    except _CORRUPT as error:
        raise _corrupt(path, error) from error
    finally:
        stream.close()
        raw.close()


# --- vectorised records --------------------------------------------------------------------


def _unsigned(text: pl.Expr) -> pl.Expr:
    return ~text.str.starts_with("+") & ~text.str.starts_with("-")


def _table_expr(table: tuple[int, ...], key: pl.Expr) -> pl.Expr:
    return key.replace_strict(dict(enumerate(table)), default=None, return_dtype=pl.Int64)


def _int(col: pl.Expr) -> pl.Expr:
    return pl.when(col.str.contains(_DIGITS)).then(col.str.to_integer(strict=False))


def _frame_id_reason(ident: pl.Expr, form: pl.Expr) -> Any:
    """A when/then chain (callers extend it) checking an id against its form."""
    id_value = ident.str.to_integer(base=16, strict=False)
    ext = form.str.starts_with("x")
    return (
        pl.when(~ident.str.contains(_HEX_ID))
        .then(pl.format("id '{}' is not 1-8 hex digits", ident))
        .when(~form.str.contains(FORM_RE.pattern))
        .then(pl.format("form '{}' is invalid: s or x, then r (remote, classic only) or "
                        "f, fb, fe, fbe (CAN FD)", form))
        .when(ext & (id_value > MAX_EXTENDED_ID))
        .then(pl.format("id {} is out of range for a 29-bit identifier (max 1FFFFFFF)",
                        ident.str.to_uppercase()))
        .when(~ext & (id_value > MAX_BASE_ID))
        .then(pl.format("id {} is out of range for an 11-bit identifier (max 7FF)",
                        ident.str.to_uppercase()))
    )


def _reasons(header: LogHeader) -> pl.Expr:
    """One reason per record line (null = valid), first failing check wins."""
    f = [pl.col(f"field_{i}") for i in range(_MAX_FIELDS + 1)]
    t_raw, bus, kind = f[0], f[1], f[2]
    aliases = [b.alias for b in header.buses]
    fd_buses = [b.alias for b in header.buses if b.data_bps is not None]
    n_fields = pl.col("n_fields")
    expected = kind.replace_strict({k: 3 + len(v) for k, v in RECORD_FIELDS.items()},
                                   default=None, return_dtype=pl.Int64)
    layout = kind.replace_strict({k: " ".join(("t_ns", "bus", "kind", *v))
                                  for k, v in RECORD_FIELDS.items()}, default="")
    t_ns = _int(t_raw)

    # frame
    form, dlc_raw, data = f[4], f[5], f[6]
    dlc = _int(dlc_raw)
    fd, rtr = form.str.contains("f", literal=True), form.str.contains("r", literal=True)
    n_hex = data.str.len_bytes()
    need = pl.when(rtr).then(0).when(fd).then(_table_expr(FD_PAYLOAD_BYTES, dlc)).otherwise(
        _table_expr(CLASSIC_PAYLOAD_BYTES, dlc))
    have = pl.when(data == NONE).then(0).otherwise(n_hex // 2)
    frame = (
        _frame_id_reason(f[3], form)
        .when(dlc.is_null() | (dlc > 15)).then(pl.format("dlc '{}' is not 0-15", dlc_raw))
        .when(form.str.contains("b", literal=True) & ~bus.is_in(fd_buses))
        .then(pl.format("bit-rate switch (b) on bus '{}', which declares no data= bit rate", bus))
        .when(data == "").then(pl.lit("data is empty; write '-' for no payload"))
        .when((data != NONE) & ~data.str.contains(r"^[0-9A-Fa-f]*$"))
        .then(pl.format("data '{}' is not hex", data))
        .when((data != NONE) & (n_hex % 2 == 1))
        .then(pl.format("data has an odd number of hex digits ({})", n_hex))
        .when(rtr & (have > 0)).then(pl.lit("a remote frame carries no data; write '-'"))
        .when(have != need)
        .then(pl.format("data has {} bytes, DLC {} ({}) needs {}", have, dlc, form, need))
    )

    # error
    e_id, e_form, by = f[5], f[6], f[7]
    error = (
        pl.when(~f[3].is_in(ERROR_TYPES))
        .then(pl.format("error type '{}' is not one of " + ", ".join(ERROR_TYPES), f[3]))
        .when(~f[4].is_in(ERROR_FIELDS))
        .then(pl.format("error field '{}' is not one of " + ", ".join(ERROR_FIELDS), f[4]))
        .when((e_id == NONE) != (e_form == NONE))
        .then(pl.lit("id and form go together: give both, or '-' for both"))
        .when(e_id != NONE).then(_frame_id_reason(e_id, e_form))
        .when(by == "").then(pl.lit("by is empty; write '-' when the node is unknown"))
    )

    # status
    status = (
        pl.when(f[3] == "").then(pl.lit("node is empty"))
        .when(~f[4].str.contains(r"^[0-9]{1,9}$"))
        .then(pl.format("tec '{}' is not a non-negative integer", f[4]))
        .when(~f[5].str.contains(r"^[0-9]{1,9}$"))
        .then(pl.format("rec '{}' is not a non-negative integer", f[5]))
    )

    # loss
    until = _int(f[4])
    loss = (
        pl.when((f[3] != NONE) & ~f[3].str.contains(_DIGITS))
        .then(pl.format("count '{}' is not a non-negative integer or '-'", f[3]))
        .when(until.is_null())
        .then(pl.format("until_ns '{}' is not a non-negative integer", f[4]))
        .when(until < t_ns).then(pl.format("until_ns {} is before t_ns {}", until, t_ns))
    )

    return (
        pl.when(kind.is_null())
        .then(pl.format("missing fields: a record starts with t_ns, bus, kind (found {})",
                        n_fields))
        .when(~kind.is_in(list(RECORD_FIELDS)))
        .then(pl.format("unknown record kind '{}'", kind))
        .when(n_fields < expected)
        .then(pl.format("missing fields: {} needs {} ({}), found {}", kind, expected, layout,
                        n_fields))
        .when(n_fields > expected)
        .then(pl.format("extra fields: {} needs {} ({}), found {}", kind, expected, layout,
                        n_fields))
        .when(t_raw.str.contains(r"^-[0-9]+$"))
        .then(pl.format("t_ns '{}' is negative; times count up from the origin", t_raw))
        .when(t_ns.is_null())
        .then(pl.format("t_ns '{}' is not a non-negative integer (nanoseconds)", t_raw))
        .when((bus == ALL_BUSES) & (kind != "mark"))
        .then(pl.format("bus '*' (all buses) is allowed for mark records only, not {}", kind))
        .when((bus != ALL_BUSES) & ~bus.is_in(aliases))
        .then(pl.format("unknown bus '{}' (declared: {})", bus,
                        pl.lit(", ".join(aliases) or "none")))
        .when(kind == "frame").then(frame)
        .when(kind == "error").then(error)
        .when(kind == "status").then(status)
        .when(kind == "loss").then(loss)
    )


def _suggest(rejects: pl.DataFrame, header: LogHeader) -> pl.DataFrame:
    """Add "did you mean" to unknown kinds and buses (Python over distinct reasons: few)."""
    mask = rejects["reason"].str.starts_with("unknown ")
    if not mask.any():
        return rejects
    aliases = [b.alias for b in header.buses]
    mapping: dict[str, str] = {}
    for reason in rejects.filter(mask)["reason"].unique().to_list():
        word = reason.split("'")[1] if reason.count("'") >= 2 else ""
        choices = RECORD_FIELDS if reason.startswith("unknown record kind") else aliases
        mapping[reason] = reason + did_you_mean(word, choices)
    return rejects.with_columns(pl.col("reason").replace(mapping))


class LogReader:
    """Read one log: ``header`` on construction, then ``chunks()`` in line order."""

    def __init__(self, path: str | Path, chunk_bytes: int | None = None) -> None:
        self.path = Path(path)
        self.chunk_bytes = chunk_bytes or CHUNK_BYTES
        self._stream, self._raw = _open(self.path)
        try:
            self.header, self.header_lines, self._first = _read_header(self.path, self._stream)
        except _CORRUPT as error:
            self.close()
            raise _corrupt(self.path, error) from error
        except BaseException:
            self.close()
            raise
        self._reasons = _reasons(self.header)
        self._last_t: dict[str, int] = {}
        self.fast = True  # tests switch the fast path off to compare both paths

    def close(self) -> None:
        self._stream.close()
        self._raw.close()

    def __enter__(self) -> LogReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _read(self) -> bytes:
        try:
            return self._stream.read(self.chunk_bytes)
        except _CORRUPT as error:
            raise _corrupt(self.path, error) from error

    def blocks(self) -> Iterator[Block]:
        """Split the stream into blocks of whole lines, numbered (sequential, cheap)."""
        carry = self._first
        line_no = self.header_lines
        while True:
            block = self._read()
            data = carry + block if carry else block
            cut = data.rfind(b"\n")
            if cut < 0:
                carry = data
                if len(carry) > MAX_LINE_BYTES:  # memory stays bounded on garbage input
                    raise LogFormatError(str(self.path), line_no + 1, "line is longer than "
                                         f"{MAX_LINE_BYTES >> 20} MiB: not a frame log?")
            else:
                body, carry = data[: cut + 1], data[cut + 1:]
                newlines = body.count(b"\n")
                yield Block(body, line_no + 1, True, self._raw.tell(), newlines)
                line_no += newlines
            if not block:
                break
        if carry:
            yield Block(carry, line_no + 1, False, self._raw.tell())

    def parse(self, block: Block, strict: bool = False) -> Chunk:
        """Typed tables of one block. Thread-safe: blocks may be parsed in parallel, then
        passed to link() in order. LogFormatError on a fatal fault (a directive after a
        record) or, with ``strict``, on the block's first bad line."""
        if block.terminated and self.fast:
            chunk = self._chunk_fast(block.body, block.first_line, block.newlines)
            if chunk is not None:
                chunk.bytes_read = block.bytes_read
                return chunk
        chunk = self._chunk_exact(block.body, block.first_line, strict, block.terminated)
        chunk.bytes_read = block.bytes_read
        return chunk

    def link(self, chunk: Chunk) -> None:
        """Count backward time steps across the boundary with the previous chunk (call in
        line order)."""
        for bus, (t_ns, line) in chunk.bus_first.items():
            previous = self._last_t.get(bus)
            if previous is not None and t_ns < previous:
                chunk.backward_steps += 1
                if chunk.first_backward_line is None or line < chunk.first_backward_line:
                    chunk.first_backward_line = line
        self._last_t.update(chunk.bus_last)

    def chunks(self, strict: bool = False) -> Iterator[Chunk]:
        """Yield the records in chunks, in order (see parse() for the errors)."""
        for block in self.blocks():
            chunk = self.parse(block, strict)
            self.link(chunk)
            yield chunk

    def _lines(self, body: bytes, terminated: bool) -> pl.DataFrame:
        """Columns text, bad (reason the line is not UTF-8, else null)."""
        if terminated:
            body = body[:-1]
        elif not body:
            return pl.DataFrame(schema={"text": pl.String, "bad": pl.String})
        try:
            text = body.decode("utf-8")
        except UnicodeDecodeError:
            return self._lines_slow(body)
        lines = pl.Series("text", [text]).str.split("\n").explode()
        return pl.DataFrame({"text": lines.str.strip_suffix("\r")}).with_columns(
            bad=pl.lit(None, dtype=pl.String))

    @staticmethod
    def _lines_slow(body: bytes) -> pl.DataFrame:
        """Rare path: a chunk that is not valid UTF-8; Python over its lines to find them."""
        texts: list[str] = []
        bad: list[str | None] = []
        for raw in body.split(b"\n"):
            raw = raw.removesuffix(b"\r")
            try:
                texts.append(raw.decode("utf-8"))
                bad.append(None)
            except UnicodeDecodeError as error:
                texts.append(raw.decode("utf-8", errors="backslashreplace"))
                bad.append(f"not valid UTF-8 text (byte 0x{raw[error.start]:02X} at "
                           f"column {error.start + 1})")
        return pl.DataFrame({"text": texts, "bad": bad}, schema={"text": pl.String,
                                                                 "bad": pl.String})

    def _chunk_fast(self, body: bytes, first_line: int,
                    newlines: int | None = None) -> Chunk | None:
        """Parse with polars' CSV reader and accept the chunk only when every line is valid;
        None sends it to the exact path (which gives the same tables, and the rejects), as
        does any empty field (an empty mark text, a stray TAB); tests check that both paths
        give identical tables."""
        if b"\r" in body:
            return None
        try:
            rows = pl.read_csv(body, separator="\t", has_header=False, quote_char=None,
                               schema=_FAST_SCHEMA, truncate_ragged_lines=True,
                               missing_columns="insert")
        except (pl.exceptions.PolarsError, UnicodeDecodeError):
            return None
        n = body.count(b"\n") if newlines is None else newlines
        if rows.height != n:
            return None
        # The CSV reader reads an empty field as null, the same as a missing one (and drops
        # fields past the 9th). When the present fields account for every TAB of the chunk,
        # there is no empty or dropped field, and null means missing only.
        f = [pl.col(name) for name in _FAST_SCHEMA]
        rows = rows.with_columns(
            n_fields=pl.sum_horizontal(x.is_not_null() for x in f).cast(pl.UInt32))
        tabs_accounted = (rows["n_fields"].cast(pl.Int64) - 1).clip(lower_bound=0).sum()
        if int(tabs_accounted) != body.count(b"\t"):
            return None
        c = pl.col
        if not self.header.buses:
            return None
        bus_enum = pl.Enum([b.alias for b in self.header.buses])
        fd_codes = [i for i, b in enumerate(self.header.buses) if b.data_bps is not None]
        # form as an index into VALID_FORMS: s, sr, sf, sfb, sfe, sfbe, x, xr, ... (6 each)
        variant = c("form_code") % 6
        # the payload matters on frame lines only ('' on the others: no character data
        # under nulls for the table lookup); '-' is an empty one
        payload_text = rows.select(payload=pl.when(f[2] != "frame").then(pl.lit(""))
                                   .when(f[6] == NONE).then(pl.lit("")).otherwise(f[6])
                                   ).to_series()
        payload: pl.Series | pl.Expr | None = _decode_hex(payload_text)
        if payload is None:
            payload = pl.when(f[6] == NONE).then(pl.lit(b"")).otherwise(
                f[6].str.decode("hex", strict=False))
        rows = rows.with_columns(
            line=pl.int_range(first_line, first_line + n, dtype=pl.Int64),
            # to_integer takes an optional sign then digits only; refusing the signs here is
            # as strict as the exact path's regexes, at a third of the cost
            t_ns=pl.when(_unsigned(f[0])).then(f[0].str.to_integer(strict=False)),
            id=pl.when(_unsigned(f[3]) & (f[3].str.len_bytes() <= 8)).then(
                f[3].str.to_integer(base=16, strict=False)),
            payload=payload,
            # an Enum cast is a table lookup: the index of the form, or of the DLC text
            form_code=f[4].cast(_FORM_ENUM, strict=False).to_physical().cast(pl.Int16),
            dlc=f[5].cast(_DLC_ENUM, strict=False).to_physical().cast(pl.Int16),
            bus=f[1], bus_code=f[1].cast(bus_enum, strict=False).to_physical(),
            # an empty line (every field null) or a comment
            other=(pl.all_horizontal(x.is_null() for x in f)
                   | f[0].str.starts_with("#")).fill_null(False),
        ).with_columns(variant=variant).with_columns(
            ext=c("form_code") >= 6, rtr=c("variant") == 1, fd=c("variant") >= 2,
            brs=(c("variant") == 3) | (c("variant") == 5), esi=c("variant") >= 4,
        )
        payload_table = pl.lit(pl.Series(CLASSIC_PAYLOAD_BYTES + FD_PAYLOAD_BYTES, dtype=pl.Int64))
        need = pl.when(c("rtr")).then(0).otherwise(
            payload_table.gather(c("dlc") + 16 * c("fd").cast(pl.Int16)))
        frame_ok = (
            (f[2] == "frame") & c("t_ns").is_not_null() & c("bus_code").is_not_null()
            & c("id").is_not_null() & c("form_code").is_not_null() & f[7].is_null()
            & pl.when(c("ext")).then(c("id") <= MAX_EXTENDED_ID).otherwise(c("id") <= MAX_BASE_ID)
            & (c("payload").bin.size() == need) & (~c("brs") | c("bus_code").is_in(fd_codes))
        ).fill_null(False)
        ok_mask = rows.select(frame_ok).to_series()
        rest_mask = ~ok_mask & ~rows["other"]
        n_ok, n_rest = int(ok_mask.sum()), int(rest_mask.sum())
        rest = rows.filter(rest_mask) if n_rest else rows.clear()
        # other kinds and odd-but-valid frames: the exact checks, on the few rows
        if n_rest and rest.select(self._reasons.is_not_null().any()).item():
            return None
        frames = rows.select(
            "bus", "t_ns", c("id").cast(pl.UInt32), "ext", "rtr", "fd", "brs", "esi",
            c("dlc").cast(pl.UInt8), c("payload").alias("data"), "line")
        if n_ok < n:
            frames = frames.filter(ok_mask)
        if n_rest:
            extra = self._frames(rest)
            if extra.height:
                frames = pl.concat([frames, extra]).sort("line")
            timed = rows.select("bus", "t_ns", "line").filter(ok_mask | rest_mask)
        else:
            timed = frames.select("bus", "t_ns", "line")
        chunk = Chunk(
            frames=frames, errors=self._errors(rest), status=self._status(rest),
            marks=self._marks(rest), losses=self._losses(rest),
            rejects=pl.DataFrame(schema={"line": pl.Int64, "raw": pl.String,
                                         "reason": pl.String}),
            lines=n, other_lines=n - n_ok - n_rest)
        self._time_steps(timed, chunk)
        return chunk

    def _chunk_exact(self, body: bytes, first_line: int, strict: bool,
                     terminated: bool) -> Chunk:
        frame = self._lines(body, terminated)
        n = frame.height
        frame = frame.with_columns(line=pl.int_range(first_line, first_line + n, dtype=pl.Int64))
        text = pl.col("text")
        other = text.str.starts_with("#") | text.str.contains(r"^[ \t]*$")
        other = other & pl.col("bad").is_null()
        records = frame.filter(~other)
        other_lines = n - records.height
        directives = records.filter(text.str.starts_with("%") & pl.col("bad").is_null())
        records = records.with_columns(
            text.str.split_exact("\t", _MAX_FIELDS).struct.unnest(),
            n_fields=text.str.count_matches("\t", literal=True) + 1,
        )
        reason = pl.when(pl.col("bad").is_not_null()).then(pl.col("bad")).otherwise(self._reasons)
        if not terminated:
            reason = pl.format("truncated final line (no line end; the logger may have lost "
                               "power): {}", reason.fill_null("the line is incomplete"))
        records = records.with_columns(reason=reason)
        bad = records.filter(pl.col("reason").is_not_null())
        first_directive = directives["line"][0] if directives.height else None
        if strict and bad.height and (first_directive is None or bad["line"][0] < first_directive):
            rejects = _suggest(bad.select("line", raw="text", reason="reason"), self.header)
            raise LogFormatError(str(self.path), rejects["line"][0], rejects["reason"][0])
        if first_directive is not None:
            word = directives["text"][0].split()[0]
            raise LogFormatError(str(self.path), first_directive,
                                 f"directive '{word}' after the first record: directives "
                                 "belong before the records")
        rejects = _suggest(bad.select("line", raw="text", reason="reason"), self.header)
        good = records.filter(pl.col("reason").is_null()).with_columns(
            t_ns=pl.col("field_0").str.to_integer(), bus=pl.col("field_1"))
        chunk = Chunk(
            frames=self._frames(good), errors=self._errors(good), status=self._status(good),
            marks=self._marks(good), losses=self._losses(good), rejects=rejects, lines=n,
            other_lines=other_lines)
        self._time_steps(good, chunk)
        return chunk

    def _time_steps(self, good: pl.DataFrame, chunk: Chunk) -> None:
        """Backward time steps per bus within the chunk, and each bus's first and last time
        for link() ('*' marks are not counted). ``good``: bus, t_ns, line in line order."""
        if good.height == 0:
            return
        chunk.first_t_ns = good["t_ns"].min()  # type: ignore[assignment]
        chunk.last_t_ns = good["t_ns"].max()  # type: ignore[assignment]
        t_ns, lines = good["t_ns"].to_numpy(), good["line"].to_numpy()
        firsts: list[int] = []
        for decl in self.header.buses:  # a loop over the few buses, numpy within each
            mask = (good["bus"] == decl.alias).to_numpy()
            t_bus = t_ns[mask]
            if t_bus.size == 0:
                continue
            lines_bus = lines[mask]
            back = np.flatnonzero(t_bus[1:] < t_bus[:-1]) + 1
            chunk.backward_steps += back.size
            if back.size:
                firsts.append(int(lines_bus[back[0]]))
            chunk.bus_first[decl.alias] = (int(t_bus[0]), int(lines_bus[0]))
            chunk.bus_last[decl.alias] = int(t_bus[-1])
        chunk.first_backward_line = min(firsts) if firsts else None

    @staticmethod
    def _frames(good: pl.DataFrame) -> pl.DataFrame:
        rows = good.filter(pl.col("field_2") == "frame")
        form, data = pl.col("field_4"), pl.col("field_6")
        return rows.select(
            "bus", "t_ns",
            id=pl.col("field_3").str.to_integer(base=16).cast(pl.UInt32),
            ext=form.str.starts_with("x"),
            rtr=form.str.contains("r", literal=True),
            fd=form.str.contains("f", literal=True),
            brs=form.str.contains("b", literal=True),
            esi=form.str.contains("e", literal=True),
            dlc=pl.col("field_5").str.to_integer().cast(pl.UInt8),
            data=pl.when(data == NONE).then(pl.lit(b"")).otherwise(data.str.decode("hex")),
            line="line",
        )

    @staticmethod
    def _errors(good: pl.DataFrame) -> pl.DataFrame:
        rows = good.filter(pl.col("field_2") == "error")
        ident, form, by = pl.col("field_5"), pl.col("field_6"), pl.col("field_7")
        return rows.select(
            "bus", "t_ns", type="field_3", field="field_4",
            id=pl.when(ident != NONE).then(
                ident.str.to_integer(base=16, strict=False)).cast(pl.UInt32),
            ext=pl.when(form != NONE).then(form.str.starts_with("x")),
            form=pl.when(form != NONE).then(form),
            by=pl.when(by != NONE).then(by),
            line="line",
        )

    @staticmethod
    def _status(good: pl.DataFrame) -> pl.DataFrame:
        rows = good.filter(pl.col("field_2") == "status")
        return rows.select(
            "bus", "t_ns", node="field_3",
            tec=pl.col("field_4").str.to_integer().cast(pl.Int32),
            rec=pl.col("field_5").str.to_integer().cast(pl.Int32), line="line")

    @staticmethod
    def _marks(good: pl.DataFrame) -> pl.DataFrame:
        rows = good.filter(pl.col("field_2") == "mark")
        return rows.select("bus", "t_ns", text="field_3", line="line")

    @staticmethod
    def _losses(good: pl.DataFrame) -> pl.DataFrame:
        rows = good.filter(pl.col("field_2") == "loss")
        count = pl.col("field_3")
        return rows.select(
            "bus", "t_ns",
            count=pl.when(count != NONE).then(count.str.to_integer(strict=False)),
            until_ns=pl.col("field_4").str.to_integer(), line="line")


@dataclass
class LogTables:
    """A whole (small) log in memory: header and the concatenated chunk tables."""

    header: LogHeader
    frames: pl.DataFrame
    errors: pl.DataFrame
    status: pl.DataFrame
    marks: pl.DataFrame
    losses: pl.DataFrame
    rejects: pl.DataFrame
    lines: int = 0
    header_lines: int = 0
    other_lines: int = 0
    backward_steps: int = 0


def read_log(path: str | Path, strict: bool = False, fast: bool = True) -> LogTables:
    """Read a whole log into memory (tests, small logs); ingest streams chunks instead."""
    with LogReader(path) as reader:
        reader.fast = fast
        chunks = list(reader.chunks(strict=strict))
        tables = {name: pl.concat([getattr(c, name) for c in chunks]) if chunks else None
                  for name in ("frames", "errors", "status", "marks", "losses", "rejects")}
        if not chunks:
            empty = reader.parse(Block(b"", reader.header_lines + 1, False, 0))
            tables = {name: getattr(empty, name) for name in tables}
        return LogTables(
            header=reader.header, header_lines=reader.header_lines,
            lines=reader.header_lines + sum(c.lines for c in chunks),
            other_lines=sum(c.other_lines for c in chunks),
            backward_steps=sum(c.backward_steps for c in chunks),
            **tables,  # type: ignore[arg-type]
        )
