"""Jobs: each joins the pure layers (format, physics, store, analyses, report) into one step
that reads a dataset, computes, and writes its outputs. The CLI and pipelines call these.

Each function below is owned by one area; keep edits inside your own function(s).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

# --- foundation: ingest / info ------------------------------------------------------------


def ingest(logs: list[Path], dataset: Path, strict: bool = False, force: bool = False,
           quiet: bool = False) -> Any:
    from tracelab.store.ingest import ingest_logs

    return ingest_logs(logs, dataset, strict=strict, force=force, quiet=quiet)


def info(dataset: Path) -> Any:
    from tracelab.store.info import dataset_info

    return dataset_info(dataset)


# --- simulator ----------------------------------------------------------------------------


def simulate(scenario: Path, output: Path, duration: str | None = None, seed: int | None = None,
             quiet: bool = False) -> Any:
    raise NotImplementedError("simulate")


# --- timing / load / sql ------------------------------------------------------------------


def timing(dataset: Path, catalog: Path | None = None, run: str | None = None,
           gap_factor: float = 1.5) -> Any:
    raise NotImplementedError("timing")


def load(dataset: Path, window: str = "100ms", run: str | None = None) -> Any:
    raise NotImplementedError("load")


def sql(dataset: Path, query: str | None, fmt: str = "table", out: Path | None = None) -> None:
    raise NotImplementedError("sql")


# --- forensics ----------------------------------------------------------------------------


def faults(dataset: Path, catalog: Path, run: str | None = None) -> Any:
    raise NotImplementedError("faults")


# --- report / demo ------------------------------------------------------------------------


def report(dataset: Path, output: Path, catalog: Path | None = None, run: str | None = None,
           shared_plotly: bool = False, load_limit: float = 0.5) -> list[Path]:
    raise NotImplementedError("report")


def demo(output: Path, quiet: bool = False) -> str:
    raise NotImplementedError("demo")


# --- fleet --------------------------------------------------------------------------------


def batch(root: Path, fleet: Path, catalog: Path | None = None, executor: str = "local",
          scheduler: str | None = None, workers: int | None = None, previous: int = 5,
          quiet: bool = False) -> Any:
    # The fleet layer sits below this module, so the per-run steps are handed down to it.
    from tracelab.fleet.batch import run_batch
    from tracelab.fleet.job import PipelineSteps

    steps = PipelineSteps(ingest=ingest, timing=timing, load=load, faults=faults, report=report)
    return run_batch(root, fleet, steps, catalog=catalog, executor=executor,
                     scheduler=scheduler, workers=workers, previous=previous, quiet=quiet)
