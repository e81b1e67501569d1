"""Regression tests of the reader under hostile input (issue "Hardening", section 1): long
lines, odd DLC and time texts, impossible origins, times at the int64 limit, control
characters in messages, decompression bombs."""

from __future__ import annotations

import gzip
import tracemalloc
from pathlib import Path

import polars as pl
import pytest
import zstandard

from tests.format.cases import GOOD, HEADER
from tracelab.errors import LogFormatError, printable
from tracelab.format import compression
from tracelab.format.blocks import MAX_LINE_BYTES
from tracelab.format.grammar import FRAME_BITS_BOUND, MAX_T_NS, last_frame_t_ns, wall_time
from tracelab.format.reader import LogReader, read_log

TABLES = ("frames", "errors", "status", "marks", "losses", "rejects")


def _write(tmp_path: Path, content: str | bytes, name: str = "run.frames") -> Path:
    path = tmp_path / name
    path.write_bytes(content.encode() if isinstance(content, str) else content)
    return path


def _both(path: Path, strict: bool = False) -> tuple[object, object]:
    fast, exact = read_log(path, strict=strict, fast=True), read_log(path, strict=strict, fast=False)
    for name in TABLES:
        assert getattr(fast, name).equals(getattr(exact, name)), name
    assert (fast.lines, fast.other_lines) == (exact.lines, exact.other_lines)
    return fast, exact


# --- long lines ----------------------------------------------------------------------------

LONG = 70_000  # > the header reader's 64 KiB line limit


@pytest.mark.parametrize("long_line", ["#" + "c" * LONG, " " * LONG, "# " + "\t" * LONG],
                         ids=["comment", "blank", "comment-with-tabs"])
def test_long_line_before_the_first_record_keeps_line_numbers(tmp_path: Path,
                                                              long_line: str) -> None:
    content = HEADER + long_line + "\n" + GOOD + "2000\tP\tmark\tafter\n"
    path = _write(tmp_path, content)
    for strict in (False, True):
        log, _ = _both(path, strict=strict)
        assert log.rejects.height == 0  # type: ignore[attr-defined]
        assert log.frames["line"].to_list() == [5]  # type: ignore[attr-defined]
        assert log.marks["line"].to_list() == [6]  # type: ignore[attr-defined]
        assert log.lines == content.count("\n") == 6  # type: ignore[attr-defined]


def test_long_lines_among_the_records_keep_line_numbers(tmp_path: Path) -> None:
    mark = "3000\tC\tmark\t" + "m" * 10_000_000  # a 10 MB mark text: valid
    lines = [GOOD.strip(), "#" + "c" * LONG, mark, "4000\tP\tmark\tend", " " * LONG,
             "5000\tQ\tmark\t" + "q" * LONG]
    content = HEADER + "\n".join(lines) + "\n"
    path = _write(tmp_path, content)
    log, _ = _both(path)
    assert log.marks["line"].to_list() == [6, 7]  # type: ignore[attr-defined]
    assert len(log.marks["text"][0]) == 10_000_000  # type: ignore[attr-defined]
    assert log.rejects["line"].to_list() == [9]  # type: ignore[attr-defined]
    assert log.lines == content.count("\n") == 9  # type: ignore[attr-defined]
    with LogReader(path, chunk_bytes=4096) as reader:  # small blocks: the same numbering
        parts = list(reader.chunks())
    assert pl.concat([c.marks for c in parts])["line"].to_list() == [6, 7]
    assert reader.header_lines + sum(c.lines for c in parts) == 9


def test_long_comment_at_the_end_of_the_header_only(tmp_path: Path) -> None:
    log = read_log(_write(tmp_path, HEADER + "#" + "c" * LONG))  # no record, no line end
    assert log.lines == 4 and log.frames.height == 0


def test_long_directive_is_refused_with_its_line(tmp_path: Path) -> None:
    path = _write(tmp_path, HEADER + "%meta note=" + "n" * LONG + "\n" + GOOD)
    with pytest.raises(LogFormatError, match="directive is longer than 64 KiB") as caught:
        read_log(path)
    assert caught.value.line == 4


