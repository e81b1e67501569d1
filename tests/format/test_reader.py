"""Reader: every bad-input case gets its reason and line; header faults are fatal."""

from __future__ import annotations

import gzip
from pathlib import Path

import polars as pl
import pytest
import zstandard
from hypothesis import given, settings
from hypothesis import strategies as st

from tests.format.cases import BAD_LINE, FATAL_CASES, GOOD, HEADER, RECORD_CASES, record_log
from tests.format.test_roundtrip import frame_records, other_records
from tracelab.errors import LogFormatError
from tracelab.format.reader import LogReader, read_header, read_log

EXAMPLE = """%tracelab-frames 1
%origin 2026-11-30T21:04:05.000000000Z
%bus P nominal=500000 stamp=end name=powertrain
%bus C nominal=500000 data=2000000 name=chassis
%meta vehicle=utv-07 run=endurance-114
0\tP\tframe\t0C0\ts\t8\t11223344556677FF
1250000\tP\tframe\t18DAF110\tx\t8\t0210030000000000
2000000\tC\tframe\t123\tsfb\t9\t00112233445566778899AABB
2500000\tP\terror\tstuff\tdata\t0C0\ts\t-
2500100\tP\tstatus\tinv\t136\t0
3000000\t*\tmark\thill climb, step 4
4000000\tP\tloss\t17\t4100000
"""


def _write(tmp_path: Path, content: str | bytes, name: str = "run.frames") -> Path:
    path = tmp_path / name
    path.write_bytes(content.encode() if isinstance(content, str) else content)
    return path


def test_example_of_the_spec_reads_into_typed_tables(tmp_path: Path) -> None:
    log = read_log(_write(tmp_path, EXAMPLE))
    assert log.header.origin == "2026-11-30T21:04:05.000000000Z"
    assert [(b.alias, b.nominal_bps, b.data_bps, b.stamp, b.name) for b in log.header.buses] == [
        ("P", 500000, None, "end", "powertrain"), ("C", 500000, 2000000, "end", "chassis")]
    assert log.header.meta == {"vehicle": "utv-07", "run": "endurance-114"}
    f = log.frames
    assert f["id"].to_list() == [0x0C0, 0x18DAF110, 0x123]
    assert f["ext"].to_list() == [False, True, False]
    assert f.select("fd", "brs", "esi").row(2) == (True, True, False)
    assert f["data"][2] == bytes.fromhex("00112233445566778899AABB")
    assert f["line"].to_list() == [6, 7, 8]
    assert log.errors.select("type", "field", "id", "ext", "form", "by").row(0) == (
        "stuff", "data", 0x0C0, False, "s", None)
    assert log.status.select("node", "tec", "rec").row(0) == ("inv", 136, 0)
    assert log.marks.select("bus", "text").row(0) == ("*", "hill climb, step 4")
    assert log.losses.select("count", "until_ns").row(0) == (17, 4100000)
    assert log.rejects.height == 0 and log.lines == 12


@pytest.mark.parametrize(("name", "bad", "reason"), RECORD_CASES, ids=[c[0] for c in RECORD_CASES])
def test_bad_record_is_rejected_with_reason_and_line(tmp_path: Path, name: str, bad: str,
                                                     reason: str) -> None:
    log = read_log(_write(tmp_path, record_log(bad)))
    assert log.rejects.height == 1, log.rejects
    assert log.rejects["line"][0] == BAD_LINE
    assert reason in log.rejects["reason"][0]
    assert log.rejects["raw"][0] == bad
    assert log.frames["line"].to_list() == [4] and log.marks["line"].to_list() == [6]


@pytest.mark.parametrize(("name", "bad", "reason"), RECORD_CASES[:6], ids=[c[0] for c in RECORD_CASES[:6]])
def test_strict_stops_at_the_first_bad_line(tmp_path: Path, name: str, bad: str,
                                            reason: str) -> None:
    path = _write(tmp_path, record_log(bad))
    with pytest.raises(LogFormatError) as caught:
        read_log(path, strict=True)
    assert caught.value.line == BAD_LINE and reason in caught.value.reason
    assert str(caught.value).startswith(f"{path}:{BAD_LINE}: ")


