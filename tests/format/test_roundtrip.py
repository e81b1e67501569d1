"""Writer -> reader -> writer gives the same bytes (property test over all record kinds)."""

from __future__ import annotations

import tempfile
from pathlib import Path

import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st

from tracelab.format.grammar import ERROR_FIELDS, ERROR_TYPES, payload_bytes
from tracelab.format.reader import read_log
from tracelab.format.writer import (
    BusDecl,
    LogHeader,
    LogWriter,
    error_line,
    frame_line,
    loss_line,
    mark_line,
    status_line,
)

HEADER = LogHeader(buses=[BusDecl("P", 500000), BusDecl("C", 500000, 2000000, "start", "body")],
                   origin="2026-11-30T21:04:05.25Z", meta={"vehicle": "utv-07", "run": "r1"})


@st.composite
def frame_records(draw: st.DrawFn) -> str:
    ext, fd = draw(st.booleans()), draw(st.booleans())
    rtr = not fd and draw(st.booleans())
    brs, esi = fd and draw(st.booleans()), fd and draw(st.booleans())
    ident = draw(st.integers(0, 0x1FFFFFFF if ext else 0x7FF))
    dlc = draw(st.integers(0, 15))
    data = draw(st.binary(min_size=payload_bytes(dlc, fd, rtr), max_size=payload_bytes(dlc, fd, rtr)))
    return frame_line(draw(st.integers(0, 2**62)), "C" if brs else draw(st.sampled_from("PC")),
                      ident, ext, rtr, fd, brs, esi, dlc, data)


@st.composite
def other_records(draw: st.DrawFn) -> str:
    t_ns, bus = draw(st.integers(0, 2**40)), draw(st.sampled_from("PC"))
    kind = draw(st.sampled_from(["error", "status", "mark", "loss"]))
    name = st.text("abcdefghijklmnopqrstuvwxyz0123456789_-", min_size=1, max_size=8)
    if kind == "error":
        known = draw(st.booleans())
        ext = draw(st.booleans())
        ident = draw(st.integers(0, 0x1FFFFFFF if ext else 0x7FF)) if known else None
        return error_line(t_ns, bus, draw(st.sampled_from(ERROR_TYPES)),
                          draw(st.sampled_from(ERROR_FIELDS)), ident, ext if known else None,
                          ("x" if ext else "s") if known else None, draw(st.none() | name))
    if kind == "status":
        return status_line(t_ns, bus, draw(name), draw(st.integers(0, 300)),
                           draw(st.integers(0, 300)))
    if kind == "mark":
        text = draw(st.text(st.characters(blacklist_characters="\t\n\r",
                                          blacklist_categories=("Cs", "Zl", "Zp", "Cc")),
                            max_size=30))
        return mark_line(t_ns, draw(st.sampled_from(["P", "C", "*"])), text)
    return loss_line(t_ns, bus, draw(st.none() | st.integers(0, 10**6)),
                     t_ns + draw(st.integers(0, 10**9)))


def _rewrite(path: Path, out: Path) -> None:
    """Write the read tables back in line order (a test may loop over its few rows)."""
    log = read_log(path)
    lines: list[tuple[int, str]] = []
    for r in log.frames.iter_rows(named=True):
        lines.append((r["line"], frame_line(r["t_ns"], r["bus"], r["id"], r["ext"], r["rtr"],
                                            r["fd"], r["brs"], r["esi"], r["dlc"], r["data"])))
    for r in log.errors.iter_rows(named=True):
        lines.append((r["line"], error_line(r["t_ns"], r["bus"], r["type"], r["field"], r["id"],
                                            r["ext"], r["form"], r["by"])))
    for r in log.status.iter_rows(named=True):
        lines.append((r["line"], status_line(r["t_ns"], r["bus"], r["node"], r["tec"], r["rec"])))
    for r in log.marks.iter_rows(named=True):
        lines.append((r["line"], mark_line(r["t_ns"], r["bus"], r["text"])))
    for r in log.losses.iter_rows(named=True):
        lines.append((r["line"], loss_line(r["t_ns"], r["bus"], r["count"], r["until_ns"])))
    assert log.rejects.height == 0, log.rejects.to_dicts()
    with LogWriter(out, log.header) as writer:
        writer.lines([text for _, text in sorted(lines)])


@settings(max_examples=60, deadline=None)
@given(st.lists(frame_records() | other_records(), max_size=40), st.sampled_from(["", ".gz", ".zst"]))
def test_write_read_write_is_byte_identical(records: list[str], suffix: str) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        first, second = Path(tmp) / f"a.frames{suffix}", Path(tmp) / f"b.frames{suffix}"
        with LogWriter(first, HEADER) as writer:
            writer.lines(records)
        _rewrite(first, second)
        assert second.read_bytes() == first.read_bytes()


def test_round_trip_keeps_payload_bytes_exactly(tmp_path: Path) -> None:
    # all 256 byte values, in an FD frame of 64 bytes (DLC 15, ISO 11898-1:2015 Table 5)
    payload = bytes(range(256))
    records = [frame_line(i, "C", 0x100 + i, False, False, True, True, False, 15,
                          payload[i * 64:(i + 1) * 64]) for i in range(4)]
    path = tmp_path / "p.frames"
    with LogWriter(path, HEADER) as writer:
        writer.lines(records)
    got = read_log(path).frames
    assert b"".join(got["data"].to_list()) == payload
    assert got["dlc"].dtype == pl.UInt8 and got["id"].dtype == pl.UInt32
