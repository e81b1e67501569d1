"""Shared fleets: small hand-made logs processed once per session by the real pipeline."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest

from tests.fleet.synth import CATALOG, write_run
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


def make_root(root: Path) -> Path:
    """Two vehicles, three nights each; birch drops every 5th drive_command frame on night 3;
    one log that is not a log at all."""
    for v, vehicle in enumerate(("alder", "birch")):
        (root / vehicle).mkdir(parents=True)
        (root / vehicle / "catalog.toml").write_text(CATALOG)
        for night in range(3):
            drop = 5 if (vehicle == "birch" and night == 2) else 0
            write_run(root / vehicle / f"2026-11-0{night + 1}" / "run.frames.gz",
                      f"{vehicle}-n{night}", vehicle, f"2026-11-0{night + 1}T22:00:00Z",
                      seconds=1.0, drop_every=drop, seed=v * 10 + night)
    (root / BAD_LOG).parent.mkdir(parents=True)
    (root / BAD_LOG).write_bytes(b"\x00\x01 not a log\n")
    return root


@pytest.fixture(scope="session")
def small_fleet(tmp_path_factory: pytest.TempPathFactory) -> Fleet:
    base = tmp_path_factory.mktemp("small-fleet")
    root = make_root(base / "logs")
    fleet = base / "fleet"
    return Fleet(root, fleet, run_batch(root, fleet, STEPS, workers=2, quiet=True))