def test_non_utf8_line_is_rejected_alone(tmp_path: Path) -> None:
    content = (HEADER + GOOD).encode() + b"5\tP\tmark\tcaf\xe9\n" + b"6\tP\tmark\tok\n"
    log = read_log(_write(tmp_path, content))
    assert log.rejects.select("line", "reason").row(0) == (
        5, "not valid UTF-8 text (byte 0xE9 at column 13)")
    assert log.marks["text"].to_list() == ["ok"]
    assert log.frames.height == 1


def test_truncated_final_line_is_rejected(tmp_path: Path) -> None:
    log = read_log(_write(tmp_path, HEADER + GOOD + "5\tP\tframe\t0C0\ts\t8\t1122"))
    assert log.rejects["line"].to_list() == [5]
    assert log.rejects["reason"][0].startswith("truncated final line (no line end")
    assert log.lines == 5


def test_truncated_final_line_is_rejected_even_when_it_parses(tmp_path: Path) -> None:
    log = read_log(_write(tmp_path, HEADER + GOOD + "5\tP\tmark\thill clim"))
    assert log.rejects["reason"][0].startswith("truncated final line")
    assert log.marks.height == 0


@pytest.mark.parametrize(("name", "content", "line", "reason"), FATAL_CASES,
                         ids=[c[0] for c in FATAL_CASES])
def test_header_level_fault_is_fatal(tmp_path: Path, name: str, content: bytes,
                                     line: int | None, reason: str) -> None:
    with pytest.raises(LogFormatError) as caught:
        read_log(_write(tmp_path, content))
    assert caught.value.line == line
    assert reason in caught.value.reason


