"""The per-run job a worker runs: ingest, analyse, report, summarise, then publish atomically.

The pipeline steps are passed in (``PipelineSteps``: the workflow's job functions) because the
fleet layer sits below the workflow. Everything is staged under ``FLEET/.staging`` and renamed
into place under names keyed by the run's content hash, and the record ``records/<key>.json``
is written last: a retried task (a worker died, a task ran twice) rewrites identical files or
returns the finished record, so it neither loses nor duplicates data.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tracelab.errors import CatalogError, LogFormatError
from tracelab.fleet import layout
from tracelab.fleet.discover import RunSpec


@dataclass(frozen=True)
class PipelineSteps:
    """The workflow job functions one run goes through (module-level, hence picklable)."""

    ingest: Callable[..., Any]
    timing: Callable[..., Any]
    load: Callable[..., Any]
    faults: Callable[..., Any]
    report: Callable[..., Any]


@dataclass
class RunResult:
    """What a worker hands back: the summary row (``runs`` table) and how it went."""

    key: str
    status: str  # "ok" | "failed"
    reason: str | None
    retry: bool  # failed for a reason other than a bad log or catalog: retried next batch
    row: dict[str, Any] = field(default_factory=dict)
    elapsed_s: float = 0.0
    reused: bool = False


def _record_path(fleet: Path, key: str) -> Path:
    return fleet / layout.RECORDS_DIR / f"{key}.json"


def failed_result(spec: RunSpec, reason: str, retry: bool, elapsed_s: float = 0.0) -> RunResult:
    from tracelab.fleet.summary import failed_row

    return RunResult(spec.key, "failed", reason, retry, failed_row(spec, reason), elapsed_s)


def process_run(spec: RunSpec, fleet: str, steps: PipelineSteps) -> RunResult:
    """Run the whole pipeline for one run; never raises for a bad log (the run fails alone)."""
    import json

    start = time.perf_counter()
    if spec.error is not None:
        return failed_result(spec, spec.error, retry=False)
    fleet_path = Path(fleet)
    record = _record_path(fleet_path, spec.key)
    if record.is_file():  # the same content was finished before (retried or duplicated task)
        row = json.loads(record.read_text(encoding="utf-8"))
        return RunResult(spec.key, "ok", None, False, row, time.perf_counter() - start,
                         reused=True)
    staging = fleet_path / layout.STAGING_DIR / f"{spec.key[:16]}-{uuid.uuid4().hex[:8]}"
    try:
        staging.mkdir(parents=True)
        row = _run_pipeline(spec, fleet_path, staging, steps)
        layout.write_json(record, row)
        return RunResult(spec.key, "ok", None, False, row, time.perf_counter() - start)
    except (LogFormatError, CatalogError) as error:  # the input: final until a file changes
        return failed_result(spec, str(error), retry=False,
                             elapsed_s=time.perf_counter() - start)
    except Exception as error:  # noqa: BLE001 - isolation: any bug fails this run only
        reason = f"internal error: {type(error).__name__}: {error}"
        return failed_result(spec, reason, retry=True, elapsed_s=time.perf_counter() - start)
    finally:
        shutil.rmtree(staging, ignore_errors=True)


def _run_pipeline(spec: RunSpec, fleet: Path, staging: Path, steps: PipelineSteps) -> dict[str, Any]:
    from tracelab.fleet import summary
    from tracelab.store.dataset import open_dataset

    dataset = staging / "dataset"
    catalog = Path(spec.catalog) if spec.catalog else None
    steps.ingest([Path(f) for f in spec.files], dataset, quiet=True)
    steps.timing(dataset, catalog=catalog)
    steps.load(dataset)
    faults_json = None
    if catalog is not None:
        faults_json = steps.faults(dataset, catalog=catalog).as_json()
    report_dir = staging / "report"
    report_dir.mkdir()
    _link_plotly(fleet, report_dir)
    reports = steps.report(dataset, report_dir / f"{spec.part}.html", catalog=catalog,
                           shared_plotly=True)
    con = open_dataset(dataset).connect()
    try:
        row = summary.run_row(con, spec, faults_json)
        stats = summary.message_stats(con, spec)
        out = staging / "out"
        tables = summary.export_tables(con, out, stats)
    finally:
        con.close()
    # publish: data files first, the report next; the record (written by the caller) last
    for table, staged in tables.items():
        layout.move_into_place(
            staged, fleet / layout.DATA_DIR / table / spec.partition / f"{spec.part}.parquet")
    report_target = fleet / layout.REPORTS_DIR / spec.partition / f"{spec.part}.html"
    row["report"] = _publish_report(reports, report_target)
    if faults_json is not None:
        layout.write_json(report_target.with_name(f"{spec.part}.faults.json"), faults_json)
    return row


def _link_plotly(fleet: Path, folder: Path) -> None:
    """Hard-link the fleet's plotly.js beside the staged report, so the report step finds it
    there and does not write its 3.5 MB again for every run."""
    from tracelab.fleet.index import PLOTLY_FILE

    with contextlib.suppress(OSError):  # no shared copy yet, or links unsupported: harmless
        os.link(fleet / PLOTLY_FILE, folder / PLOTLY_FILE)


def _publish_report(reports: Any, target: Path) -> str | None:
    """Move the run's HTML (and any shared asset beside it) into ``reports/``."""
    paths = [Path(p) for p in (reports or [])]
    html = [p for p in paths if p.suffix == ".html"]
    if not html:
        return None
    source = html[0]
    for asset in source.parent.iterdir():  # shared plotly.js and the like, once per folder
        if asset.is_file() and asset.suffix != ".html" and not (target.parent / asset.name).exists():
            layout.move_into_place(asset, target.parent / asset.name)
    layout.move_into_place(source, target)
    return str(target.relative_to(target.parents[3]))
