"""The fast path: a block of valid lines parsed by polars' CSV reader, checked in bulk.

Most blocks of a real log are valid: they are split by the CSV reader and checked with a few
vectorised expressions (an Enum cast as a table lookup, a hex decode over the whole buffer).
A block with any doubtful line (a CR, an empty field, a reason from the exact rules) is
handed back (None) to the exact path, which gives the same tables and the rejects.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import polars as pl
import pyarrow as pa

from tracelab.format.blocks import count_byte
from tracelab.format.chunk import (
    FIELDS,
    Chunk,
    count_time_steps,
    errors_table,
    frames_table,
    losses_table,
    marks_table,
    status_table,
)
from tracelab.format.grammar import (
    ALL_BUSES,
    CLASSIC_PAYLOAD_BYTES,
    ERROR_FIELDS,
    ERROR_TYPES,
    FD_PAYLOAD_BYTES,
    MAX_BASE_ID,
    MAX_EXTENDED_ID,
    NONE,
    RECORD_FIELDS,
    last_frame_t_ns,
)
from tracelab.format.writer import LogHeader

#: Every form FORM_RE accepts, for a cheap is_in() on the fast path.
VALID_FORMS = tuple(f"{k}{rest}" for k in "sx" for rest in ("", "r", "f", "fb", "fe", "fbe"))
_FAST_SCHEMA = dict.fromkeys(FIELDS, pl.String)
_FORM_ENUM = pl.Enum(list(VALID_FORMS))
_DLC_ENUM = pl.Enum([str(dlc) for dlc in range(16)])

#: Value of each byte as a hex digit, 255 for any other byte.
_HEX_VALUE = np.full(256, 255, dtype=np.uint8)
_HEX_VALUE[np.frombuffer(b"0123456789", dtype=np.uint8)] = np.arange(10)
_HEX_VALUE[np.frombuffer(b"abcdef", dtype=np.uint8)] = np.arange(10, 16)
_HEX_VALUE[np.frombuffer(b"ABCDEF", dtype=np.uint8)] = np.arange(10, 16)
#: The byte of each pair of characters read as one little-endian u16 (first character low),
#: 256 for a pair that is not two hex digits: one lookup per output byte.
_HEX_PAIR = (_HEX_VALUE.astype(np.uint16)[None, :] << 4
             | _HEX_VALUE.astype(np.uint16)[:, None]).ravel()
_HEX_PAIR[((_HEX_VALUE[None, :] == 255) | (_HEX_VALUE[:, None] == 255)).ravel()] = 256
_HEX_PAIR.flags.writeable = False
#: Arrow's binary view keeps values up to this many bytes inside the 16-byte view itself.
_INLINE = 12


def decode_hex(text: pl.Series) -> pl.Series | None:
    """Hex text -> bytes by a table lookup over the column's whole character buffer, handed
    to polars as Arrow binary views built here, which it takes without the copy it makes of
    a large-binary array. None when any value is not an even number of hex digits: the
    caller then decodes with polars, which gives null for those."""
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
    n_out = int(offsets[-1]) // 2
    if n_out >= 2**31:  # beyond a view's i32 offsets (a chunk is 8 MiB)
        return None
    pairs = (np.frombuffer(data_buf, dtype="<u2", count=n_out, offset=int(raw_offsets[0]))
             if n_out else np.zeros(0, dtype=np.uint16))
    decoded = np.take(_HEX_PAIR, pairs)
    if decoded.size and decoded.max() == 256:
        return None
    out = decoded.astype(np.uint8)
    # buffer 0 holds the long values; views of short ones do not refer to it
    buffers = [validity, pa.py_buffer(_binary_views(out, offsets >> 1)), pa.py_buffer(out)]
    return pl.Series(text.name, pa.Array.from_buffers(pa.binary_view(), len(arr), buffers))


def _binary_views(out: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Arrow binary views (n x 16 bytes) of the values ``out[offsets[i]:offsets[i+1]]``: the
    length (i32), then the value itself when it fits 12 bytes, else its first 4 bytes, buffer
    0 and its offset in ``out`` (the Arrow columnar format, variable-size binary view layout)."""
    n = len(offsets) - 1
    lengths = np.diff(offsets).astype("<i4")
    views = np.zeros((n, 16), dtype=np.uint8)
    views[:, :4] = lengths.view(np.uint8).reshape(n, 4)
    if not out.size:
        return views
    present = lengths > 0
    width = int(lengths.max())
    if int(lengths[present].min()) == width <= _INLINE:  # one short length (and empty values)
        views[np.flatnonzero(present), 4:4 + width] = out.reshape(-1, width)
        return views
    long_rows = lengths > _INLINE
    if (present & ~long_rows).any():  # each byte of a short value to its row's view
        row = np.repeat(np.arange(n), lengths)
        at = np.arange(out.size) - offsets[row]
        inline = ~long_rows[row]
        views.reshape(-1)[row[inline] * 16 + 4 + at[inline]] = out[inline]
    starts = offsets[:-1][long_rows]
    for k in range(4):  # the prefix of each long value
        views[long_rows, 4 + k] = out[starts + k]
    views[long_rows, 12:16] = starts.astype("<i4").view(np.uint8).reshape(-1, 4)
    return views


