"""Parts layouts: a dataset written by tracelab 0.1 (layout 1: start/end/duration stored) reads
as it is, the same as a fresh ingest (layout 2: derived in the view); a newer layout is
refused with one line; the part files stay plain Parquet for DuckDB and pyarrow."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import duckdb
import polars as pl
import pyarrow.parquet as pq
import pytest

from tracelab.store import schema
from tracelab.store.dataset import open_dataset
from tracelab.store.ingest import ingest_logs

DATA = Path(__file__).parent / "data"
#: made by tracelab 0.1.0 (commit 49c91dd) from layout-one.frames: five buses (stamp end and
#: start, 83,333 bit/s whose bit time is not whole nanoseconds, FD with 2, 3 and 5 Mbit/s data)
OLD = DATA / "layout-one.ds"
LOG = DATA / "layout-one.frames"


@pytest.fixture
def old(tmp_path: Path) -> Path:
    copy = tmp_path / "old.ds"
    shutil.copytree(OLD, copy)  # reading may create DATASET/.tmp: never inside the repo
    return copy


def _views(path: Path) -> dict[str, pl.DataFrame]:
    con = open_dataset(path).connect()
    try:
        return {table: con.sql(f"SELECT * FROM {table} ORDER BY line").pl()
                for table in schema.TABLES}
    finally:
        con.close()


def test_a_layout_one_dataset_reads_as_a_fresh_ingest_does(old: Path, tmp_path: Path) -> None:
    assert pq.read_schema(next((old / "parts").glob("*/frames/0.parquet"))).names == list(
        schema.FRAMES)  # the fixture really stores every column
    ingest_logs([LOG], tmp_path / "new.ds", quiet=True)
    new = tmp_path / "new.ds"
    assert open_dataset(new).manifest()["layout"].to_list() == [schema.PARTS_LAYOUT]
    assert open_dataset(old).manifest()["layout"].to_list() == [None]
    before, after = _views(old), _views(new)
    assert before["frames"].height == 400
    for table in schema.TABLES:  # same names, types and values, frame by frame (the file
        # column names the log as it was given: relative then, absolute here)
        assert before[table].columns == after[table].columns, table
        assert before[table].drop("file").equals(after[table].drop("file")), table


def test_a_layout_one_dataset_takes_new_files(old: Path, tmp_path: Path) -> None:
    log = tmp_path / "second.frames"
    log.write_text(LOG.read_text().replace("run=layout-one", "run=second"))
    ingest_logs([log], old, quiet=True)
    assert sorted(open_dataset(old).manifest()["layout"].to_list(), key=str) == [2, None]
    frames = _views(old)["frames"]
    one, two = (frames.filter(pl.col("run") == run).drop("run", "file") for run in
                ("layout-one", "second"))
    assert one.height == 400 and one.equals(two)  # layout 1 stored = layout 2 derived


def test_a_newer_layout_is_refused_with_one_line(old: Path) -> None:
    manifest = pl.read_parquet(old / "manifest.parquet").with_columns(layout=pl.lit(3))
    manifest.write_parquet(old / "manifest.parquet")
    done = subprocess.run([sys.executable, "-m", "tracelab.cli", "info", str(old)],
                          capture_output=True, text=True, check=False)
    assert done.returncode == 4 and done.stdout == ""
    assert done.stderr.count("\n") == 1 and done.stderr.startswith("tracelab: ")
    assert "newer tracelab (parts layout 3" in done.stderr and "re-ingest" in done.stderr


def test_parts_are_plain_parquet_and_the_derivation_is_the_documented_one(
        tmp_path: Path) -> None:
    """Plain DuckDB and pyarrow read the part files without tracelab; on the 500 kbit/s
    buses a bit lasts 2,000 ns, so durations and start/end follow from bits by hand."""
    ingest_logs([LOG], tmp_path / "ds", quiet=True)
    files = sorted((tmp_path / "ds" / "parts").glob("*/frames/*.parquet"))
    stored = pq.read_table(files).to_pydict()
    assert list(stored) == list(schema.FRAMES_STORED)
    plain = duckdb.sql(
        f"SELECT line, bus, bits, data_bits, t_ns FROM read_parquet({[str(f) for f in files]}) "
        "WHERE bus IN ('P', 'C') ORDER BY line").fetchall()
    view = {row[0]: row[1:] for row in open_dataset(tmp_path / "ds").connect().execute(
        "SELECT line, start_ns, end_ns, duration_ns FROM frames").fetchall()}
    assert len(plain) > 100
    for line, bus, bits, data_bits, t_ns in plain:
        # source: bit time = 1 / bit rate (500 kbit/s: 2000 ns; bus C's data phase at
        # 2 Mbit/s: 500 ns); docs/frame-log-format.md: stamp=end is the end of EOF, 3 bits
        # of intermission follow; bus P is stamp=end, bus C stamp=start (layout-one.frames)
        duration = (bits - data_bits) * 2000 + data_bits * 500
        start = t_ns - (duration - 3 * 2000) if bus == "P" else t_ns
        assert view[line] == (start, start + duration, duration)


def test_the_frame_files_are_named_only_when_the_view_reads_them_in_one_scan(
        old: Path, tmp_path: Path) -> None:
    """Dataset.frame_files (the replay's direct read): the files of a one-scan view, in the
    view's row order; None once two layouts need two scans."""
    fresh = tmp_path / "fresh.ds"
    ingest_logs([LOG], fresh, quiet=True)
    ds = open_dataset(fresh)
    with ds.connect() as con:
        assert ds.frame_files == ds.part_files("frames")
        stored = pl.concat(pl.read_parquet(f, columns=["t_ns", "id"]) for f in ds.frame_files)
        assert stored.equals(con.sql("SELECT t_ns, id FROM frames").pl())
    log = tmp_path / "second.frames"
    log.write_text(LOG.read_text().replace("run=layout-one", "run=second"))
    ingest_logs([log], old, quiet=True)  # layout 1 and layout 2 parts: two scans
    mixed = open_dataset(old)
    with mixed.connect():
        assert mixed.frame_files is None
