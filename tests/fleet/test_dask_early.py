"""Dask executor: a worker killed mid-batch loses nothing and duplicates nothing."""

from __future__ import annotations

import os
from pathlib import Path

import polars as pl

from tests.fleet.test_batch_early import STEPS, root  # noqa: F401 - fixture
from tracelab.fleet.batch import run_batch
from tracelab.fleet.executors import DaskExecutor
from tracelab.fleet.job import RunResult
from tracelab.fleet.views import connect_fleet


async def _die() -> None:
    """Kill the worker process at once, as a crash or an OOM kill would."""
    os._exit(1)


def _snapshot(fleet: Path) -> dict[str, pl.DataFrame]:
    con = connect_fleet(fleet)
    runs = con.sql("SELECT * EXCLUDE (report) FROM runs ORDER BY key").pl()
    frames = con.sql("SELECT vehicle, date, run, t_ns, id, line FROM frames ORDER BY ALL").pl()
    stats = con.sql("SELECT * FROM message_stats ORDER BY ALL").pl()
    return {"runs": runs, "frames": frames, "stats": stats}


def test_killed_worker(root: Path, tmp_path: Path) -> None:  # noqa: F811
    reference = run_batch(root, tmp_path / "ref", STEPS, workers=2, quiet=True)
    executor = DaskExecutor(workers=2)
    killed: list[str] = []

    def kill_one(result: RunResult) -> None:
        if killed:
            return
        busy = [w for w, keys in executor.client.processing().items() if keys]
        if busy:
            killed.append(busy[0])
            executor.client.run(_die, workers=[busy[0]], wait=False)

    try:
        first = run_batch(root, tmp_path / "dask", STEPS, executor=executor, quiet=True,
                          on_result=kill_one)
        again = run_batch(root, tmp_path / "dask", STEPS, executor=executor, quiet=True)
    finally:
        executor.close()
    assert killed
    print(first.describe(), again.describe())
    assert first.failed == reference.failed == 1
    assert again.processed == 0
    ref, got = _snapshot(tmp_path / "ref"), _snapshot(tmp_path / "dask")
    for name in ref:
        assert ref[name].equals(got[name]), name
