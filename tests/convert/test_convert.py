"""``tracelab convert``: tables the tests write themselves (Python's csv module, gzip, zstandard)
in several layouts, malformed rows, accounting, --strict, and the output ingested --strict."""

from __future__ import annotations

import csv
import datetime as dt
import gzip
import io
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import zstandard

from tests.ingest_check import ingest_strict
from tracelab.cli import main
from tracelab.format.writer import frame_line
from tracelab.inputs.convert import ConvertOptions, convert_tables, frame_lines, parse_columns
from tracelab.inputs.options import parse_bus_option


def _write_table(path: Path, rows: list[list[str]], delimiter: str = ",") -> Path:
    buffer = io.StringIO()
    csv.writer(buffer, delimiter=delimiter, lineterminator="\n").writerows(rows)
    data = buffer.getvalue().encode()
    if path.suffix == ".gz":
        data = gzip.compress(data)
    elif path.suffix == ".zst":
        data = zstandard.ZstdCompressor().compress(data)
    path.write_bytes(data)
    return path


def _records(log: Path) -> list[str]:
    return [line for line in log.read_text().splitlines() if line and line[0].isdigit()]


def _header(log: Path) -> list[str]:
    return [line for line in log.read_text().splitlines() if line.startswith("%")]


def _epoch_s(iso: str) -> int:
    return int(dt.datetime.fromisoformat(iso).timestamp())


def test_csv_with_header_epoch_seconds_two_buses(tmp_path: Path) -> None:
    t0 = _epoch_s("2026-11-30T21:04:05+00:00")
    table = _write_table(tmp_path / "bench.csv", [
        ["Time", "Channel", "ID", "Payload"],
        [f"{t0}.000000", "can1", "0C0", "11 22 33 44 55 66 77 FF"],
        [f"{t0}.001250", "can1", "18DAF110", "02-10-03-00-00-00-00-00"],
        [f"{t0}.0013", "can2", "7df", ""],
        [f"{t0}.002", "can2", "123", "00112233445566778899AABB"],
    ])
    log = tmp_path / "bench.frames"
    code = main(["convert", str(table), "-o", str(log), "--quiet",
                 "--bus", "can1=P,nominal=500000", "--bus", "can2=C,nominal=500000,data=2000000",
                 "--columns", "time=Time,id=ID,data=Payload,bus=Channel",
                 "--meta", "run=r7", "--meta", "vehicle=rig-2"])
    assert code == 0
    # source: Python's datetime module gives the epoch of the first row as UTC
    assert "%origin 2026-11-30T21:04:05.000000000Z" in _header(log)
    assert "%meta run=r7 vehicle=rig-2" in _header(log)
    assert _records(log) == [
        frame_line(0, "P", 0x0C0, False, False, False, False, False, 8,
                   bytes.fromhex("11223344556677FF")),
        # derived: more than 3 hex digits -> extended; 1.25 ms after the first row
        frame_line(1_250_000, "P", 0x18DAF110, True, False, False, False, False, 8,
                   bytes.fromhex("0210030000000000")),
        frame_line(1_300_000, "C", 0x7DF, False, False, False, False, False, 0, b""),
        # source: ISO 11898-1:2015 Table 5, 12 data bytes is DLC 9 (CAN FD)
        frame_line(2_000_000, "C", 0x123, False, False, True, False, False, 9,
                   bytes.fromhex("00112233445566778899AABB")),
    ]
    manifest = ingest_strict([log], tmp_path / "ds")
    assert manifest["frames"].to_list() == [4]
    assert manifest["run"].to_list() == ["r7"]


def test_tsv_without_header_by_number_relative_ms_gzip(tmp_path: Path) -> None:
    rows = [["12.5", "x", "1", "0", "2", "1F0A0001", "AA:BB"],
            ["13", "x", "0", "0", "0", "7FF", "-"],
            ["0.000001", "x", "0", "1", "1", "100", ""]]
    table = _write_table(tmp_path / "t.tsv.gz", rows, delimiter="\t")
    log = tmp_path / "t.frames"
    opts = ConvertOptions(buses=(parse_bus_option("B,nominal=250000"),),
                          columns=parse_columns("time=1,ext=3,rtr=4,dlc=5,id=6,data=7"),
                          time_unit="ms", delimiter="\t", header=False)
    summary = convert_tables([table], log, opts, quiet=True)
    assert (summary.frames, summary.tables[0].skipped, summary.rejected) == (3, 0, 0)
    assert not any(line.startswith("%origin") for line in _header(log))  # relative times
    assert _records(log) == [
        frame_line(12_500_000, "B", 0x1F0A0001, True, False, False, False, False, 2,
                   b"\xaa\xbb"),
        frame_line(13_000_000, "B", 0x7FF, False, False, False, False, False, 0, b""),
        # a remote frame keeps its DLC and carries no data; 0.000001 ms is 1 ns
        frame_line(1, "B", 0x100, False, True, False, False, False, 1, b""),
    ]
    ingest_strict([log], tmp_path / "ds")


