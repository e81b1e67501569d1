"""Odd fleet trees: FIFOs, dangling symlinks, unreadable files and links out of ROOT each
fail (or are skipped) alone with their reason; `suspect` runs; a bad catalog fails once; a
failed start leaves the folder usable; a second batch names the holder; one vehicle name."""

from __future__ import annotations

import errno
import fcntl
import json
import os
import socket
from pathlib import Path

import polars as pl
import pytest

from tests.fleet.conftest import STEPS
from tests.fleet.synth import CATALOG, write_run
from tracelab.cli import main
from tracelab.errors import CatalogError, UsageError
from tracelab.fleet import discover, layout
from tracelab.fleet.batch import run_batch
from tracelab.fleet.executors import DaskExecutor
from tracelab.fleet.index import PLOTLY_FILE
from tracelab.fleet.summary import SUSPECT_REJECT_SHARE
from tracelab.store.lock import LockedError, holder_record

ORIGIN = "2026-11-10T22:00:00Z"


def _root(tmp_path: Path) -> Path:
    root = tmp_path / "logs"
    (root / "v1").mkdir(parents=True)
    (root / "catalog.toml").write_text(CATALOG)
    write_run(root / "v1" / "good.frames", "good", "v1", ORIGIN, seconds=1.0)
    return root


def _manifest(fleet: Path) -> dict[str, tuple[str, str | None]]:
    frame = pl.read_parquet(fleet / layout.MANIFEST_FILE)
    return {Path(f).name: (s, r) for f, s, r in frame.select("file", "status", "reason").rows()}


