"""The batch end to end on a small fleet: isolation, incremental re-runs, exit code."""

from __future__ import annotations

import shutil
from pathlib import Path

import polars as pl

from tests.fleet.conftest import BAD_LOG, STEPS, Fleet
from tests.fleet.synth import write_run
from tracelab.cli import main
from tracelab.errors import EXIT_INPUT
from tracelab.fleet.batch import run_batch
from tracelab.fleet.layout import MANIFEST_FILE, RUNS_FILE


def test_corrupt_log_fails_alone(small_fleet: Fleet) -> None:
    summary = small_fleet.summary
    assert (summary.processed, summary.skipped, summary.failed) == (6, 0, 1)
    (failure,) = summary.failures
    assert BAD_LOG in failure[1] and ":1:" in failure[1]  # file, line and reason
    assert "1 failed" in summary.describe().splitlines()[0]
    runs = pl.read_parquet(small_fleet.fleet / RUNS_FILE)
    assert runs.filter(pl.col("status") == "ok").height == 6
    bad = runs.filter(pl.col("status") == "failed").row(0, named=True)
    assert BAD_LOG in bad["reason"]
    manifest = pl.read_parquet(small_fleet.fleet / MANIFEST_FILE)
    assert manifest.height == 7
    assert manifest.filter(pl.col("file").str.ends_with(BAD_LOG))["status"].to_list() == [
        "failed"]


def test_rerun_does_nothing_and_one_new_file_is_one_run(small_fleet: Fleet,
                                                        tmp_path: Path) -> None:
    fleet = tmp_path / "fleet"
    shutil.copytree(small_fleet.fleet, fleet)
    before = pl.read_parquet(fleet / RUNS_FILE)
    again = run_batch(small_fleet.root, fleet, STEPS, workers=2, quiet=True)
    assert (again.processed, again.skipped, again.failed) == (0, 7, 0)
    assert again.seconds < 5
    assert pl.read_parquet(fleet / RUNS_FILE).equals(before)

    root = tmp_path / "logs"
    shutil.copytree(small_fleet.root, root)
    write_run(root / "birch" / "2026-11-04" / "run.frames", "birch-n3", "birch",
              "2026-11-04T22:00:00Z", seconds=1.0)
    more = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    assert (more.processed, more.skipped, more.failed) == (1, 7, 0), more.describe()
    runs = pl.read_parquet(fleet / RUNS_FILE)
    assert runs.height == 8 and "birch-n3" in runs["run"].to_list()


def test_changed_part_reprocesses_its_run_only(small_fleet: Fleet, tmp_path: Path) -> None:
    root, fleet = tmp_path / "logs", tmp_path / "fleet"
    shutil.copytree(small_fleet.root, root)
    shutil.copytree(small_fleet.fleet, fleet)
    write_run(root / "alder" / "2026-11-02" / "run.frames.gz", "alder-n1", "alder",
              "2026-11-02T22:00:00Z", seconds=1.0, drop_every=4, seed=99)
    result = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    assert (result.processed, result.skipped) == (1, 6)
    runs = pl.read_parquet(fleet / RUNS_FILE)
    assert runs.filter(pl.col("run") == "alder-n1")["missing"].item() > 0
    assert runs.height == 7  # replaced, not added
    frames = list((fleet / "data" / "frames").glob("vehicle=alder/date=2026-11-02/*.parquet"))
    assert len(frames) == 1  # the superseded run's files are gone


def test_exit_code_says_whether_anything_failed(small_fleet: Fleet, tmp_path: Path) -> None:
    root = tmp_path / "logs"
    shutil.copytree(small_fleet.root / "birch", root / "birch")
    (root / "broken.frames.zst").write_bytes(b"\x28\xb5\x2f\xfd truncated zstd")
    assert main(["batch", str(root), "-o", str(tmp_path / "f1"), "--workers", "1",
                 "-q"]) == EXIT_INPUT
    (root / "broken.frames.zst").unlink()
    assert main(["batch", str(root), "-o", str(tmp_path / "f2"), "--workers", "1", "-q"]) == 0


def test_usage_errors_are_one_line(tmp_path: Path, capsys: object) -> None:
    assert main(["batch", str(tmp_path / "nowhere"), "-o", str(tmp_path / "f")]) == 2
    (tmp_path / "logs").mkdir()
    assert main(["batch", str(tmp_path / "logs"), "-o", str(tmp_path / "f"),
                 "--executor", "spark"]) == 2
