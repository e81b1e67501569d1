"""The batch end to end on a small fleet: isolation, incremental re-runs, exit code."""

from __future__ import annotations

import shutil
from pathlib import Path

import polars as pl

from tests.fleet.conftest import BAD_LOG, STEPS, Fleet
from tests.fleet.simfleet import SILENT, Night, write_night
from tracelab.cli import main
from tracelab.errors import EXIT_INPUT
from tracelab.fleet.batch import run_batch
from tracelab.fleet.layout import MANIFEST_FILE, RUNS_FILE


def test_corrupt_log_fails_alone(small_fleet: Fleet) -> None:
    summary = small_fleet.summary
    assert (summary.processed, summary.skipped, summary.failed) == (9, 0, 1)
    (failure,) = summary.failures
    assert BAD_LOG in failure[1] and ":1:" in failure[1]  # file, line and reason
    assert "1 failed" in summary.describe().splitlines()[0]
    runs = pl.read_parquet(small_fleet.fleet / RUNS_FILE)
    assert runs.filter(pl.col("status") == "ok").height == 9
    bad = runs.filter(pl.col("status") == "failed").row(0, named=True)
    assert BAD_LOG in bad["reason"]
    manifest = pl.read_parquet(small_fleet.fleet / MANIFEST_FILE)
    assert manifest.height == 10
    assert manifest.filter(pl.col("file").str.ends_with(BAD_LOG))["status"].to_list() == [
        "failed"]


def test_rerun_does_nothing_and_one_new_file_is_one_run(small_fleet: Fleet,
                                                        tmp_path: Path) -> None:
    fleet = tmp_path / "fleet"
    shutil.copytree(small_fleet.fleet, fleet)
    before = pl.read_parquet(fleet / RUNS_FILE)
    again = run_batch(small_fleet.root, fleet, STEPS, workers=2, quiet=True)
    assert (again.processed, again.skipped, again.failed) == (0, 10, 0)
    assert again.seconds < 5
    assert pl.read_parquet(fleet / RUNS_FILE).equals(before)

    root = tmp_path / "logs"
    shutil.copytree(small_fleet.root, root)
    write_night(root, Night("birch", 4))
    more = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    assert (more.processed, more.skipped, more.failed) == (1, 10, 0), more.describe()
    runs = pl.read_parquet(fleet / RUNS_FILE)
    assert runs.height == 11 and "birch-04" in runs["run"].to_list()


def test_changed_part_reprocesses_its_run_only(small_fleet: Fleet, tmp_path: Path) -> None:
    root, fleet = tmp_path / "logs", tmp_path / "fleet"
    shutil.copytree(small_fleet.root, root)
    shutil.copytree(small_fleet.fleet, fleet)
    write_night(root, Night("alder", 2, SILENT))  # same path, other content
    result = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    assert (result.processed, result.skipped) == (1, 9)
    runs = pl.read_parquet(fleet / RUNS_FILE)
    assert runs.filter(pl.col("run") == "alder-02")["missing"].item() > 0
    assert runs.height == 10  # replaced, not added
    frames = list((fleet / "data" / "frames").glob("vehicle=alder/date=2026-11-02/*.parquet"))
    assert len(frames) == 1  # the superseded run's files are gone


def test_exit_code_says_whether_anything_failed(small_fleet: Fleet, tmp_path: Path) -> None:
    root = tmp_path / "logs"
    shutil.copytree(small_fleet.root / "birch" / "2026-11-01", root / "birch" / "2026-11-01")
    catalog = shutil.copy(small_fleet.root / "birch" / "catalog.toml", tmp_path / "net.toml")
    (root / "broken.frames.zst").write_bytes(b"\x28\xb5\x2f\xfd truncated zstd")
    args = ["batch", str(root), "-o", str(tmp_path / "fleet"), "--catalog", str(catalog),
            "--workers", "1", "-q"]
    assert main(args) == EXIT_INPUT
    runs = pl.read_parquet(tmp_path / "fleet" / RUNS_FILE).filter(pl.col("status") == "ok")
    assert runs["catalog"].to_list() == [str(Path(catalog).resolve())]  # --catalog applies
    assert runs["cause_kind"].to_list() == ["none"]  # and the fault replay ran with it
    (root / "broken.frames.zst").unlink()  # nothing new and nothing failed this time
    assert main(args) == 0


def test_usage_errors_are_one_line(tmp_path: Path, capsys: object) -> None:
    assert main(["batch", str(tmp_path / "nowhere"), "-o", str(tmp_path / "f")]) == 2
    (tmp_path / "logs").mkdir()
    assert main(["batch", str(tmp_path / "logs"), "-o", str(tmp_path / "f"),
                 "--executor", "spark"]) == 2


def test_empty_root_gives_an_empty_fleet(tmp_path: Path) -> None:
    from tracelab.fleet.views import connect_fleet

    (tmp_path / "logs").mkdir()
    summary = run_batch(tmp_path / "logs", tmp_path / "fleet", STEPS, quiet=True)
    assert (summary.runs, summary.processed, summary.failed) == (0, 0, 0)
    con = connect_fleet(tmp_path / "fleet")
    assert con.execute("SELECT count(*) FROM frames").fetchall() == [(0,)]
    assert "vehicle" in con.sql("SELECT * FROM frames").columns
    assert con.execute("SELECT count(*) FROM runs").fetchall() == [(0,)]
