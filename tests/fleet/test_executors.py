"""Executors: the Dask path gives the local path's results, even when a worker dies."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import polars as pl
import pytest

from tests.fleet.conftest import STEPS, Fleet
from tracelab.errors import UsageError
from tracelab.fleet.batch import run_batch
from tracelab.fleet.executors import DaskExecutor, make_executor, threads_per_worker
from tracelab.fleet.job import RunResult
from tracelab.fleet.views import connect_fleet


async def _die() -> None:
    """End the worker process at once, as a crash or an out-of-memory kill would."""
    os._exit(1)


def snapshot(fleet: Path, vehicle: str) -> dict[str, pl.DataFrame]:
    """Everything a user reads about one vehicle from a fleet, in a stable order."""
    con = connect_fleet(fleet)
    where = f"WHERE vehicle = '{vehicle}'"
    out = {"runs": con.sql(f"SELECT * EXCLUDE (catalog) FROM runs {where} ORDER BY key").pl(),
           "regressions": con.sql(f"SELECT * FROM regressions {where} ORDER BY ALL").pl()}
    for table in ("frames", "errors", "timing", "gaps", "load", "load_summary", "verdicts",
                  "message_stats"):
        columns = con.sql(f"SELECT * FROM {table} LIMIT 0").columns
        drop = "EXCLUDE (file)" if "file" in columns else ""
        out[table] = con.sql(f"SELECT * {drop} FROM {table} {where} ORDER BY ALL").pl()
    return out


def _same(a: pl.Series, b: pl.Series) -> bool:
    """Equal, floats up to summation order (DuckDB aggregates in parallel)."""
    if a.dtype.is_float() and b.dtype.is_float() and a.len() == b.len():
        both = pl.DataFrame({"a": a, "b": b})
        return bool(both.select(
            ((pl.col("a") - pl.col("b")).abs() <= 1e-9 * pl.col("a").abs().clip(1.0))
            .fill_null(pl.col("a").is_null() & pl.col("b").is_null()).all()).item())
    return a.equals(b)


def test_killed_worker_loses_and_duplicates_nothing(small_fleet: Fleet, tmp_path: Path) -> None:
    executor = DaskExecutor(workers=2)
    killed: list[str] = []

    def kill_a_busy_worker(result: RunResult) -> None:
        if killed:
            return
        busy = [w for w, keys in executor.client.processing().items() if keys]
        if busy:
            killed.append(busy[0])
            executor.client.run(_die, workers=[busy[0]], wait=False)

    root, fleet = tmp_path / "logs", tmp_path / "dask"
    shutil.copytree(small_fleet.root / "birch", root / "birch")
    try:
        first = run_batch(root, fleet, STEPS, executor=executor, quiet=True,
                          on_result=kill_a_busy_worker)
        again = run_batch(root, fleet, STEPS, executor=executor, quiet=True)
    finally:
        executor.close()
    assert killed, "no worker was busy to kill"
    assert (first.processed, first.failed) == (3, 0), first.describe()
    assert (again.processed, again.skipped) == (0, 3)
    reference, got = snapshot(small_fleet.fleet, "birch"), snapshot(fleet, "birch")
    for name, frame in reference.items():
        differ = [c for c in frame.columns if not _same(frame[c], got[name][c])]
        assert not differ, (name, differ)
    runs = got["runs"].filter(pl.col("status") == "ok")
    assert got["frames"].height == runs["frames"].sum()  # no run counted twice


def test_executor_choices() -> None:
    with pytest.raises(UsageError, match="--scheduler needs"):
        make_executor("local", scheduler="tcp://127.0.0.1:1")
    with pytest.raises(UsageError, match="unknown executor"):
        make_executor("spark")
    assert threads_per_worker(1) >= threads_per_worker(64) == 1


def test_existing_scheduler(small_fleet: Fleet, tmp_path: Path) -> None:
    from distributed import LocalCluster

    root = tmp_path / "logs"
    shutil.copytree(small_fleet.root / "birch" / "2026-11-03", root / "birch" / "2026-11-03")
    shutil.copy(small_fleet.root / "birch" / "catalog.toml", root / "birch")
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        result = run_batch(root, tmp_path / "fleet", STEPS, executor="dask",
                           scheduler=cluster.scheduler_address, quiet=True)
    assert (result.processed, result.failed) == (1, 0), result.describe()
    got = pl.read_parquet(tmp_path / "fleet" / "runs.parquet")
    want = connect_fleet(small_fleet.fleet).sql(
        "SELECT * FROM runs WHERE run = 'birch-03'").pl()
    for column in ("key", "frames", "missing", "errors", "first_degraded_node", "cause_kind"):
        assert got[column].to_list() == want[column].to_list(), column


def test_unreachable_scheduler_is_a_usage_error(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="cannot reach the Dask scheduler"):
        DaskExecutor("tcp://127.0.0.1:9", workers=None, timeout_s=1)