@pytest.mark.parametrize("suffix", [".gz", ".zst"])
def test_corrupt_compressed_file_is_fatal(tmp_path: Path, suffix: str) -> None:
    body = (HEADER + GOOD * 5000).encode()
    packed = gzip.compress(body) if suffix == ".gz" else zstandard.compress(body)
    path = _write(tmp_path, packed[: len(packed) // 2], "cut.frames" + suffix)
    kind = "gzip" if suffix == ".gz" else "zstd"
    with pytest.raises(LogFormatError, match=f"corrupt or truncated {kind} data"):
        read_log(path)
    garbled = packed[:20] + bytes(b ^ 0x5A for b in packed[20:])
    with pytest.raises(LogFormatError, match="corrupt or truncated"):
        read_log(_write(tmp_path, garbled, "bad.frames" + suffix))


@pytest.mark.parametrize("suffix", [".gz", ".zst"])
def test_compressed_logs_read_like_plain_ones(tmp_path: Path, suffix: str) -> None:
    body = EXAMPLE.encode()
    packed = gzip.compress(body) if suffix == ".gz" else zstandard.compress(body)
    plain = read_log(_write(tmp_path, body))
    packed_log = read_log(_write(tmp_path, packed, "run.frames" + suffix))
    assert packed_log.frames.equals(plain.frames) and packed_log.lines == plain.lines


def test_crlf_comments_and_blanks(tmp_path: Path) -> None:
    text = EXAMPLE.replace("\n", "\r\n").replace("1250000", "# note\r\n\r\n  \r\n1250000", 1)
    text = text.replace("\r\n", "\r\n# top\r\n", 1)
    log = read_log(_write(tmp_path, text))
    assert log.frames["data"][0] == bytes.fromhex("11223344556677FF")
    assert log.marks["text"][0] == "hill climb, step 4"
    assert log.lines == 16 and log.header_lines == 6 and log.other_lines == 3
    assert log.lines == log.header_lines + log.other_lines + 7 + log.rejects.height


def test_small_chunks_give_the_same_tables(tmp_path: Path) -> None:
    lines = [f"{t * 1000}\t{'PC'[t % 2]}\tframe\t{t % 0x7FF:03X}\ts\t2\t{t % 256:02X}00"
             for t in range(3000)]
    path = _write(tmp_path, HEADER + "\n".join(lines) + "\n")
    whole = read_log(path)
    with LogReader(path, chunk_bytes=97) as reader:
        parts = list(reader.chunks())
    assert len(parts) > 100
    assert pl.concat([c.frames for c in parts]).equals(whole.frames)
    assert whole.frames["line"].to_list() == list(range(4, 3004))


def test_backward_time_steps_are_counted_per_bus_across_chunks(tmp_path: Path) -> None:
    records = ["100\tP\tmark\ta", "50\tC\tmark\tb", "90\tP\tmark\tc", "60\tC\tmark\td",
               "10\t*\tmark\tall", "80\tP\tmark\te"]
    path = _write(tmp_path, HEADER + "\n".join(records) + "\n")
    with LogReader(path, chunk_bytes=16) as reader:
        chunks = list(reader.chunks())
    # P: 100 -> 90 (line 6) and 90 -> 80 (line 9) go back; C: 50 -> 60 does not; '*' ignored
    assert sum(c.backward_steps for c in chunks) == 2
    assert [c.first_backward_line for c in chunks if c.backward_steps][0] == 6
    assert read_log(path).marks.height == 6  # kept, not rejected


def test_read_header_stops_before_the_records(tmp_path: Path) -> None:
    header = read_header(_write(tmp_path, EXAMPLE + "junk without tabs\n"))
    assert header.meta["run"] == "endurance-114" and len(header.buses) == 2


VARIETY = [
    "10\tP\tframe\t0C0\ts\t08\tAABBCCDDEEFF0011",  # DLC with a leading zero: valid
    "11\tC\tframe\t1abcdef\txfbe\t15\t" + "ab" * 64, "12\tP\tframe\t7ff\tsr\t3\t-",
    "# comment\twith a tab", "", "\t", "13\tP\terror\tcrc\tcrc\t-\t-\tinv",
    "14\t*\tmark\tstep \"2\"", "15\tP\tstatus\tinv\t128\t0", "16\tP\tloss\t-\t99",
    "9\tP\tframe\t000\ts\t0\t-",
]


SIGNS = ["+5\tP\tframe\t0C0\ts\t0\t-", "-0\tP\tframe\t0C0\ts\t0\t-",
         "5\tP\tframe\t+0C0\ts\t0\t-", "5\tP\tframe\t-1\ts\t0\t-",
         "5\tP\tframe\t0x1\ts\t0\t-", "5\tP\tframe\t000000001\ts\t0\t-",
         " 5\tP\tframe\t0C0\ts\t0\t-", "5\tP\tframe\t0C0\ts\t+8\tAABBCCDDEEFF0011",
         "99999999999999999999\tP\tframe\t0C0\ts\t0\t-", "5\tP\tframe\t0C0\tS\t0\t-"]


#: Near misses of the fast path's plain-record check (fast.py: _plain_record_ok): each must
#: get the exact rules' verdict, not a pass.
PLAIN = ["5\tP\tstatus\tinv\t+1\t0", "5\tP\tstatus\tinv\t1234567890\t0",
         "5\t*\terror\tcrc\tcrc\t-\t-\tinv", "5\tP\terror\tcrc\tcrc\t-\t-",
         "5\tP\terror\tCRC\tcrc\t-\t-\tinv", "5\tP\terror\tcrc\tcrc\t0C0\ts\tinv",
         "5\tP\terror\tcrc\tcrc\t0C0\t-\tinv", "5\tP\tmark\tx\ty", "5\tQ\tmark\tx",
         "+5\tP\tmark\tx", "5\tP\tstatus\tinv\t1\t2\t3"]


@pytest.mark.parametrize("bad", [c[1] for c in RECORD_CASES] + SIGNS + [None])
def test_fast_and_exact_paths_give_the_same_tables(tmp_path: Path, bad: str | None) -> None:
    lines = VARIETY + ([bad] if bad is not None else []) + VARIETY
    path = _write(tmp_path, HEADER + "\n".join(lines) + "\n")
    fast, exact = read_log(path, fast=True), read_log(path, fast=False)
    for name in ("frames", "errors", "status", "marks", "losses", "rejects"):
        assert getattr(fast, name).equals(getattr(exact, name)), name
    assert (fast.lines, fast.other_lines, fast.backward_steps) == (
        exact.lines, exact.other_lines, exact.backward_steps)
    assert exact.backward_steps == 2 and exact.other_lines == 6


@pytest.mark.parametrize("odd", PLAIN)
def test_near_misses_of_the_plain_record_check_get_the_exact_verdict(tmp_path: Path,
                                                                      odd: str) -> None:
    path = _write(tmp_path, HEADER + "\n".join([*VARIETY, odd, *VARIETY]) + "\n")
    fast, exact = read_log(path, fast=True), read_log(path, fast=False)
    for name in ("frames", "errors", "status", "marks", "losses", "rejects"):
        assert getattr(fast, name).equals(getattr(exact, name)), name
    assert (fast.other_lines, fast.backward_steps) == (exact.other_lines, exact.backward_steps)


def test_valid_chunks_take_the_fast_path(tmp_path: Path) -> None:
    plain = [line for line in VARIETY if line != "\t"]  # a TAB-only line goes the exact way
    path = _write(tmp_path, HEADER + "\n".join(plain) + "\n")
    body = "\n".join(plain).encode() + b"\n"
    with LogReader(path) as reader:
        chunk = reader._chunk_fast(body, 4)
        assert reader._chunk_fast(body + b"\t\n", 4) is None
    assert chunk is not None and chunk.frames.height == 4 and chunk.other_lines == 2
    with LogReader(path) as reader:  # one bad line sends the chunk to the exact path
        assert reader._chunk_fast(body + b"5\tQ\tmark\tx\n", 4) is None


def test_a_line_without_end_cannot_exhaust_memory(tmp_path: Path,
                                                  monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("tracelab.format.blocks.MAX_LINE_BYTES", 1000)
    path = _write(tmp_path, HEADER + GOOD + "x" * 5000)
    with LogReader(path, chunk_bytes=256) as reader, pytest.raises(
            LogFormatError, match="line is longer than") as caught:
        list(reader.chunks())
    assert caught.value.line == 5


_TOKENS = {
    "t": ["0", "5", "007", "-1", "+2", "1.5", "", "99999999999999999999", "#3"],
    "bus": ["P", "C", "*", "Q", "", "p"],
    "kind": ["frame", "error", "status", "mark", "loss", "frm", ""],
    "a": ["0C0", "7FF", "800", "1FFFFFFF", "20000000", "g1", "-", "", "bit", "crc", "inv", "3"],
    "b": ["s", "x", "sr", "sf", "sfb", "xfbe", "sb", "-", "", "data", "12", "ack"],
    "c": ["0", "1", "8", "08", "9", "15", "16", "-", "", "x", "7"],
    "d": ["-", "", "AA", "aabb", "0011223344556677", "00" * 12, "ZZ", "ABC", "inv", "9"],
}


@settings(max_examples=80, deadline=None)
@given(st.lists(st.tuples(*(st.sampled_from(v) for v in _TOKENS.values()),
                          st.integers(3, 9)), min_size=1, max_size=25))
def test_fast_path_agrees_with_the_exact_path_on_random_lines(
        rows: list[tuple[str, ...]]) -> None:
    import tempfile

    lines = ["\t".join(row[:-1][: row[-1]]) for row in rows]  # type: ignore[arg-type]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "r.frames"
        path.write_text(HEADER + "\n".join(lines) + "\n")
        fast, exact = read_log(path, fast=True), read_log(path, fast=False)
    for name in ("frames", "errors", "status", "marks", "losses", "rejects"):
        assert getattr(fast, name).equals(getattr(exact, name)), name
    assert (fast.lines, fast.other_lines, fast.backward_steps) == (
        exact.lines, exact.other_lines, exact.backward_steps)


@settings(max_examples=60, deadline=None)
@given(st.lists(frame_records() | other_records(), min_size=1, max_size=30),
       st.none() | st.tuples(*(st.sampled_from(v) for v in _TOKENS.values()),
                             st.integers(3, 9)))
def test_fast_path_agrees_on_valid_logs_with_at_most_one_odd_line(
        records: list[str], odd: tuple[str, ...] | None) -> None:
    import tempfile

    lines = list(records)
    if odd is not None:
        lines.insert(len(lines) // 2, "\t".join(odd[:-1][: odd[-1]]))  # type: ignore[arg-type]
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "r.frames"
        path.write_text(HEADER + "\n".join(lines) + "\n")
        fast, exact = read_log(path, fast=True), read_log(path, fast=False)
        # an all-valid log must really take the fast path (an empty field, as in an empty
        # mark text, reads as null there and sends the chunk to the exact path)
        if odd is None and not any(x.endswith("\t") or "\t\t" in x for x in lines):
            with LogReader(path) as reader:
                (block,) = list(reader.blocks())
                assert reader._chunk_fast(block.body, block.first_line) is not None
    for name in ("frames", "errors", "status", "marks", "losses", "rejects"):
        assert getattr(fast, name).equals(getattr(exact, name)), name
    assert (fast.lines, fast.other_lines, fast.backward_steps) == (
        exact.lines, exact.other_lines, exact.backward_steps)
