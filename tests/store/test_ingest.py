"""ingest_logs: frames columns and physics, reconciliation, idempotence, atomicity."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from tracelab.errors import StoreError
from tracelab.store import dataset as dataset_module
from tracelab.store import ingest as ingest_module
from tracelab.store import schema
from tracelab.store.dataset import open_dataset
from tracelab.store.ingest import ingest_logs

HEADER = ("%tracelab-frames 1\n%origin 2026-11-30T21:04:05Z\n"
          "%bus P nominal=500000 stamp=end\n%bus S nominal=250000 stamp=start\n"
          "%bus C nominal=500000 data=2000000\n%meta run=r1 vehicle=utv-07\n")


def _log(path: Path, records: list[str], header: str = HEADER) -> Path:
    path.write_text(header + "".join(r + "\n" for r in records))
    return path


def _snapshot(dataset: Path) -> dict[str, bytes]:
    return {str(p.relative_to(dataset)): p.read_bytes() for p in sorted(dataset.rglob("*"))
            if p.is_file()}


def test_frames_have_the_schema_and_exact_timing(tmp_path: Path) -> None:
    log = _log(tmp_path / "a.frames", [
        "1000000\tP\tframe\t000\ts\t0\t-",  # hand-worked in the issue: 53 bits
        "2000000\tS\tframe\t7FF\tsr\t0\t-",  # 50 bits
        "# a comment", "",
        "3000000\tC\tframe\t123\tsfb\t8\t0011223344556677",
    ])
    summary = ingest_logs([log], tmp_path / "ds", quiet=True)
    assert summary.frames == 3 and summary.rejects == 0
    frames = open_dataset(tmp_path / "ds").table("frames").collect()
    assert frames.schema == schema.FRAMES
    p, s, c = frames.sort("line").to_dicts()
    # derived: the worked examples of docs/frame-physics.md (base id 0x000, DLC 0: 6 stuff
    # bits, 53 bits with intermission; base id 0x7FF remote DLC 0: 50 bits), checked bit for
    # bit in tests/physics/test_bitlength.py; bit time = 1 / bit rate
    assert (p["bits"], p["duration_ns"]) == (53, 53 * 2000)
    assert (s["bits"], s["duration_ns"]) == (50, 50 * 4000)
    # stamp=end: t_ns is the end of EOF, 3 intermission bits follow (DEVELOPERS.md)
    assert p["start_ns"] == 1_000_000 - (53 - 3) * 2000 and p["end_ns"] == 1_006_000
    assert (s["start_ns"], s["end_ns"]) == (2_000_000, 2_000_000 + 200_000)
    assert c["duration_ns"] < c["bits"] * 2000  # data phase at 2 Mbit/s is faster
    assert c["end_ns"] - c["start_ns"] == c["duration_ns"]
    assert (p["run"], p["file"], p["line"]) == ("r1", str(log), 7)


def test_manifest_reconciles_every_line(tmp_path: Path) -> None:
    log = _log(tmp_path / "a.frames", [
        "10\tP\tframe\t0C0\ts\t1\tAA", "# c", "", "20\tP\terror\tbit\tdata\t-\t-\tinv",
        "30\tP\tstatus\tinv\t8\t0", "5\tP\tmark\tback in time", "40\t*\tmark\tall",
        "50\tP\tloss\t-\t60", "bad line", "60\tQ\tframe\t1\ts\t0\t-",
    ])
    summary = ingest_logs([log], tmp_path / "ds", quiet=True)
    row = open_dataset(tmp_path / "ds").manifest().row(0, named=True)
    assert row["lines"] == 16 and row["header_lines"] == 8
    assert (row["frames"], row["errors"], row["status"], row["marks"], row["losses"]) == (
        1, 1, 1, 2, 1)
    assert row["rejects"] == 2
    assert row["lines"] == row["header_lines"] + 6 + row["rejects"]
    assert (row["backward_steps"], row["first_backward_line"]) == (1, 12)
    assert (row["first_t_ns"], row["last_t_ns"]) == (5, 50)
    assert json.loads(row["meta"]) == {"run": "r1", "vehicle": "utv-07"}
    assert [b["stamp"] for b in json.loads(row["buses"])] == ["end", "start", "end"]
    assert row["origin"] == "2026-11-30T21:04:05Z" and row["vehicle"] == "utv-07"
    assert "16 lines = 8 header/comment/blank + 6 records" in summary.describe()
    assert "2 lines rejected" in summary.describe()


def test_run_defaults_to_the_file_name(tmp_path: Path) -> None:
    log = _log(tmp_path / "night-3.frames", ["1\tP\tmark\tx"],
               header="%tracelab-frames 1\n%bus P nominal=500000\n")
    ingest_logs([log], tmp_path / "ds", quiet=True)
    assert open_dataset(tmp_path / "ds").runs() == ["night-3"]


def test_every_part_has_every_table(tmp_path: Path) -> None:
    log = _log(tmp_path / "a.frames", ["1\tP\tmark\tx"])
    ingest_logs([log], tmp_path / "ds", quiet=True)
    (part,) = (tmp_path / "ds" / "parts").iterdir()
    assert sorted(p.name for p in part.iterdir()) == sorted(schema.TABLES)
    con = open_dataset(tmp_path / "ds").connect()
    assert con.execute("select count(*) from frames").fetchone() == (0,)


def test_same_file_is_skipped_unless_forced(tmp_path: Path) -> None:
    log = _log(tmp_path / "a.frames", ["1\tP\tmark\tx"])
    copy = _log(tmp_path / "copy.frames", ["1\tP\tmark\tx"])
    ingest_logs([log], tmp_path / "ds", quiet=True)
    before = _snapshot(tmp_path / "ds")
    again = ingest_logs([log, copy], tmp_path / "ds", quiet=True)
    assert _snapshot(tmp_path / "ds") == before  # a no-op run rewrites nothing
    assert again.skipped == [str(log), str(copy)] and again.files == []
    ds = open_dataset(tmp_path / "ds")
    assert ds.connect().execute("select count(*) from marks").fetchone() == (1,)
    forced = ingest_logs([log], tmp_path / "ds", force=True, quiet=True)
    assert len(forced.files) == 1 and ds.manifest().height == 1
    assert ds.connect().execute("select count(*) from marks").fetchone() == (1,)


def test_second_file_extends_the_dataset(tmp_path: Path) -> None:
    a = _log(tmp_path / "a.frames", ["1\tP\tmark\tx"])
    b = _log(tmp_path / "b.frames", ["2\tP\tmark\ty"], header=HEADER.replace("r1", "r2"))
    ingest_logs([a], tmp_path / "ds", quiet=True)
    ingest_logs([b], tmp_path / "ds", quiet=True)
    ds = open_dataset(tmp_path / "ds")
    assert ds.runs() == ["r1", "r2"] and ds.manifest()["file"].to_list() == [str(a), str(b)]


def test_interrupted_ingest_leaves_the_dataset_as_it_was(tmp_path: Path,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    a = _log(tmp_path / "a.frames", ["1\tP\tmark\tx"])
    ingest_logs([a], tmp_path / "ds", quiet=True)
    before = _snapshot(tmp_path / "ds")
    b = _log(tmp_path / "b.frames", ["1\tP\tframe\t0C0\ts\t0\t-"] * 3,
             header=HEADER.replace("r1", "r2"))
    c = _log(tmp_path / "c.frames", ["9\tP\tmark\tz"], header=HEADER.replace("r1", "r3"))
    calls = {"n": 0}
    real_write = ingest_module._PartWriter.write

    def crash_on_second_file(self: ingest_module._PartWriter, table: str,
                             frame: pl.DataFrame, index: int) -> None:
        if self.run == "r3":
            raise KeyboardInterrupt  # the user pressed Ctrl-C half-way
        calls["n"] += 1
        real_write(self, table, frame, index)

    monkeypatch.setattr(ingest_module._PartWriter, "write", crash_on_second_file)
    with pytest.raises(KeyboardInterrupt):
        ingest_logs([b, c], tmp_path / "ds", quiet=True)
    assert calls["n"] > 0  # the first file had been staged
    assert _snapshot(tmp_path / "ds") == before


def test_crash_before_the_manifest_keeps_new_parts_invisible(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    a = _log(tmp_path / "a.frames", ["1\tP\tmark\tx"])
    ingest_logs([a], tmp_path / "ds", quiet=True)
    b = _log(tmp_path / "b.frames", ["2\tP\tmark\ty"], header=HEADER.replace("r1", "r2"))

    def fail(target: Path, write: object) -> Path:
        raise OSError("disk full")

    monkeypatch.setattr(dataset_module, "replace_atomically", fail)
    with pytest.raises(StoreError, match=r"cannot commit the ingest \(disk full\)"):
        ingest_logs([b], tmp_path / "ds", quiet=True)
    monkeypatch.undo()
    ds = open_dataset(tmp_path / "ds")
    assert ds.runs() == ["r1"]
    assert ds.connect().execute("select text from marks").fetchall() == [("x",)]
    ingest_logs([b], tmp_path / "ds", quiet=True)  # and a retry commits cleanly
    assert ds.runs() == ["r1", "r2"]


def test_many_chunks_write_many_parts_with_the_same_rows(tmp_path: Path,
                                                        monkeypatch: pytest.MonkeyPatch) -> None:
    records = [f"{(t - 40 * (t % 97 == 0)) * 1000}\t{'PC'[t % 3 == 0]}\tframe\t{t % 0x7FF:03X}\ts\t1\t"
               f"{t % 256:02X}" for t in range(2000)]  # every 97th record steps back
    log = _log(tmp_path / "a.frames", records)
    monkeypatch.setattr("tracelab.format.reader.CHUNK_BYTES", 1000)
    ingest_logs([log], tmp_path / "small", quiet=True)
    monkeypatch.undo()
    ingest_logs([log], tmp_path / "big", quiet=True)
    small = open_dataset(tmp_path / "small").table("frames").collect()
    big = open_dataset(tmp_path / "big").table("frames").collect()
    assert len(open_dataset(tmp_path / "small").part_files("frames")) > 10
    assert small.drop("file").equals(big.drop("file"))
    m_small = open_dataset(tmp_path / "small").manifest()
    m_big = open_dataset(tmp_path / "big").manifest()
    columns = ["lines", "header_lines", "frames", "backward_steps", "first_backward_line"]
    assert m_small.select(columns).row(0) == m_big.select(columns).row(0)
    assert m_big["backward_steps"][0] == 20 and m_big["first_backward_line"][0] == 7 + 97
