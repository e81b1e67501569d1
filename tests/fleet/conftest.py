"""The shared fleet: short simulated runs processed once per session by the real pipeline."""

from __future__ import annotations

import fcntl
import os
import pickle
from dataclasses import dataclass
from pathlib import Path

import pytest

from tests.fleet.simfleet import DRIFT, SILENT, TX_NOISE, Night, write_catalogs, write_night
from tracelab import workflow
from tracelab.fleet.batch import BatchSummary, run_batch
from tracelab.fleet.job import PipelineSteps

#: The real per-run steps, exactly as ``tracelab batch`` wires them.
STEPS = PipelineSteps(ingest=workflow.ingest, timing=workflow.timing, load=workflow.load,
                      faults=workflow.faults, report=workflow.report)
BAD_LOG = "alder/2026-11-09/bad.frames"


@dataclass
class Fleet:
    root: Path
    fleet: Path
    summary: BatchSummary


#: The session fleet: three vehicles, three nights each, known faults on the third night.
NIGHTS = [Night("alder", 1), Night("alder", 2), Night("alder", 3, TX_NOISE.format(node="tms")),
          Night("birch", 1), Night("birch", 2, suffix=".frames.zst"), Night("birch", 3, SILENT),
          Night("cedar", 1), Night("cedar", 2, suffix=".frames"), Night("cedar", 3, DRIFT)]


def make_root(root: Path) -> Path:
    """Simulate NIGHTS under ``root`` (catalog.toml per vehicle) plus one file that is not a
    log at all."""
    write_catalogs(root, sorted({n.vehicle for n in NIGHTS}))
    for night in NIGHTS:
        write_night(root, night)
    (root / BAD_LOG).parent.mkdir(parents=True)
    (root / BAD_LOG).write_bytes(b"\x00\x01 not a log\n")
    return root


@pytest.fixture(scope="session")
def small_fleet(tmp_path_factory: pytest.TempPathFactory) -> Fleet:
    """Built once per test run. Under pytest-xdist each worker has its own session, so the
    first worker to get here builds it in the run's shared temporary folder while holding a
    lock, and the others wait and reuse it (tests only read it or copy it)."""
    shared = tmp_path_factory.getbasetemp()
    if os.environ.get("PYTEST_XDIST_WORKER"):
        shared = shared.parent  # .../pytest-N, above every worker's own popen-gwK
    base = shared / "small-fleet"
    with open(shared / "small-fleet.lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        done = base / "summary.pickle"
        if not done.exists():
            root = make_root(base / "logs")
            summary = run_batch(root, base / "fleet", STEPS, workers=2, quiet=True)
            done.write_bytes(pickle.dumps(summary))
        summary = pickle.loads(done.read_bytes())
    return Fleet(base / "logs", base / "fleet", summary)