def test_endless_comment_line_stops_at_the_line_limit(tmp_path: Path,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("tracelab.format.header.MAX_LINE_BYTES", 300_000)
    path = _write(tmp_path, HEADER + "#" + "c" * 400_000 + "\n" + GOOD)
    with pytest.raises(LogFormatError, match="line is longer than") as caught:
        read_log(path)
    assert caught.value.line == 4


# --- DLC and t_ns texts --------------------------------------------------------------------


@pytest.mark.parametrize("dlc", ["16", "99", "XYZ", "", "-1", "+8", "1.0"])
def test_remote_frame_with_a_bad_dlc_is_a_clean_reject(tmp_path: Path, dlc: str) -> None:
    path = _write(tmp_path, HEADER + GOOD + f"5000\tP\tframe\t0C0\tsr\t{dlc}\t-\n")
    log, _ = _both(path)
    assert log.rejects.select("line", "reason").rows() == [  # type: ignore[attr-defined]
        (5, f"dlc '{dlc}' is not 0-15")] or (dlc == "" and log.rejects.height == 1)  # type: ignore[attr-defined]
    with pytest.raises(LogFormatError, match="dlc"):
        read_log(path, strict=True)


def test_remote_frame_dlc_with_a_leading_zero_is_dlc_8(tmp_path: Path) -> None:
    # source: docs/frame-log-format.md grammar, dlc = 1*2DIGIT (0 .. 15): "08" is DLC 8
    path = _write(tmp_path, HEADER + GOOD + "5000\tP\tframe\t0C0\tsr\t08\t-\n")
    log, _ = _both(path, strict=True)
    assert log.frames.select("rtr", "dlc", "data").row(1) == (True, 8, b"")  # type: ignore[attr-defined]


def test_remote_frames_with_bad_dlc_ingest_without_a_crash(tmp_path: Path) -> None:
    from tracelab.store.ingest import ingest_logs

    records = [f"{5000 + i}\tP\tframe\t0C0\tsr\t{d}\t-" for i, d in
               enumerate(["08", "16", "99", "XYZ", "8"])]
    path = _write(tmp_path, HEADER + GOOD + "\n".join(records) + "\n")
    summary = ingest_logs([path], tmp_path / "ds", quiet=True)
    assert (summary.frames, summary.rejects) == (3, 3)


@pytest.mark.parametrize("t_raw", ["00000000000000000005", "0" * 30 + "1", "010000000000000000000"])
def test_t_ns_with_more_than_19_digits_is_rejected_on_both_paths(tmp_path: Path,
                                                                  t_raw: str) -> None:
    # source: docs/frame-log-format.md grammar, t_ns = 1*19DIGIT
    path = _write(tmp_path, HEADER + GOOD + f"{t_raw}\tP\tframe\t0C0\ts\t1\tAA\n")
    log, _ = _both(path)
    assert log.rejects["reason"].to_list() == [  # type: ignore[attr-defined]
        f"t_ns '{t_raw}' is not a non-negative integer (nanoseconds)"]
    for fast in (True, False):
        with pytest.raises(LogFormatError, match="t_ns"):
            read_log(path, strict=True, fast=fast)


def test_t_ns_with_19_digits_and_leading_zeros_is_valid(tmp_path: Path) -> None:
    path = _write(tmp_path, HEADER + GOOD + "0000000000000000005\tP\tframe\t0C0\ts\t1\tAA\n")
    log, _ = _both(path, strict=True)
    assert log.frames["t_ns"].to_list() == [1000, 5]  # type: ignore[attr-defined]


# --- %origin ------------------------------------------------------------------------------


@pytest.mark.parametrize("origin", [
    "2026-13-01T00:00:00Z",  # month 13
    "2026-02-30T00:00:00Z",  # February 30
    "2025-02-29T00:00:00Z",  # 2025 is not a leap year (common practice, no source)
    "2026-04-31T00:00:00Z", "2026-01-01T24:00:00Z", "2026-01-01T23:60:00Z",
    "2026-12-31T23:59:60Z",  # a leap second: no wall time of our own can show it
    "0000-01-01T00:00:00Z", "9990-01-01T00:00:00Z",  # year 0; too late for 2^63 ns after it
    "\u0662\u0660\u0662\u0666-01-01T00:00:00Z",  # Arabic-Indic digits
    "２０２６-01-01T00:00:00Z",  # full-width digits
    "2026-01-01T00:00:00.\u0661Z",
])
def test_impossible_origin_is_an_input_error(tmp_path: Path, origin: str) -> None:
    path = _write(tmp_path, f"%tracelab-frames 1\n%origin {origin}\n%bus P nominal=500000\n")
    with pytest.raises(LogFormatError, match="%origin") as caught:
        read_log(path)
    assert caught.value.line == 2 and caught.value.exit_code == 3


def test_leap_day_origin_is_valid_and_reads_as_wall_time(tmp_path: Path) -> None:
    # 2024 is a leap year (common practice, no source); one day after Feb 29 is Mar 1
    origin = "2024-02-29T23:59:59.5Z"
    log = read_log(_write(tmp_path, f"%tracelab-frames 1\n%origin {origin}\n"
                                    "%bus P nominal=500000\n"), strict=True)
    assert log.header.origin == origin
    assert wall_time(origin, 500_000_000) == "2024-03-01T00:00:00.000000000Z"  # derived


# --- times at the int64 limit ---------------------------------------------------------------


def test_the_frame_bits_bound_is_above_the_longest_frame() -> None:
    from tracelab.physics.bitlength import frame_bits_reference

    # from memory of the Linux kernel's CAN FD length macros; derived: an extended 64-byte
    # CAN FD frame is at most H + 8n + (H + 8n - 1) // 4 + 33 + 12 bits with H = 41
    h, n = 41, 64
    assert h + 8 * n + (h + 8 * n - 1) // 4 + 33 + 12 < FRAME_BITS_BOUND
    worst = max(frame_bits_reference(0x1FFFFFFF, True, False, True, False, True, 15,
                                     bytes([b]) * 64)[0] for b in (0, 0xFF, 0x0F, 0x78, 0x3C))
    assert worst < FRAME_BITS_BOUND


@pytest.mark.parametrize("stamp", ["start", "end"])
def test_frame_whose_end_overflows_int64_is_rejected(tmp_path: Path, stamp: str) -> None:
    header = f"%tracelab-frames 1\n%bus P nominal=500000 stamp={stamp}\n"
    last = last_frame_t_ns(500_000, None)
    assert MAX_T_NS - last == 2_048_000  # derived: 1024 bits at 500 kbit/s = 2.048 ms
    lines = [f"{last}\tP\tframe\t0C0\ts\t8\t{'FF' * 8}", f"{last + 1}\tP\tframe\t0C0\ts\t0\t-",
             f"{MAX_T_NS}\tP\tframe\t1FFFFFFF\txf\t0\t-", f"{MAX_T_NS}\tP\tmark\tlate is fine"]
    path = _write(tmp_path, header + "\n".join(lines) + "\n")
    log, _ = _both(path)
    assert log.rejects["line"].to_list() == [4, 5]  # type: ignore[attr-defined]
    assert log.rejects["reason"][0] == (  # type: ignore[attr-defined]
        f"t_ns {last + 1} leaves no room for the frame's end_ns in 64 bits (on bus 'P' a "
        f"frame starts at t_ns {last} at the latest)")
    assert log.marks.height == 1 and log.frames.height == 1  # type: ignore[attr-defined]
    with pytest.raises(LogFormatError, match="leaves no room"):
        read_log(path, strict=True)


def test_frames_at_the_limit_ingest_with_a_consistent_end(tmp_path: Path) -> None:
    from tracelab.store.dataset import open_dataset
    from tracelab.store.ingest import ingest_logs

    last = last_frame_t_ns(500_000, 2_000_000)
    lines = [f"{last}\tC\tframe\t1FFFFFFF\txfbe\t15\t{'55' * 64}",
             f"{last}\tC\tframe\t7FF\ts\t8\t{'00' * 8}"]
    path = _write(tmp_path, "%tracelab-frames 1\n%bus C nominal=500000 data=2000000 "
                            "stamp=start\n" + "\n".join(lines) + "\n")
    ingest_logs([path], tmp_path / "ds", strict=True, quiet=True)
    rows = open_dataset(tmp_path / "ds").connect().execute(
        "SELECT start_ns, end_ns, duration_ns FROM frames").fetchall()
    assert len(rows) == 2
    assert all(start == last and end == start + duration and end <= MAX_T_NS
               for start, end, duration in rows)


# --- control characters ---------------------------------------------------------------------


@pytest.mark.parametrize(("raw", "shown"), [
    ("a\rb", "a\\rb"), ("a\nb", "a\\nb"), ("\x1b[31mred", "\\x1b[31mred"), ("\a", "\\x07"),
    ("tab\there", "tab\\there"), ("\x00", "\\x00"), ("\x7f\x9b", "\\x7f\\x9b"),
    ("\u202eevil", "\\u202eevil"), ("\u2028", "\\u2028"), ("caf\u00e9 \u00b5s", "caf\u00e9 \u00b5s"),
])
def test_printable_escapes_control_characters(raw: str, shown: str) -> None:
    assert printable(raw) == shown


def test_errors_from_a_log_are_one_escaped_line(tmp_path: Path) -> None:
    path = _write(tmp_path, HEADER + GOOD + "5\tP\tframe\t0C0\ts\t1\tA\x1b[2J\r\x07\n",
                  "odd\nname\r.frames")
    with pytest.raises(LogFormatError) as caught:
        read_log(path, strict=True)
    text = str(caught.value)
    assert not any(ord(ch) < 32 for ch in text)
    assert text.endswith("odd\\nname\\r.frames:5: data 'A\\x1b[2J\\r\\x07' is not hex")
    assert caught.value.reason.startswith("data 'A\x1b")  # the raw reason stays raw


# --- decompression bombs -----------------------------------------------------------------------


def _zstd_bomb(inflated_mib: int) -> bytes:
    """A header, then NUL bytes without a line end: repeated zstd frames of 8 MiB each."""
    frame = zstandard.ZstdCompressor(level=1).compress(b"\0" * (8 << 20))
    return zstandard.compress(HEADER.encode()) + frame * (inflated_mib // 8)


def _gzip_bomb(inflated_mib: int) -> bytes:
    member = gzip.compress(b"\0" * (1 << 20), compresslevel=9, mtime=0)
    return gzip.compress(HEADER.encode(), mtime=0) + member * inflated_mib


@pytest.mark.parametrize("codec", ["zstd", "gzip"])
def test_decompression_bomb_fails_fast_in_bounded_memory(tmp_path: Path, codec: str,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    # 1 GiB inflated; the reader must stop after the 64 MiB line limit plus a block or two
    bomb = _zstd_bomb(1024) if codec == "zstd" else _gzip_bomb(1024)
    path = _write(tmp_path, bomb, "bomb.frames")
    assert len(bomb) < 1_100_000
    inflated = 0
    real_read = LogReader.__init__

    def counting_init(self: LogReader, *args: object, **kwargs: object) -> None:
        real_read(self, *args, **kwargs)  # type: ignore[arg-type]
        stream_read = self._stream.read

        def read(size: int = -1) -> bytes:
            nonlocal inflated
            data = stream_read(size)
            inflated += len(data)
            return data

        self._stream.read = read  # type: ignore[method-assign]

    monkeypatch.setattr(LogReader, "__init__", counting_init)
    tracemalloc.start()
    try:
        with pytest.raises(LogFormatError, match="line is longer than 64 MiB") as caught:
            read_log(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert caught.value.line == 4
    assert inflated <= MAX_LINE_BYTES + 3 * (8 << 20)  # + a block, a step, the damage probe
    assert peak < 3 * MAX_LINE_BYTES, f"peak {peak >> 20} MiB"


def test_zstd_steps_are_bounded_across_frames(tmp_path: Path) -> None:
    # many tiny frames, one step's input holding several: read back exactly
    body = (HEADER + GOOD * 40).encode()
    packed = b"".join(zstandard.compress(body[i:i + 7]) for i in range(0, len(body), 7))
    assert len(packed) > compression.ZSTD_STEP_BYTES
    path = _write(tmp_path, packed, "tiny.frames.zst")
    log = read_log(path, strict=True)
    assert log.frames.height == 40 and log.lines == 43


def test_ingest_of_a_bomb_stops_hashing_its_content(tmp_path: Path,
                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    # the dataset hashes a compressed log's decompressed bytes alongside the reader; once the
    # reader fails, that hash must stop too instead of inflating the whole 16 GiB
    from tracelab.store import ingest

    path = _write(tmp_path, _zstd_bomb(16 << 10), "bomb.frames.zst")
    hashed = 0
    real_open = ingest.open_log

    def counting_open(p: Path, *args: object) -> tuple[object, object]:
        stream, raw = real_open(p, *args)  # type: ignore[arg-type]
        stream_read = stream.read

        def read(size: int = -1) -> bytes:
            nonlocal hashed
            data = stream_read(size)
            hashed += len(data)
            return data

        stream.read = read  # type: ignore[method-assign]
        return stream, raw

    monkeypatch.setattr(ingest, "open_log", counting_open)
    with pytest.raises(LogFormatError, match="line is longer than 64 MiB"):
        ingest.ingest_logs([path], tmp_path / "ds", quiet=True)
    assert hashed < (8 << 30)
    assert not (tmp_path / "ds").exists()


@pytest.mark.parametrize("strict", [False, True])
def test_damage_further_on_is_named_instead_of_the_fault_it_caused(tmp_path: Path,
                                                                   strict: bool) -> None:
    # found by the fuzzer: a flipped bit inside gzip data garbled the %origin line long before
    # the member's CRC showed the damage at its end; the message named the origin
    import random

    from tests.fuzz.test_mutations import HEADER as FUZZ_HEADER
    from tests.fuzz.test_mutations import _compress

    log = (FUZZ_HEADER + "678960\tP\tframe\t008AEFB6\tx\t8\tef83d24361919cfb\n").encode()
    packed = _compress(log, "gzip", "flip", random.Random(71))
    with pytest.raises((OSError, EOFError)):
        gzip.decompress(packed)  # the codec itself refuses it
    path = _write(tmp_path, packed, "flip.frames.gz")
    with pytest.raises(LogFormatError, match="corrupt or truncated gzip data") as caught:
        read_log(path, strict=strict)
    assert "; it shows first as line 2: %origin must be" in caught.value.reason


def test_a_byte_order_mark_is_named(tmp_path: Path) -> None:
    path = _write(tmp_path, b"\xef\xbb\xbf" + (HEADER + GOOD).encode())
    with pytest.raises(LogFormatError, match="starts with a byte order mark") as caught:
        read_log(path)
    assert caught.value.line == 1
