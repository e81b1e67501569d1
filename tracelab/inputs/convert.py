"""``tracelab convert``: delimited frame tables (CSV, TSV, any delimiter) -> frame-log format v1.

The table is read in blocks of whole lines (gzip / zstd recognised by their first bytes), so
memory stays bounded for any size. Each block is split and checked with polars expressions,
never row by row; every line ends up converted, skipped (the header row, blank lines) or
rejected with ``FILE:LINE: reason``, as ingest accounts for a log. Frame lines are built as
whole columns and are byte for byte what ``tracelab.format.frame_line()`` writes.

Rules (docs/convert.md):
- times: decimal numbers in ``time_unit``; a value of at least 10**9 s (2001-09-09) is an epoch
  time: the first one becomes ``%origin`` (or ``--origin`` does) and records count from it;
  smaller values are relative and are written as they are (``--origin`` then only names t=0).
- identifiers: hex (``0x`` prefix allowed) or decimal with ``id_base=10``; without an ``ext``
  column an identifier above 7FF, or written with more than 3 hex digits, is extended.
- data: hex bytes with or without separators (space, ``-``, ``:``, ``.``); empty or ``-`` is
  no data. Without a ``fd`` column a payload over 8 bytes is CAN FD; without ``dlc`` the DLC
  follows from the payload length (ISO 11898-1:2015, Table 5).
"""

from __future__ import annotations

import io
import os
import re
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO

import numpy as np
import polars as pl
import pyarrow as pa

from tracelab.errors import LogFormatError, StorageError, UsageError, did_you_mean
from tracelab.format.compression import open_log, open_log_for_writing
from tracelab.format.grammar import (
    FD_PAYLOAD_BYTES,
    MAX_BASE_ID,
    MAX_EXTENDED_ID,
    ORIGIN_RE,
    form_letters,
    wall_time,
)
from tracelab.format.writer import BusDecl, LogHeader
from tracelab.inputs.options import BusOption
from tracelab.progress import progress

ROLES = ("time", "id", "data", "ext", "dlc", "rtr", "fd", "brs", "esi", "bus")
REQUIRED_ROLES = ("time", "id", "data")
FLAG_ROLES = ("ext", "rtr", "fd", "brs", "esi")
TIME_UNIT_EXPONENT = {"s": 9, "ms": 6, "us": 3, "ns": 0}
#: Times at or above this many ns (10**9 s, 2001-09-09T01:46:40Z) are epoch times.
EPOCH_THRESHOLD_NS = 10**18
EPOCH = "1970-01-01T00:00:00Z"
BLOCK_BYTES = 2 << 20  # smaller blocks: less page-fault time and a lower peak RSS
SHOWN_REJECTS = 5
_TRUE = ("1", "true", "t", "yes", "y", "on")
_FALSE = ("0", "false", "f", "no", "n", "off", "")
#: Words some tables use for a flag beside 1/0 and true/false (lower case).
_FLAG_WORDS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "ext": (("x", "ext", "extended", "eff"), ("s", "std", "standard", "sff")),
    "rtr": (("r", "rtr", "remote"), ("d", "data")),
    "fd": (("fd", "canfd"), ("classic", "can", "cc")),
    "brs": (("brs",), ()), "esi": (("esi",), ()),
}
_FD_DLC = {n: dlc for dlc, n in enumerate(FD_PAYLOAD_BYTES)}
#: ext*16 + rtr*8 + fd*4 + brs*2 + esi -> the format's form letters (checked rows only).
_FORMS = {e * 16 + r * 8 + f * 4 + b * 2 + i: form_letters(bool(e), bool(r), bool(f), bool(b),
                                                           bool(i))
          for e in (0, 1) for r in (0, 1) for f in (0, 1) for b in (0, 1) for i in (0, 1)}
_HEX_CHARS = np.frombuffer(b"0123456789ABCDEF", dtype=np.uint8)


@dataclass(frozen=True)
class ConvertOptions:
    """Everything ``convert`` needs besides the paths; built and checked by the CLI layer."""

    buses: tuple[BusOption, ...]
    columns: dict[str, str]
    time_unit: str = "s"
    origin: str | None = None
    delimiter: str = ","
    id_base: int = 16
    header: bool = True
    strict: bool = False
    meta: dict[str, str] = field(default_factory=dict)


@dataclass
class TableSummary:
    path: str
    lines: int = 0
    converted: int = 0
    skipped: int = 0
    rejected: int = 0
    first_rejects: list[tuple[int, str]] = field(default_factory=list)

    def reconciliation(self) -> str:
        return (f"{self.path}: {self.lines:,} lines = {self.converted:,} converted + "
                f"{self.skipped:,} skipped (header, blank) + {self.rejected:,} rejected")


