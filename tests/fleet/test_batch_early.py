"""Batch framework with stand-in analysis steps (until the real pipeline lands)."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.fleet import stubs
from tests.fleet.synth import CATALOG, write_run
from tracelab import workflow
from tracelab.fleet.batch import run_batch
from tracelab.fleet.job import PipelineSteps
from tracelab.fleet.views import connect_fleet

STEPS = PipelineSteps(ingest=workflow.ingest, timing=workflow.timing, load=workflow.load,
                      faults=stubs.faults, report=workflow.report)


@pytest.fixture()
def root(tmp_path: Path) -> Path:
    root = tmp_path / "logs"
    for v, vehicle in enumerate(("alder", "birch")):
        (root / vehicle).mkdir(parents=True)
        (root / vehicle / "catalog.toml").write_text(CATALOG)
        for night in range(3):
            drop = 5 if (vehicle == "birch" and night == 2) else 0
            write_run(root / vehicle / f"2026-11-0{night + 1}" / "run.frames.gz",
                      f"{vehicle}-n{night}", vehicle, f"2026-11-0{night + 1}T22:00:00Z",
                      seconds=1.0, drop_every=drop, seed=v * 10 + night)
    (root / "alder" / "2026-11-09").mkdir()
    (root / "alder" / "2026-11-09" / "bad.frames").write_bytes(b"\x00\x01 not a log\n")
    return root


def test_batch_incremental(root: Path, tmp_path: Path) -> None:
    fleet = tmp_path / "fleet"
    first = run_batch(root, fleet, STEPS, workers=2, quiet=True)
    print(first.describe())
    assert (first.processed, first.skipped, first.failed) == (6, 0, 1)
    assert "bad.frames" in first.failures[0][1]
    con = connect_fleet(fleet)
    print(con.sql("SELECT run, vehicle, date, status, frames, missing, regressions, flagged, reason FROM runs").fetchall())
    print(con.sql("SELECT vehicle, date, count(*) FROM frames GROUP BY ALL ORDER BY ALL").fetchall())
    print(con.sql("SELECT * FROM regressions").fetchall())
    again = run_batch(root, fleet, STEPS, workers=2, quiet=True)
    assert (again.processed, again.skipped, again.failed) == (0, 7, 0)
    write_run(root / "birch" / "2026-11-04" / "run.frames", "birch-n3", "birch",
              "2026-11-04T22:00:00Z", seconds=1.0)
    third = run_batch(root, fleet, STEPS, workers=1, quiet=True)
    assert (third.processed, third.skipped, third.failed) == (1, 7, 0)