def test_layouts_compressed_quoted_and_decimal_ids(tmp_path: Path) -> None:
    rows = [["t_us", "ident", "bytes", "kind"],
            ["1000", "192", "11,22", "data"],        # quoted: the payload holds the delimiter
            ["2000", "2048", "0102030405060708", "d"],  # decimal 2048 > 2047 -> extended
            ["3000", "2047", "", "remote"]]
    for suffix in (".csv", ".csv.zst"):
        table = _write_table(tmp_path / f"t{suffix}", rows)
        log = tmp_path / f"t{suffix}.frames"
        opts = ConvertOptions(buses=(parse_bus_option("A,nominal=125000"),),
                              columns=parse_columns("time=t_us,id=ident,data=bytes,rtr=kind"),
                              time_unit="us", id_base=10)
        convert_tables([table], log, opts, quiet=True)
        assert _records(log) == [
            frame_line(1_000_000, "A", 192, False, False, False, False, False, 2, b"\x11\x22"),
            frame_line(2_000_000, "A", 2048, True, False, False, False, False, 8,
                       bytes(range(1, 9))),
            frame_line(3_000_000, "A", 2047, False, True, False, False, False, 0, b""),
        ]
    assert '"11,22"' in (tmp_path / "t.csv").read_text()  # the csv module really quoted it


#: (row as written, reason the converter must give); the table has columns time,id,data,dlc,fd
MALFORMED = [
    (["abc", "100", "00", "1", "0"], "time 'abc' is not a non-negative decimal number"),
    (["-5", "100", "00", "1", "0"], "time '-5' is not a non-negative decimal number"),
    (["1", "G00", "00", "1", "0"], "id 'G00' is not 1-8 hex digits"),
    (["1", "20000000", "00", "1", "0"],
     "id '20000000' is out of range for a 29-bit identifier (max 1FFFFFFF)"),
    (["1", "100", "0", "1", "0"], "data '0' is not hex bytes"),
    (["1", "100", "zz", "1", "0"], "data 'zz' is not hex bytes"),
    (["1", "100", "0011", "1", "0"], "data has 2 bytes, DLC 1 needs 1"),
    (["1", "100", "00", "16", "0"], "dlc '16' is not 0-15"),
    (["1", "100", "00" * 9, "9", "0"],
     "data has 9 bytes; a classic frame carries at most 8 (set the fd column?)"),
    (["1", "100", "00" * 10, "9", "1"],
     "data has 10 bytes, not a CAN FD payload length (0-8, 12, 16, 20, 24, 32, 48, 64)"),
    (["1", "100", "00", "1", "maybe"], "fd value 'maybe' is not a flag (1/0, true/false, yes/no)"),
    (["1", "100"], "row has 2 field(s); the columns asked for need 5 (delimiter ',')"),
]


@pytest.mark.parametrize("path", ["polars reader", "general"])
def test_malformed_rows_are_named_and_accounted(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                path: str) -> None:
    if path == "general":  # blocks with quotes or bad UTF-8 take this path; same results
        monkeypatch.setattr("tracelab.inputs.convert._rows_fast", lambda *a: None)
    good = [["0.5", "100", "0011223344556677", "8", "0"], ["0.75", "1ABCDEF", "", "0", "1"]]
    rows = [["time", "id", "data", "dlc", "fd"], good[0], *[r for r, _ in MALFORMED], [],
            ["   "], good[1]]
    table = _write_table(tmp_path / "bad.csv", rows)
    log = tmp_path / "bad.frames"
    opts = ConvertOptions(buses=(parse_bus_option("A,nominal=500000"),),
                          columns=parse_columns("time=time,id=id,data=data,dlc=dlc,fd=fd"))
    # a tiny block size: the rows cross many blocks, line numbers must not drift
    summary = convert_tables([table], log, opts, quiet=True, block_bytes=64)
    result = summary.tables[0]
    n_lines = len(rows)
    assert result.lines == n_lines
    assert result.lines == result.converted + result.skipped + result.rejected
    assert (result.converted, result.skipped, result.rejected) == (2, 3, len(MALFORMED))
    assert result.first_rejects == [(3 + i, reason) for i, (_, reason) in
                                    enumerate(MALFORMED[:5])]
    # 0.75 s relative; fd=1 with no data: CAN FD, DLC 0
    assert _records(log)[1] == "750000000\tA\tframe\t01ABCDEF\txf\t0\t-"
    manifest = ingest_strict([log], tmp_path / "ds")
    assert manifest["frames"].to_list() == [2]  # the table's valid rows, nothing else