@dataclass
class ConvertSummary:
    output: Path
    tables: list[TableSummary] = field(default_factory=list)
    origin: str | None = None

    @property
    def frames(self) -> int:
        return sum(t.converted for t in self.tables)

    @property
    def rejected(self) -> int:
        return sum(t.rejected for t in self.tables)

    def describe(self) -> str:
        out = [f"converted {self.frames:,} frame(s) from {len(self.tables)} table(s) into "
               f"{self.output}" + (f" (origin {self.origin})" if self.origin else "")]
        out += [t.reconciliation() for t in self.tables]
        if self.rejected:
            first = [f"{t.path}:{line}: {reason}" for t in self.tables
                     for line, reason in t.first_rejects][:SHOWN_REJECTS]
            out.append(f"{self.rejected:,} row(s) rejected; first: " + " | ".join(first))
        return "\n".join(out)


def parse_columns(text: str) -> dict[str, str]:
    """``"time=1,id=ID,data=5"`` -> ``{"time": "1", "id": "ID", "data": "5"}``."""
    columns: dict[str, str] = {}
    for item in (part.strip() for part in text.split(",") if part.strip()):
        role, sep, column = item.partition("=")
        role = role.strip().lower()
        if not sep or not column.strip():
            raise UsageError(f"--columns: {item!r} must be ROLE=COLUMN")
        if role not in ROLES:
            raise UsageError(f"--columns: unknown role {role!r}{did_you_mean(role, ROLES)} "
                             f"(roles: {', '.join(ROLES)})")
        if role in columns:
            raise UsageError(f"--columns: {role}= given twice")
        columns[role] = column.strip()
    missing = [r for r in REQUIRED_ROLES if r not in columns]
    if missing:
        raise UsageError(f"--columns: {', '.join(r + '=' for r in missing)} missing "
                         "(time, id and data are required)")
    return columns


def origin_epoch_ns(origin: str) -> int:
    """ISO ``2026-11-30T21:04:05.25Z`` -> ns since 1970 (UTC)."""
    import datetime as dt

    match = ORIGIN_RE.match(origin)
    if not match:
        raise UsageError(f"--origin {origin!r}: write UTC as YYYY-MM-DDTHH:MM:SS[.fraction]Z")
    base = dt.datetime.strptime(match.group(1), "%Y-%m-%dT%H:%M:%S").replace(tzinfo=dt.UTC)
    return int(base.timestamp()) * 10**9 + int((match.group(2) or "0").ljust(9, "0"))


# --- reading: blocks of whole lines ---------------------------------------------------------


def _blocks(stream: BinaryIO, block_bytes: int) -> Iterator[bytes]:
    """Blocks ending at a line end (the last one may lack it)."""
    rest = b""
    while True:
        data = stream.read(block_bytes)
        if not data:
            if rest:
                yield rest
            return
        data = rest + data
        cut = data.rfind(b"\n")
        if cut < 0:
            rest = data
            continue
        rest = data[cut + 1:]
        yield data[: cut + 1]


def _lines(block: bytes) -> pl.DataFrame:
    """Columns text (line without its line end), bad (why it is not text, else null)."""
    body = block[:-1] if block.endswith(b"\n") else block
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError:
        texts: list[str] = []
        bad: list[str | None] = []
        # rare path: a block that is not valid UTF-8; Python over its lines to name them
        for raw in body.split(b"\n"):
            try:
                texts.append(raw.decode("utf-8").removesuffix("\r"))
                bad.append(None)
            except UnicodeDecodeError as error:
                texts.append("")
                bad.append(f"not valid UTF-8 text (byte 0x{raw[error.start]:02X} at column "
                           f"{error.start + 1})")
        return pl.DataFrame({"text": texts, "bad": bad},
                            schema={"text": pl.String, "bad": pl.String})
    lines = pl.Series("text", [text]).str.split("\n").explode().str.strip_suffix("\r")
    return pl.DataFrame({"text": lines}).with_columns(bad=pl.lit(None, dtype=pl.String))


def _split_fields(text: str, delimiter: str) -> list[str]:
    import csv

    return next(csv.reader([text], delimiter=delimiter), [])


