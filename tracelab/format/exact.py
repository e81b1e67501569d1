"""The exact path: every record line checked by the format's validation rules, in order.

Slower than the fast path but complete: it gives each bad line its reason (the first
failing rule, docs/frame-log-format.md section 5), handles CR line ends, lines that are not
UTF-8 and a truncated last line, and stops at a directive after the first record.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import polars as pl

from tracelab.errors import LogFormatError, did_you_mean
from tracelab.format.chunk import (
    MAX_FIELDS,
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
    FORM_RE,
    MAX_BASE_ID,
    MAX_EXTENDED_ID,
    NONE,
    RECORD_FIELDS,
    last_frame_t_ns,
)
from tracelab.format.writer import LogHeader

DIGITS = r"^[0-9]{1,19}$"  # up to int64; to_integer(strict=False) nulls an overflow
_HEX_ID = r"^[0-9A-Fa-f]{1,8}$"


def _table_expr(table: tuple[int, ...], key: pl.Expr) -> pl.Expr:
    return key.replace_strict(dict(enumerate(table)), default=None, return_dtype=pl.Int64)


def _int(col: pl.Expr) -> pl.Expr:
    return pl.when(col.str.contains(DIGITS)).then(col.str.to_integer(strict=False))


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


def record_reasons(header: LogHeader) -> pl.Expr:
    """One reason per record line (null = valid), first failing check wins."""
    f = [pl.col(f"field_{i}") for i in range(MAX_FIELDS + 1)]
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
    last_t_ns = bus.replace_strict(
        {b.alias: last_frame_t_ns(b.nominal_bps, b.data_bps) for b in header.buses},
        default=None, return_dtype=pl.Int64)
    frame = (
        _frame_id_reason(f[3], form)
        .when(dlc.is_null() | (dlc > 15)).then(pl.format("dlc '{}' is not 0-15", dlc_raw))
        .when(t_ns > last_t_ns)
        .then(pl.format("t_ns {} leaves no room for the frame's end_ns in 64 bits (on bus '{}' "
                        "a frame starts at t_ns {} at the latest)", t_ns, bus, last_t_ns))
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
        pl.when((f[3] != NONE) & ~f[3].str.contains(DIGITS))
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


def suggest(rejects: pl.DataFrame, header: LogHeader) -> pl.DataFrame:
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


def split_lines(body: bytes, terminated: bool) -> pl.DataFrame:
    """Columns text, bad (reason the line is not UTF-8, else null)."""
    if terminated:
        body = body[:-1]
    elif not body:
        return pl.DataFrame(schema={"text": pl.String, "bad": pl.String})
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError:
        return _split_lines_slow(body)
    lines = pl.Series("text", [text]).str.split("\n").explode()
    return pl.DataFrame({"text": lines.str.strip_suffix("\r")}).with_columns(
        bad=pl.lit(None, dtype=pl.String))


def _split_lines_slow(body: bytes) -> pl.DataFrame:
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


def parse_exact(path: Path, header: LogHeader, reasons: pl.Expr, body: bytes, first_line: int,
                strict: bool, terminated: bool) -> Chunk:
    """The tables of one block, every bad line in ``rejects`` with its reason (with
    ``strict``, LogFormatError at the first one). ``reasons``: record_reasons(header)."""
    frame = split_lines(body, terminated)
    n = frame.height
    frame = frame.with_columns(line=pl.int_range(first_line, first_line + n, dtype=pl.Int64))
    text = pl.col("text")
    other = text.str.starts_with("#") | text.str.contains(r"^[ \t]*$")
    other = other & pl.col("bad").is_null()
    records = frame.filter(~other)
    other_lines = n - records.height
    directives = records.filter(text.str.starts_with("%") & pl.col("bad").is_null())
    records = records.with_columns(
        text.str.split_exact("\t", MAX_FIELDS).struct.unnest(),
        n_fields=text.str.count_matches("\t", literal=True) + 1,
    )
    reason = pl.when(pl.col("bad").is_not_null()).then(pl.col("bad")).otherwise(reasons)
    if not terminated:
        reason = pl.format("truncated final line (no line end; the logger may have lost "
                           "power): {}", reason.fill_null("the line is incomplete"))
    records = records.with_columns(reason=reason)
    bad = records.filter(pl.col("reason").is_not_null())
    first_directive = directives["line"][0] if directives.height else None
    if strict and bad.height and (first_directive is None or bad["line"][0] < first_directive):
        rejects = suggest(bad.select("line", raw="text", reason="reason"), header)
        raise LogFormatError(str(path), rejects["line"][0], rejects["reason"][0])
    if first_directive is not None:
        word = directives["text"][0].split()[0]
        raise LogFormatError(str(path), first_directive,
                             f"directive '{word}' after the first record: directives "
                             "belong before the records")
    rejects = suggest(bad.select("line", raw="text", reason="reason"), header)
    good = records.filter(pl.col("reason").is_null()).with_columns(
        t_ns=pl.col("field_0").str.to_integer(), bus=pl.col("field_1"))
    chunk = Chunk(
        frames=frames_table(good), errors=errors_table(good), status=status_table(good),
        marks=marks_table(good), losses=losses_table(good), rejects=rejects, lines=n,
        other_lines=other_lines)
    count_time_steps(good, chunk, header)
    return chunk