def _plain_record_ok(f: list[pl.Expr]) -> pl.Expr:
    """True for error, status and mark records that are valid in their commonest form (an
    error without id / form, a status, a mark), on the fast path's typed rows: stricter than
    the exact rules (record_reasons), so a row it passes needs no reason; the others get one.
    The fast path has no empty field (the TAB count), so n_fields counts them all."""
    c = pl.col
    timed = c("t_ns").is_not_null()  # 1-19 digits, no sign, fits int64 (as DIGITS)
    on_bus = c("bus_code").is_not_null()  # a declared alias
    tec_rec = r"^[0-9]{1,9}$"
    return pl.when(f[2] == "error").then(
        (c("n_fields") == 3 + len(RECORD_FIELDS["error"])) & timed & on_bus
        & f[3].is_in(ERROR_TYPES) & f[4].is_in(ERROR_FIELDS) & (f[5] == NONE) & (f[6] == NONE)
    ).when(f[2] == "status").then(
        (c("n_fields") == 3 + len(RECORD_FIELDS["status"])) & timed & on_bus
        & f[4].str.contains(tec_rec) & f[5].str.contains(tec_rec)
    ).when(f[2] == "mark").then(
        (c("n_fields") == 3 + len(RECORD_FIELDS["mark"])) & timed & (on_bus | (f[1] == ALL_BUSES))
    ).otherwise(False).fill_null(False)


#: Up to this many buses, a frame's bus index comes from string equalities (0.3 ms each a
#: chunk) rather than an Enum cast (a hash lookup per row, 2.3 ms).
_BUS_COMPARES = 8


def _bus_code(bus: pl.Expr, aliases: list[str]) -> pl.Expr:
    """Index of ``bus`` in ``aliases`` (u32), null for any other text."""
    if not aliases or len(aliases) > _BUS_COMPARES:
        return bus.cast(pl.Enum(aliases), strict=False).to_physical()
    code: Any = pl.when(bus == aliases[0]).then(pl.lit(0, pl.UInt32))
    for index, alias in enumerate(aliases[1:], start=1):  # a loop over the few buses
        code = code.when(bus == alias).then(pl.lit(index, pl.UInt32))
    return code.otherwise(pl.lit(None, pl.UInt32))


def _unsigned(text: pl.Expr) -> pl.Expr:
    return ~text.str.starts_with("+") & ~text.str.starts_with("-")