def _fields(lines: pl.DataFrame, delimiter: str, needed: int) -> pl.DataFrame:
    """Columns line, bad, n_fields and f0 .. f{needed-1} (stripped of spaces). Lines holding
    a double quote are split by the csv module instead (quoted values may hold the
    delimiter); only those lines loop in Python, tables without quotes never do."""
    names = [f"f{i}" for i in range(needed)]
    quoted = lines["text"].str.contains('"', literal=True)
    plain = lines.filter(~quoted) if quoted.any() else lines
    parts = pl.col("text").str.split_exact(delimiter, max(needed - 1, 0))
    spaced = bool(plain["text"].str.contains(" ", literal=True).any())
    out = plain.select(
        "line", "bad",
        n_fields=pl.col("text").str.count_matches(delimiter, literal=True) + 1,
        **{name: (parts.struct.field(f"field_{i}").str.strip_chars(" ") if spaced
                  else parts.struct.field(f"field_{i}")) for i, name in enumerate(names)})
    if plain is lines:
        return out
    rows = [_split_fields(t, delimiter) for t in lines.filter(quoted)["text"].to_list()]
    extra = pl.DataFrame(
        {"line": lines.filter(quoted)["line"], "bad": lines.filter(quoted)["bad"],
         "n_fields": pl.Series([len(r) for r in rows], dtype=pl.UInt32),
         **{name: pl.Series([r[i].strip(" ") if i < len(r) else None for r in rows],
                            dtype=pl.String) for i, name in enumerate(names)}})
    return pl.concat([out, extra.cast(out.schema)]).sort("line")


def _resolve_columns(path: Path, header: list[str] | None,
                     columns: dict[str, str]) -> dict[str, int]:
    """Role -> 0-based field index, by header name (exact, then case-insensitive) or by a
    1-based number."""
    index: dict[str, int] = {}
    names = [h.strip() for h in header] if header is not None else None
    for role, column in columns.items():
        if names is not None and column in names:
            index[role] = names.index(column)
        elif names is not None and column.lower() in (low := [n.lower() for n in names]):
            index[role] = low.index(column.lower())
        elif column.isdigit() and int(column) >= 1:
            index[role] = int(column) - 1
        elif names is None:
            raise UsageError(f"--columns {role}={column}: without a header row columns are "
                             "1-based numbers")
        else:
            raise UsageError(f"{path}: no column {column!r} for {role}="
                             f"{did_you_mean(column, names)} (header: {', '.join(names)})")
    return index


# --- checking and building records -----------------------------------------------------------


def _flag(role: str, column: str) -> pl.Expr:
    """The flag's value, or null when the text is no flag word (lower, upper or title case)."""
    words_true, words_false = _FLAG_WORDS[role]
    mapping: dict[str, bool] = {}
    for words, value in ((_TRUE + words_true, True), (_FALSE + words_false, False)):
        for word in words:
            mapping.update({word: value, word.upper(): value, word.title(): value})
    return pl.col(column).replace_strict(mapping, default=None, return_dtype=pl.Boolean)


def _time_ns(text: pl.Expr, exponent: int) -> tuple[pl.Expr, pl.Expr]:
    """Exact decimal -> integer ns through polars' Decimal (digits past 1 ns are dropped;
    ``1.5e3`` is read as 1500); (value, is valid: parsed, fits 64 bits, not negative)."""
    value = (text.cast(pl.Decimal(38, exponent), strict=False) * 10**exponent).cast(
        pl.Int64, strict=False)
    return value, value.is_not_null() & (value >= 0)


#: Character classes for payload text: 1 hex digit, 2 separator, 0 anything else.
_PAYLOAD_CLASS = np.zeros(256, dtype=np.uint8)
_PAYLOAD_CLASS[np.frombuffer(b"0123456789abcdefABCDEF", dtype=np.uint8)] = 1
_PAYLOAD_CLASS[np.frombuffer(b" \t,:.-", dtype=np.uint8)] = 2
_SEPARATORS = r"[ \t,:.\-]"


def _string_buffers(series: pl.Series) -> tuple[np.ndarray, np.ndarray]:
    """(offsets relative to the first value, character bytes) of a string column."""
    arr = series.to_arrow(compat_level=pl.CompatLevel.oldest())
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    arr = arr.cast(pa.large_string())
    _, offsets_buf, data_buf = arr.buffers()
    offsets = np.frombuffer(offsets_buf, dtype=np.int64)[arr.offset: arr.offset + len(arr) + 1]
    data = (np.frombuffer(data_buf, dtype=np.uint8)[offsets[0]: offsets[-1]]
            if data_buf is not None else np.zeros(0, dtype=np.uint8))
    return offsets - offsets[0], data