@pytest.mark.parametrize(("row", "reason"), MALFORMED, ids=[r for _, r in MALFORMED])
def test_strict_stops_at_the_first_bad_row(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                                           row: list[str], reason: str) -> None:
    table = _write_table(tmp_path / "one.csv", [["time", "id", "data", "dlc", "fd"],
                                                ["0", "100", "", "0", "0"], row])
    log = tmp_path / "one.frames"
    code = main(["convert", str(table), "-o", str(log), "--strict", "--quiet",
                 "--bus", "A,nominal=500000", "--columns", "time=time,id=id,data=data,dlc=dlc,fd=fd"])
    err = capsys.readouterr().err.strip()
    assert code == 3
    assert err == f"tracelab: {table}:3: {reason}"
    assert not log.exists() and not list(tmp_path.glob(".*partial*"))


def test_identifier_width_inference(tmp_path: Path) -> None:
    rows = [["t", "id", "d"], ["0", "7FF", ""], ["0", "800", ""], ["0", "0C0", ""],
            ["0", "00C0", ""], ["0", "0x1", ""], ["0", "0x00000001", ""]]
    table = _write_table(tmp_path / "ids.csv", rows)
    log = tmp_path / "ids.frames"
    convert_tables([table], log, ConvertOptions(buses=(parse_bus_option("A,nominal=500000"),),
                                                columns=parse_columns("time=t,id=id,data=d")),
                   quiet=True)
    forms = [line.split("\t")[3:5] for line in _records(log)]
    # derived (docs/convert.md): > 7FF or more than 3 hex digits -> extended
    assert forms == [["7FF", "s"], ["00000800", "x"], ["0C0", "s"], ["000000C0", "x"],
                     ["001", "s"], ["00000001", "x"]]


def test_vectorised_lines_equal_the_reference_writer() -> None:
    rng = np.random.default_rng(3)
    n = 2000
    ext = rng.random(n) < 0.5
    ids = np.where(ext, rng.integers(0, 0x1FFFFFFF + 1, n), rng.integers(0, 0x800, n))
    fd = rng.random(n) < 0.5
    rtr = ~fd & (rng.random(n) < 0.2)
    brs = fd & (rng.random(n) < 0.5)
    esi = fd & (rng.random(n) < 0.5)
    dlc = np.where(rtr, rng.integers(0, 16, n), rng.integers(0, 9, n))
    payloads = [b"" if r else bytes(rng.integers(0, 256, int(d), dtype=np.uint8))
                for r, d in zip(rtr, dlc, strict=True)]
    t_ns = rng.integers(0, 2**62, n)
    good = pl.DataFrame({
        "t_ns": t_ns, "alias": ["C"] * n, "id": ids.astype(np.uint32), "ext": ext, "rtr": rtr,
        "fd": fd, "brs": brs, "esi": esi, "dlc": dlc,
        "data": [p.hex().upper() or "-" for p in payloads]})
    expected = [frame_line(int(t), "C", int(i), bool(x), bool(r), bool(f), bool(b), bool(e),
                           int(d), p)
                for t, i, x, r, f, b, e, d, p in zip(t_ns, ids, ext, rtr, fd, brs, esi, dlc,
                                                     payloads, strict=True)]
    assert frame_lines(good).to_list() == expected


def test_usage_errors_are_one_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    table = _write_table(tmp_path / "t.csv", [["time", "id", "data"], ["0", "1", ""]])
    out = str(tmp_path / "o.frames")
    base = ["convert", str(table), "-o", out, "--quiet", "--bus", "A,nominal=500000"]
    assert main([*base, "--columns", "time=tme,id=id,data=data"]) == 2
    assert "no column 'tme' for time=; did you mean 'time'?" in capsys.readouterr().err
    assert main([*base, "--columns", "time=time,id=id"]) == 2
    assert "data= missing" in capsys.readouterr().err
    assert main([*base, "--columns", "time=time,id=id,data=data", "--time-unit", "min"]) == 2
    assert main(["convert", str(table), "-o", out, "--bus", "A,nominal=fast",
                 "--columns", "time=time,id=id,data=data"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "nominal='fast'" in err


def test_epoch_rows_before_the_origin_are_rejected_and_origin_option(tmp_path: Path) -> None:
    t0 = _epoch_s("2026-11-30T21:04:05+00:00")
    table = _write_table(tmp_path / "t.csv", [["t", "id", "d"], [f"{t0}.5", "1", ""],
                                              [f"{t0}.25", "2", ""]])
    opts = ConvertOptions(buses=(parse_bus_option("A,nominal=500000"),),
                          columns=parse_columns("time=t,id=id,data=d"))
    summary = convert_tables([table], tmp_path / "a.frames", opts, quiet=True)
    assert summary.origin == "2026-11-30T21:04:05.500000000Z"
    assert summary.tables[0].first_rejects == [(3, f"time '{t0}.25' is before the origin")]
    earlier = ConvertOptions(buses=opts.buses, columns=opts.columns,
                             origin="2026-11-30T21:04:05Z")
    convert_tables([table], tmp_path / "b.frames", earlier, quiet=True)
    assert [r.split("\t")[0] for r in _records(tmp_path / "b.frames")] == ["500000000",
                                                                          "250000000"]