def parse_fast(header: LogHeader, reasons: pl.Expr, body: bytes, first_line: int,
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
    n = count_byte(body, 10) if newlines is None else newlines
    if rows.height != n:
        return None
    # The CSV reader reads an empty field as null, the same as a missing one (and drops
    # fields past the 9th). When the present fields account for every TAB of the chunk,
    # there is no empty or dropped field, and null means missing only.
    f = [pl.col(name) for name in _FAST_SCHEMA]
    rows = rows.with_columns(
        n_fields=pl.sum_horizontal(x.is_not_null() for x in f).cast(pl.UInt32))
    tabs_accounted = (rows["n_fields"].cast(pl.Int64) - 1).clip(lower_bound=0).sum()
    if int(tabs_accounted) != count_byte(body, 9):
        return None
    c = pl.col
    if not header.buses:
        return None
    bus_code = _bus_code(f[1], [b.alias for b in header.buses])
    # frames later than the earliest bus limit go the exact way (which names the reason)
    last_t_ns = min(last_frame_t_ns(b.nominal_bps, b.data_bps) for b in header.buses)
    fd_codes = [i for i, b in enumerate(header.buses) if b.data_bps is not None]
    # form as an index into VALID_FORMS: s, sr, sf, sfb, sfe, sfbe, x, xr, ... (6 each)
    variant = c("form_code") % 6
    # the payload matters on frame lines only ('' on the others: no character data
    # under nulls for the table lookup); '-' is an empty one
    payload_text = rows.select(payload=pl.when(f[2] != "frame").then(pl.lit(""))
                               .when(f[6] == NONE).then(pl.lit("")).otherwise(f[6])
                               ).to_series()
    payload: pl.Series | pl.Expr | None = decode_hex(payload_text)
    if payload is None:
        payload = pl.when(f[6] == NONE).then(pl.lit(b"")).otherwise(
            f[6].str.decode("hex", strict=False))
    rows = rows.with_columns(
        line=pl.int_range(first_line, first_line + n, dtype=pl.Int64),
        # to_integer takes an optional sign then digits only; refusing the signs here is
        # as strict as the exact path's regexes, at a third of the cost
        # at most 19 digits, as the grammar says (to_integer would read 20 with a leading 0)
        t_ns=pl.when(_unsigned(f[0]) & (f[0].str.len_bytes() <= 19)).then(
            f[0].str.to_integer(strict=False)),
        id=pl.when(_unsigned(f[3]) & (f[3].str.len_bytes() <= 8)).then(
            f[3].str.to_integer(base=16, strict=False)),
        payload=payload,
        # an Enum cast is a table lookup: the index of the form, or of the DLC text
        form_code=f[4].cast(_FORM_ENUM, strict=False).to_physical().cast(pl.Int16),
        dlc=f[5].cast(_DLC_ENUM, strict=False).to_physical().cast(pl.Int16),
        bus=f[1], bus_code=bus_code,
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
        & c("id").is_not_null() & c("form_code").is_not_null() & c("dlc").is_not_null()
        & f[7].is_null() & (c("t_ns") <= last_t_ns)
        & pl.when(c("ext")).then(c("id") <= MAX_EXTENDED_ID).otherwise(c("id") <= MAX_BASE_ID)
        & (c("payload").bin.size() == need) & (~c("brs") | c("bus_code").is_in(fd_codes))
    ).fill_null(False)
    ok_mask = rows.select(frame_ok).to_series()
    rest_mask = ~ok_mask & ~rows["other"]
    n_ok, n_rest = int(ok_mask.sum()), int(rest_mask.sum())
    rest = rows.filter(rest_mask) if n_rest else rows.clear()
    # other kinds and odd-but-valid frames: the exact checks, on the few rows that the
    # plain-record check does not already pass (it costs 0.1 ms where they cost ~5 ms)
    doubtful = rest.filter(~_plain_record_ok(f)) if n_rest else rest
    if doubtful.height and doubtful.select(reasons.is_not_null().any()).item():
        return None
    frames = rows.select(
        "bus", "t_ns", c("id").cast(pl.UInt32), "ext", "rtr", "fd", "brs", "esi",
        c("dlc").cast(pl.UInt8), c("payload").alias("data"), "line")
    if n_ok < n:
        frames = frames.filter(ok_mask)
    extra = frames_table(rest) if n_rest else None
    if extra is not None and extra.height:
        frames = pl.concat([frames, extra]).sort("line")
        bus_codes = None
    else:
        bus_codes = rows["bus_code"].filter(ok_mask) if n_ok < n else rows["bus_code"]
    if n_rest:
        timed = rows.select("bus", "t_ns", "line").filter(ok_mask | rest_mask)
    else:
        timed = frames.select("bus", "t_ns", "line")
    chunk = Chunk(
        frames=frames, errors=errors_table(rest), status=status_table(rest),
        marks=marks_table(rest), losses=losses_table(rest),
        rejects=pl.DataFrame(schema={"line": pl.Int64, "raw": pl.String,
                                     "reason": pl.String}),
        lines=n, other_lines=n - n_ok - n_rest, frame_bus_codes=bus_codes)
    count_time_steps(timed, chunk, header)
    return chunk