def payload_hex(data: pl.Series) -> tuple[pl.Series, pl.Series]:
    """(upper-case hex without separators, bytes or null when not hex bytes) for payload text,
    by a character-class lookup over the column's buffer; the regex that removes separators,
    the per-row search for bad characters and the upper-casing run only on columns that need
    them."""
    if data.null_count():
        data = data.fill_null("\x00")  # a missing field is not hex (its row is rejected anyway)
    offsets, chars = _string_buffers(data)
    classes = np.take(_PAYLOAD_CLASS, chars)
    if (classes == 2).any():
        data = data.str.replace_all(_SEPARATORS, "")
        offsets, chars = _string_buffers(data)
        classes = np.take(_PAYLOAD_CLASS, chars)
    lengths = np.diff(offsets)
    ok = lengths % 2 == 0
    if (classes != 1).any():
        bad = np.concatenate([[0], np.cumsum(classes != 1)])
        ok &= (bad[offsets[1:]] - bad[offsets[:-1]]) == 0
    n_bytes = pl.Series("n_bytes", lengths // 2)
    if not ok.all():
        n_bytes = n_bytes.set(pl.Series(~ok), None)  # type: ignore[arg-type]
    if (chars >= ord("a")).any():
        data = data.str.to_uppercase()
    return data, n_bytes


def _checked(rows: pl.DataFrame, idx: dict[str, int], opts: ConvertOptions,
             buses: dict[str, tuple[str, bool]], origin_ns: int | None,
             epoch: bool) -> pl.DataFrame:
    """Columns line, reason (null when the row converts), t_ns, alias, id, ext, rtr, fd, brs,
    esi, dlc, data (upper-case hex or '-'). Parsed once in stages, then the first failing
    rule (in the order of the list below) gives the reason."""
    col = {role: f"f{i}" for role, i in idx.items()}
    needed = max(idx.values()) + 1
    exponent = TIME_UNIT_EXPONENT[opts.time_unit]
    t_abs, _ = _time_ns(pl.col(col["time"]), exponent)
    if opts.id_base == 16:
        digits = pl.col(col["id"]).str.strip_prefix("0x").str.strip_prefix("0X")
        stage = rows.with_columns(t_abs=t_abs, digits=digits)
        stage = stage.with_columns(ident=pl.col("digits").str.to_integer(base=16, strict=False),
                                   n_digits=pl.col("digits").str.len_bytes())
        stage = stage.with_columns(id_ok=pl.col("ident").is_not_null() & (pl.col("n_digits") <= 8),
                                   wide=pl.col("n_digits") > 3)
    else:
        stage = rows.with_columns(t_abs=t_abs,
                                  ident=pl.col(col["id"]).cast(pl.Int64, strict=False))
        stage = stage.with_columns(id_ok=pl.col("ident").is_not_null(), wide=pl.lit(False))
    hexdata, n_bytes_series = payload_hex(rows[col["data"]])
    stage = stage.with_columns(
        t_ok=pl.col("t_abs").is_not_null() & (pl.col("t_abs") >= 0),
        hexdata=hexdata, n_bytes=n_bytes_series.cast(pl.Int64),
        **{f"p_{role}": _flag(role, col[role]) for role in FLAG_ROLES if role in idx})
    ext = pl.col("p_ext") if "ext" in idx else (pl.col("ident") > MAX_BASE_ID) | pl.col("wide")
    rtr = pl.col("p_rtr") if "rtr" in idx else pl.lit(False)
    fd = pl.col("p_fd") if "fd" in idx else pl.col("n_bytes") > 8
    brs = pl.col("p_brs") if "brs" in idx else pl.lit(False)
    esi = pl.col("p_esi") if "esi" in idx else pl.lit(False)
    if "bus" in idx:
        alias = pl.col(col["bus"]).replace_strict({k: a for k, (a, _) in buses.items()},
                                                  default=None, return_dtype=pl.String)
    else:
        alias = pl.lit(next(iter(buses.values()))[0])
    fd_dlc = pl.col("n_bytes").replace_strict(_FD_DLC, default=None, return_dtype=pl.Int64)
    if "dlc" in idx:
        dlc = pl.col(col["dlc"]).cast(pl.Int64, strict=False)
    else:
        dlc = pl.when(pl.col("rtr")).then(0).when(pl.col("fd")).then(fd_dlc).otherwise(
            pl.col("n_bytes"))
    t_ns = pl.col("t_abs") - origin_ns if (epoch and origin_ns is not None) else pl.col("t_abs")
    stage = stage.with_columns(ext=ext, rtr=rtr, fd=fd, brs=brs, esi=esi, alias=alias,
                               t_ns=t_ns)
    stage = stage.with_columns(dlc=dlc)

    def text(role: str) -> pl.Expr:
        return pl.col(col[role]).fill_null("")

    n_bytes = pl.col("n_bytes")
    reasons: list[tuple[pl.Expr, pl.Expr]] = [
        (pl.col("bad").is_not_null(), pl.col("bad")),
        (pl.col("n_fields") < needed,
         pl.format(f"row has {{}} field(s); the columns asked for need {needed} (delimiter "
                   f"{opts.delimiter!r})", pl.col("n_fields"))),
        (~pl.col("t_ok"), pl.format("time '{}' is not a non-negative decimal number",
                                    text("time"))),
    ]
    if epoch and origin_ns is not None:
        reasons.append((pl.col("t_ns") < 0, pl.format("time '{}' is before the origin",
                                                      text("time"))))
    reasons += [
        (~pl.col("id_ok"), pl.format(
            "id '{}' is not " + ("1-8 hex digits" if opts.id_base == 16 else "a decimal number"),
            text("id"))),
        (pl.col("ident") > MAX_EXTENDED_ID, pl.format(
            "id '{}' is out of range for a 29-bit identifier (max 1FFFFFFF)", text("id"))),
    ]
    for role in FLAG_ROLES:
        if role in idx:
            reasons.append((pl.col(f"p_{role}").is_null(), pl.format(
                f"{role} value '{{}}' is not a flag (1/0, true/false, yes/no)", text(role))))
    reasons += [
        (~pl.col("ext") & (pl.col("ident") > MAX_BASE_ID), pl.format(
            "id '{}' is out of range for an 11-bit identifier (max 7FF)", text("id"))),
        (n_bytes.is_null(), pl.format("data '{}' is not hex bytes", text("data"))),
        (pl.col("rtr") & pl.col("fd"),
         pl.lit("a remote frame is classic only (rtr and fd both set)")),
        (pl.col("rtr") & (n_bytes > 0), pl.lit("a remote frame carries no data")),
        ((pl.col("brs") | pl.col("esi")) & ~pl.col("fd"),
         pl.lit("brs / esi are set on a classic frame")),
        (~pl.col("fd") & (n_bytes > 8), pl.format(
            "data has {} bytes; a classic frame carries at most 8 (set the fd column?)",
            n_bytes)),
        (pl.col("fd") & ~n_bytes.is_in(list(_FD_DLC)), pl.format(
            "data has {} bytes, not a CAN FD payload length (0-8, 12, 16, 20, 24, 32, 48, 64)",
            n_bytes)),
    ]
    if "dlc" in idx:
        expected = (pl.when(pl.col("rtr")).then(0)
                    .when(pl.col("fd")).then(pl.col("dlc").replace_strict(
                        dict(enumerate(FD_PAYLOAD_BYTES)), default=None,
                        return_dtype=pl.Int64))
                    .otherwise(pl.min_horizontal(pl.col("dlc"), pl.lit(8))))
        reasons += [
            (pl.col("dlc").is_null() | (pl.col("dlc") > 15) | (pl.col("dlc") < 0),
             pl.format("dlc '{}' is not 0-15", text("dlc"))),
            (expected != n_bytes, pl.format("data has {} bytes, DLC {} needs {}", n_bytes,
                                            pl.col("dlc"), expected)),
        ]
    if "bus" in idx:
        reasons.append((pl.col("alias").is_null(), pl.format(
            f"unknown bus '{{}}' (declared: {', '.join(sorted(buses))})", text("bus"))))
    fd_buses = sorted({a for a, has_data in buses.values() if has_data})
    reasons.append((pl.col("brs") & ~pl.col("alias").is_in(fd_buses), pl.format(
        "bit-rate switch on bus '{}', which declares no data= bit rate", pl.col("alias"))))

    any_failed = pl.any_horizontal([failed.fill_null(True) for failed, _ in reasons])
    stage = stage.with_columns(failed=any_failed)
    reason: pl.Expr = pl.lit(None, dtype=pl.String)
    if stage["failed"].any():  # the chain is built only when some row fails
        for failed, why in reversed(reasons):
            reason = (pl.when(failed.fill_null(True))
                      .then(why.fill_null(pl.lit("malformed row"))).otherwise(reason))
    return stage.select(
        "line", reason.alias("reason"), "t_ns", "alias",
        pl.col("ident").cast(pl.UInt32, strict=False).alias("id"), "ext", "rtr", "fd", "brs",
        "esi", "dlc",
        pl.when(n_bytes > 0).then(pl.col("hexdata")).otherwise(pl.lit("-")).alias("data"))


def _hex_ids(ids: np.ndarray, ext: np.ndarray) -> pl.Series:
    """Identifiers as the format writes them (8 upper-case hex digits extended, 3 base), by a
    nibble lookup over the whole column."""
    shifts = np.arange(28, -4, -4, dtype=np.uint32)
    chars = _HEX_CHARS[(ids[:, None] >> shifts) & 0xF]  # (n, 8) ASCII
    keep = np.ones(chars.shape, dtype=bool)
    keep[~ext, :5] = False
    widths = np.where(ext, 8, 3).astype(np.int64)
    offsets = np.zeros(len(ids) + 1, dtype=np.int64)
    np.cumsum(widths, out=offsets[1:])
    data = np.ascontiguousarray(chars[keep])
    arr = pa.LargeStringArray.from_buffers(len(ids), pa.py_buffer(offsets), pa.py_buffer(data))
    return pl.Series("id_text", arr)


def frame_lines(good: pl.DataFrame) -> pl.Series:
    """Format v1 ``frame`` lines for checked rows; identical to ``format.frame_line()``."""
    ids = _hex_ids(good["id"].to_numpy().astype(np.uint32),
                   good["ext"].to_numpy().astype(bool))
    code = (pl.col("ext").cast(pl.UInt8) * 16 + pl.col("rtr").cast(pl.UInt8) * 8
            + pl.col("fd").cast(pl.UInt8) * 4 + pl.col("brs").cast(pl.UInt8) * 2
            + pl.col("esi").cast(pl.UInt8))
    form = code.replace_strict(_FORMS, return_dtype=pl.String)
    return good.with_columns(id_text=ids).select(pl.concat_str(
        pl.col("t_ns").cast(pl.String), "alias", pl.lit("frame"), "id_text", form,
        pl.col("dlc").cast(pl.String), "data", separator="\t").alias("line"))["line"]


# --- the job ---------------------------------------------------------------------------------


class _Output:
    """The log being written: created at the first block (when the origin is known), in a
    temporary file renamed into place at the end; removed on failure."""

    def __init__(self, path: Path, buses: list[BusDecl], meta: dict[str, str]) -> None:
        self.path = path
        self.tmp = path.with_name(f".{path.stem}.partial{path.suffix}")
        self.buses, self.meta = buses, meta
        self.out: BinaryIO | None = None

    def _failed(self, error: OSError) -> StorageError:
        return StorageError(f"{self.path}: cannot write the log ({error.strerror or error})")

    def open(self, origin: str | None) -> None:
        header = LogHeader(buses=self.buses, origin=origin, meta=self.meta)
        try:
            self.out = open_log_for_writing(self.tmp)
            self.out.write(("\n".join(header.lines()) + "\n").encode("utf-8"))
        except OSError as error:
            raise self._failed(error) from error

    def write(self, lines: pl.Series) -> None:
        assert self.out is not None
        if len(lines):
            buffer = io.BytesIO()
            lines.to_frame().write_csv(buffer, include_header=False, quote_style="never")
            try:
                self.out.write(buffer.getbuffer())
            except OSError as error:
                raise self._failed(error) from error

    def commit(self) -> None:
        assert self.out is not None
        try:
            self.out.close()
            os.replace(self.tmp, self.path)
        except OSError as error:
            raise self._failed(error) from error

    def discard(self) -> None:
        if self.out is not None:
            self.out.close()
        self.tmp.unlink(missing_ok=True)


def convert_tables(tables: list[Path], output: Path, opts: ConvertOptions,
                   quiet: bool = False, block_bytes: int = BLOCK_BYTES) -> ConvertSummary:
    """Convert ``tables`` (in order) into one format v1 log at ``output``."""
    for table in tables:
        if not table.is_file():
            raise UsageError(f"{table}: no such file")
    if not output.parent.is_dir():
        raise UsageError(f"output directory {output.parent} does not exist")
    if not opts.buses:
        raise UsageError("--bus ALIAS,nominal=BITS_PER_S is required")
    if len(opts.delimiter) != 1:
        raise UsageError(f"--delimiter {opts.delimiter!r} must be one character")
    if opts.time_unit not in TIME_UNIT_EXPONENT:
        raise UsageError(f"--time-unit {opts.time_unit!r}: use s, ms, us or ns")
    if opts.id_base not in (10, 16):
        raise UsageError("--id-base must be 16 or 10")
    decls: dict[str, BusDecl] = {}
    keys: dict[str, tuple[str, bool]] = {}
    for bus in opts.buses:
        if bus.nominal_bps is None:
            raise UsageError(f"--bus {bus.alias}: nominal= is required")
        if bus.alias in decls:
            raise UsageError(f"--bus {bus.alias}: declared twice")
        decls[bus.alias] = BusDecl(bus.alias, bus.nominal_bps, bus.data_bps)
        keys[bus.alias] = (bus.alias, bus.data_bps is not None)
        if bus.key is not None:
            keys[bus.key] = (bus.alias, bus.data_bps is not None)
    if len(decls) > 1 and "bus" not in opts.columns:
        raise UsageError("several --bus options need a bus= column to tell the buses apart")
    given_origin = origin_epoch_ns(opts.origin) if opts.origin else None

    output_log = _Output(output, list(decls.values()), dict(opts.meta))
    summary = ConvertSummary(output=output)
    state: dict[str, int | bool | None] = {"epoch": None, "origin": given_origin}
    try:
        total = sum(t.stat().st_size for t in tables)
        with progress("convert", total=total, quiet=quiet) as advance:
            for table in tables:
                summary.tables.append(_convert_one(table, opts, keys, output_log, state,
                                                   advance, block_bytes))
        if output_log.out is None:
            output_log.open(opts.origin)
        output_log.commit()
    except BaseException:
        output_log.discard()
        raise
    origin = state["origin"]
    if state["epoch"] and isinstance(origin, int):
        summary.origin = wall_time(EPOCH, origin)
    else:
        summary.origin = opts.origin
    return summary


def _line_count(block: bytes) -> int:
    return block.count(b"\n") + (1 if block and not block.endswith(b"\n") else 0)


_NOT_BLANK = re.compile(rb"[^ \t\r\n]")


def _header_in(block: bytes, delimiter: str) -> tuple[list[str], int, bytes] | None:
    """(header fields, lines up to and including the header, the rest of the block), or None
    when the block holds only blank lines."""
    found = _NOT_BLANK.search(block)
    if found is None:
        return None
    start = block.rfind(b"\n", 0, found.start()) + 1
    end = block.find(b"\n", found.start())
    end = len(block) if end < 0 else end
    text = block[start:end].decode("utf-8", errors="replace").removesuffix("\r")
    return _split_fields(text, delimiter), block.count(b"\n", 0, start) + 1, block[end + 1:]


def _rows_fast(block: bytes, first_line: int, delimiter: str, needed: int,
               n_block_lines: int) -> tuple[pl.DataFrame, int] | None:
    """(rows as _fields gives them, blank lines skipped) by polars' CSV reader, for blocks
    without quotes; None sends the block to the general path (quotes, bad UTF-8, or a row
    count that does not match the line count)."""
    if b'"' in block:
        return None
    try:
        block.decode("utf-8")
    except UnicodeDecodeError:
        return None
    body = block.replace(b"\r\n", b"\n") if b"\r" in block else block
    n_lines = _line_count(body) if body is not block else n_block_lines
    names = [f"f{i}" for i in range(needed)]
    try:
        rows = pl.read_csv(body, has_header=False, separator=delimiter, quote_char=None,
                           infer_schema=False, truncate_ragged_lines=True,
                           empty_string_is_null=False, schema=dict.fromkeys(names, pl.String),
                           raise_if_empty=False)
    except pl.exceptions.PolarsError:
        return None
    if rows.height != n_lines or rows.width != needed:
        return None
    if delimiter != " " and b" " in body:
        rows = rows.with_columns(pl.all().str.strip_chars(" "))
    rows = rows.with_columns(
        line=pl.int_range(first_line, first_line + n_lines, dtype=pl.Int64),
        bad=pl.lit(None, dtype=pl.String), n_fields=pl.lit(needed, dtype=pl.UInt32))
    # a row with an empty field may be short or blank: count its fields from the raw line
    maybe = rows.select(pl.any_horizontal([pl.col(n) == "" for n in names]))[:, 0]
    skipped = 0
    if maybe.any():
        index = maybe.arg_true().to_list()
        raw_lines = body.split(b"\n")
        counts = [raw_lines[i].count(delimiter.encode()) + 1 for i in index]
        blank = [not raw_lines[i].strip(b" \t") for i in index]
        n_fields = rows["n_fields"].to_numpy().copy()
        n_fields[index] = counts
        keep = np.ones(rows.height, dtype=bool)
        keep[[i for i, b in zip(index, blank, strict=True) if b]] = False
        skipped = int((~keep).sum())
        rows = rows.with_columns(n_fields=pl.Series(n_fields, dtype=pl.UInt32)).filter(
            pl.Series(keep))
    return rows.select("line", "bad", "n_fields", *names), skipped


def _rows_general(block: bytes, first_line: int, delimiter: str,
                  needed: int) -> tuple[pl.DataFrame, int]:
    lines = _lines(block).with_row_index("line", offset=first_line)
    lines = lines.with_columns(pl.col("line").cast(pl.Int64))
    blank = lines["text"].str.strip_chars(" \t").str.len_bytes() == 0
    blank = blank & lines["bad"].is_null()
    return _fields(lines.filter(~blank), delimiter, needed), int(blank.sum())


#: Blocks checked at the same time (polars releases the GIL; two cores on the target box).
WORKERS = 2


@dataclass
class _Checked:
    good: pl.Series  # frame lines
    bad: pl.DataFrame  # line, reason
    skipped: int
    done_bytes: int


def _check_block(block: bytes, first_line: int, idx: dict[str, int], opts: ConvertOptions,
                 keys: dict[str, tuple[str, bool]], state: dict[str, int | bool | None],
                 done_bytes: int) -> _Checked:
    """Rows of one block -> frame lines and rejects; reads ``state`` (decides the time mode
    when it is still open, which only the first block does, synchronously)."""
    needed = max(idx.values()) + 1
    fast = _rows_fast(block, first_line, opts.delimiter, needed, _line_count(block))
    rows, skipped = fast if fast is not None else _rows_general(
        block, first_line, opts.delimiter, needed)
    if state["epoch"] is None:
        _decide_time_mode(rows, idx, TIME_UNIT_EXPONENT[opts.time_unit], state)
    origin = state["origin"]
    checked = _checked(rows, idx, opts, keys, origin if isinstance(origin, int) else None,
                       bool(state["epoch"]))
    good = checked.filter(pl.col("reason").is_null())
    return _Checked(frame_lines(good) if good.height else pl.Series("line", [], pl.String),
                    checked.filter(pl.col("reason").is_not_null()).select("line", "reason"),
                    skipped, done_bytes)


def _convert_one(table: Path, opts: ConvertOptions, keys: dict[str, tuple[str, bool]],
                 output_log: _Output, state: dict[str, int | bool | None],
                 advance: Callable[[int], None], block_bytes: int) -> TableSummary:
    """Blocks are read in order, checked by up to WORKERS threads and consumed in order, so
    rejects, --strict and the output keep the table's order."""
    from collections import deque
    from concurrent.futures import Future, ThreadPoolExecutor

    result = TableSummary(path=str(table))
    stream, raw = open_log(table)
    idx: dict[str, int] | None = None if opts.header else _resolve_columns(table, None,
                                                                          opts.columns)
    line_no = 0
    position = 0

    def consume(done: _Checked) -> None:
        nonlocal position
        result.skipped += done.skipped
        bad = done.bad
        if bad.height:
            if opts.strict:
                raise LogFormatError(str(table), int(bad["line"][0]), str(bad["reason"][0]))
            result.rejected += bad.height
            room = SHOWN_REJECTS - len(result.first_rejects)
            result.first_rejects += list(zip(bad["line"].head(room).to_list(),
                                             bad["reason"].head(room).to_list(), strict=True))
        if len(done.good):
            if output_log.out is None:
                origin = state["origin"]
                output_log.open(wall_time(EPOCH, origin) if state["epoch"]
                                and isinstance(origin, int) else opts.origin)
            output_log.write(done.good)
        result.converted += len(done.good)
        advance(done.done_bytes - position)
        position = done.done_bytes

    pending: deque[Future[_Checked]] = deque()
    try:
        with ThreadPoolExecutor(WORKERS, thread_name_prefix="tracelab-convert") as pool:
            for block in _blocks(stream, block_bytes):
                first_line = line_no + 1
                n_lines = _line_count(block)
                line_no += n_lines
                result.lines += n_lines
                if idx is None:  # the header row: the first line that is not blank
                    found = _header_in(block, opts.delimiter)
                    if found is None:
                        result.skipped += n_lines
                        continue
                    head, upto, block = found
                    idx = _resolve_columns(table, head, opts.columns)
                    result.skipped += upto
                    first_line += upto
                    if not block:
                        continue
                if state["epoch"] is None:  # decides the time mode: before any other block
                    while pending:
                        consume(pending.popleft().result())
                    consume(_check_block(block, first_line, idx, opts, keys, state, raw.tell()))
                    continue
                pending.append(pool.submit(_check_block, block, first_line, idx, opts, keys,
                                           state, raw.tell()))
                while len(pending) > WORKERS:
                    consume(pending.popleft().result())
            while pending:
                consume(pending.popleft().result())
    finally:
        for future in pending:
            future.cancel()
        stream.close()
        raw.close()
    return result


def _decide_time_mode(rows: pl.DataFrame, idx: dict[str, int], exponent: int,
                      state: dict[str, int | bool | None]) -> None:
    """From the first row whose time parses: epoch (sets the origin unless given) or relative."""
    value, ok = _time_ns(pl.col(f"f{idx['time']}"), exponent)
    valid = rows.select(t=value, ok=ok).filter(pl.col("ok").fill_null(False))
    if not valid.height:
        return
    first = int(valid["t"][0])
    state["epoch"] = first >= EPOCH_THRESHOLD_NS
    if state["epoch"] and state["origin"] is None:
        state["origin"] = first
