"""Two writers on one dataset: the second waits for the lock or exits 2 naming the holder,
and the dataset stays consistent (every listed part present and readable, counts adding up,
no staging folder left)."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path

import polars as pl
import pytest

from tracelab.store.dataset import PARTS_DIR, STAGING_PREFIX, open_dataset, parquet_intact
from tracelab.store.ingest import ingest_logs
from tracelab.store.lock import LOCK_FILE, write_lock

CLI = "import sys; from tracelab.cli import main; sys.exit(main(sys.argv[1:]))"
HEADER = "%tracelab-frames 1\n%bus P nominal=500000 stamp=end\n"


def _log(path: Path, frames: int, run: str, start_ns: int = 0) -> Path:
    """``frames`` frames of identifier 0x100 every 1 ms (test data, written once)."""
    body = "".join(f"{start_ns + i * 1_000_000}\tP\tframe\t100\ts\t8\t0011223344556677\n"
                   for i in range(frames))
    path.write_text(f"{HEADER}%meta run={run}\n{body}")
    return path


def _tracelab(*args: str, timeout_s: float) -> subprocess.Popen[str]:
    env = {**os.environ, "TRACELAB_LOCK_TIMEOUT": str(timeout_s)}
    return subprocess.Popen([sys.executable, "-c", CLI, *args], env=env, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def _assert_consistent(dataset: Path) -> pl.DataFrame:
    ds = open_dataset(dataset)
    manifest = ds.manifest()
    for table in ("frames", "errors", "rejects"):
        files = ds.part_files(table)
        assert files and all(parquet_intact(f) for f in files)
    with ds.connect() as con:
        assert con.execute("SELECT count(*) FROM frames").fetchone() == (
            int(manifest["frames"].sum()),)
    leftovers = [p.name for p in (dataset / PARTS_DIR).iterdir()
                 if p.name.startswith(".")]
    assert leftovers == []  # no staging or trash folder of either writer
    return manifest


def test_two_ingests_at_once_both_land(tmp_path: Path) -> None:
    big = _log(tmp_path / "big.frames", 150_000, "big")
    small = _log(tmp_path / "small.frames", 100, "small")
    dataset = tmp_path / "ds"
    first = _tracelab("ingest", str(big), "-o", str(dataset), "-q", timeout_s=300)
    second = _tracelab("ingest", str(small), "-o", str(dataset), "-q", timeout_s=300)
    for proc in (first, second):
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err
        assert "Traceback" not in err
    manifest = _assert_consistent(dataset)
    assert sorted(manifest["run"].to_list()) == ["big", "small"]
    assert sorted(manifest["frames"].to_list()) == [100, 150_000]


def test_ingest_and_an_analysis_at_once(tmp_path: Path) -> None:
    dataset = tmp_path / "ds"
    ingest_logs([_log(tmp_path / "a.frames", 2_000, "a")], dataset, quiet=True)
    big = _log(tmp_path / "big.frames", 150_000, "big", start_ns=10**12)
    ingest = _tracelab("ingest", str(big), "-o", str(dataset), "-q", timeout_s=300)
    timing = _tracelab("timing", str(dataset), timeout_s=300)
    for proc in (ingest, timing):
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err
    manifest = _assert_consistent(dataset)
    assert sorted(manifest["run"].to_list()) == ["a", "big"]
    timing_rows = open_dataset(dataset).read_analysis("timing")
    assert timing_rows is not None and "a" in timing_rows["run"].to_list()


def test_a_second_writer_gives_up_naming_the_holder(tmp_path: Path) -> None:
    dataset = tmp_path / "ds"
    ingest_logs([_log(tmp_path / "a.frames", 10, "a")], dataset, quiet=True)
    before = open_dataset(dataset).manifest()
    other = _log(tmp_path / "b.frames", 10, "b")
    with write_lock(dataset, "test holder"):  # this process holds it; the child must not wait
        for args in (("ingest", str(other), "-o", str(dataset)), ("load", str(dataset))):
            proc = _tracelab(*args, timeout_s=0.3)
            _, err = proc.communicate(timeout=120)
            assert proc.returncode == 2, err
            lines = err.strip().splitlines()
            assert len(lines) == 1, err
            assert f"pid {os.getpid()} on {socket.gethostname()}" in lines[0]
            assert "test holder" in lines[0] and "since 20" in lines[0]
    assert open_dataset(dataset).manifest().equals(before)
    assert (dataset / LOCK_FILE).read_text() == ""  # released: no holder named any more


def test_the_lock_is_reentrant_in_one_process(tmp_path: Path) -> None:
    with write_lock(tmp_path, "outer"), write_lock(tmp_path, "inner"):
        assert "outer" in (tmp_path / LOCK_FILE).read_text()


def test_start_up_clean_up_keeps_a_live_writers_staging(tmp_path: Path) -> None:
    dataset = tmp_path / "ds"
    ingest_logs([_log(tmp_path / "a.frames", 10, "a")], dataset, quiet=True)
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    host = socket.gethostname()
    parts = dataset / PARTS_DIR
    live = parts / f"{STAGING_PREFIX}{os.getpid()}@{host}-aaaa"
    dead = parts / f"{STAGING_PREFIX}{int(gone.stdout)}@{host}-bbbb"
    legacy = parts / f"{STAGING_PREFIX}0123456789abcdef"
    for folder in (live, dead, legacy):
        folder.mkdir()
    ingest_logs([_log(tmp_path / "b.frames", 10, "b")], dataset, quiet=True)
    assert live.is_dir()  # its owner (this process) still runs
    assert not dead.exists() and not legacy.exists()


@pytest.mark.parametrize("created", [True, False])
def test_a_failed_ingest_releases_the_lock(tmp_path: Path, created: bool) -> None:
    dataset = tmp_path / "ds"
    if not created:
        ingest_logs([_log(tmp_path / "a.frames", 10, "a")], dataset, quiet=True)
    bad = tmp_path / "bad.frames"
    bad.write_text("not a frame log\n")
    with pytest.raises(Exception):  # noqa: B017 - any error; the point is what follows
        ingest_logs([bad], dataset, quiet=True)
    with write_lock(dataset, "after", timeout=0):  # free at once
        pass