def test_fifos_links_and_unreadable_files_fail_alone(tmp_path: Path,
                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    root = _root(tmp_path)
    os.mkfifo(root / "v1" / "pipe.frames")  # reading it would block for ever
    (root / "v1" / "gone.frames").symlink_to(root / "v1" / "nowhere.frames")
    (root / "v1" / "broken.frames").write_text("%tracelab-frames 1\n")
    outside = tmp_path / "elsewhere.frames"
    write_run(outside, "far", "v1", ORIGIN, seconds=0.5)
    (root / "v1" / "far.frames").symlink_to(outside)
    write_run(root / "v1" / "near-target.frames", "near", "v1", ORIGIN, seconds=0.5)
    (root / "v1" / "near.frames").symlink_to(root / "v1" / "near-target.frames")
    real_sha = discover.file_sha256

    def io_error(path: Path) -> str:
        if path.name == "broken.frames":  # the disk answers EIO part-way through
            raise OSError(errno.EIO, "Input/output error")
        return real_sha(path)

    monkeypatch.setattr(discover, "file_sha256", io_error)
    fleet = tmp_path / "fleet"
    summary = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    entries = _manifest(fleet)
    assert entries["pipe.frames"][0] == "skipped" and "a FIFO" in entries["pipe.frames"][1]
    assert entries["far.frames"][0] == "skipped" and "outside the root" in entries["far.frames"][1]
    assert entries["gone.frames"][0] == "failed" and "dangling symlink" in entries["gone.frames"][1]
    assert entries["broken.frames"][0] == "failed"
    assert "Input/output error" in entries["broken.frames"][1]
    # the others complete; a link inside the root is followed
    assert entries["good.frames"][0] == "ok" and entries["near.frames"][0] == "ok"
    assert summary.failed == 2
    assert any("a FIFO" in line for line in summary.ignored)
    assert "skipped" in summary.describe()


def test_all_garbage_fails_and_many_rejects_are_suspect(tmp_path: Path) -> None:
    root = _root(tmp_path)
    head = f"%tracelab-frames 1\n%origin {ORIGIN}\n%bus P nominal=500000\n"
    (root / "v1" / "garbage.frames").write_text(
        head + "%meta run=garbage vehicle=v1\n" + "this is no record\n" * 500)
    good = [f"{1000 + i * 10_000_000}\tP\tframe\t0C0\ts\t8\t0001020304050607\n"
            for i in range(90)]
    (root / "v1" / "noisy.frames").write_text(
        head + "%meta run=noisy vehicle=v1\n" + "".join(good) + "garbage line\n" * 10)
    fleet = tmp_path / "fleet"
    summary = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    runs = {r["run"]: r for r in pl.read_parquet(fleet / layout.RUNS_FILE).to_dicts()}
    assert runs["garbage"]["status"] == "failed"
    assert "no valid record" in runs["garbage"]["reason"]
    assert runs["noisy"]["status"] == "suspect"  # 10 of 100 record lines > 5 %
    assert SUSPECT_REJECT_SHARE < 10 / 100
    assert "10% of the record lines were rejected" in runs["noisy"]["reason"]
    assert runs["good"]["status"] == "ok"
    assert summary.failed == 1 and [r for r, _ in summary.suspects] == ["v1/2026-11-10/noisy"]
    # a suspect run's data stays queryable and its report is linked
    assert main(["sql", str(fleet), "SELECT DISTINCT run FROM frames ORDER BY run",
                 "--format", "csv"]) == 0
    assert "suspect" in (fleet / layout.INDEX_FILE).read_text()


def test_a_bad_catalog_fails_once_up_front(tmp_path: Path,
                                           capsys: pytest.CaptureFixture[str]) -> None:
    root = _root(tmp_path)
    write_run(root / "v1" / "second.frames", "second", "v1", ORIGIN, seconds=0.5)
    bad = tmp_path / "bad.toml"
    bad.write_text("[bus.P]\nnominal = 'fast'\n")
    with pytest.raises(CatalogError):
        run_batch(root, tmp_path / "fleet", STEPS, catalog=bad, quiet=True)
    assert not (tmp_path / "fleet").exists()
    assert main(["batch", str(root), "-o", str(tmp_path / "fleet"), "--catalog", str(bad)]) == 3
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and str(bad) in err


def test_an_unreachable_scheduler_leaves_nothing_behind(tmp_path: Path,
                                                         monkeypatch: pytest.MonkeyPatch) -> None:
    # Dask retries a refused connection until its timeout (20 s by default); how long it
    # waits is not what this test is about, so the batch's executor waits 1 s
    defaults = DaskExecutor.__init__.__defaults__
    assert defaults is not None and defaults[-1] == 20.0
    monkeypatch.setattr(DaskExecutor.__init__, "__defaults__", (*defaults[:-1], 1.0))
    root = _root(tmp_path)
    fleet = tmp_path / "fleet"
    with pytest.raises(UsageError, match="cannot reach the Dask scheduler"):
        run_batch(root, fleet, STEPS, executor="dask", scheduler="tcp://127.0.0.1:9",
                  quiet=True)
    assert not fleet.exists() or not any(fleet.iterdir())
    fleet.mkdir(exist_ok=True)
    (fleet / PLOTLY_FILE).write_text("// left by an older version")  # and it still works
    summary = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    assert summary.failed == 0 and layout.is_fleet(fleet)


def test_a_second_batch_names_the_holder(tmp_path: Path) -> None:
    root = _root(tmp_path)
    fleet = tmp_path / "fleet"
    fleet.mkdir()
    (fleet / PLOTLY_FILE).write_text("//")  # what a first batch has made before its commit
    with open(fleet / layout.LOCK_FILE, "w") as handle:  # a first batch (own descriptor)
        fcntl.flock(handle, fcntl.LOCK_EX)
        handle.write(json.dumps(holder_record("batch")))
        handle.flush()
        with pytest.raises(LockedError) as caught:
            run_batch(root, fleet, STEPS, workers=1, quiet=True)
    assert f"pid {os.getpid()} on {socket.gethostname()}" in str(caught.value)
    assert (fleet / PLOTLY_FILE).exists()  # the holder's files are not the loser's to remove


def test_one_vehicle_name_everywhere(tmp_path: Path) -> None:
    root = tmp_path / "logs"
    (root / "catalog.toml").parent.mkdir(parents=True)
    (root / "catalog.toml").write_text(CATALOG)
    write_run(root / "q.frames", "q", "veh'2", ORIGIN, seconds=0.5)
    fleet = tmp_path / "fleet"
    run_batch(root, fleet, STEPS, workers=1, quiet=True)
    from tracelab.query import open_session, run_query

    con = open_session(fleet)
    names = {run_query(con, f"SELECT DISTINCT vehicle FROM {view}").item()
             for view in ("runs", "frames", "timing", "manifest")}
    assert names == {"veh_2"}
