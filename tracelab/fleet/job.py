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

import polars as pl

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
    status: str  # "ok" | "suspect" | "failed"
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
        return RunResult(spec.key, row.get("status") or "ok", row.get("reason"), False, row,
                         time.perf_counter() - start, reused=True)
    staging = fleet_path / layout.STAGING_DIR / f"{spec.key[:16]}-{uuid.uuid4().hex[:8]}"
    try:
        staging.mkdir(parents=True)
        row = _run_pipeline(spec, fleet_path, staging, steps)
        layout.write_json(record, row)
        return RunResult(spec.key, row["status"], row["reason"], False, row,
                         time.perf_counter() - start)
    except (LogFormatError, CatalogError, NoRecords) as error:  # the input: final until it changes
        return failed_result(spec, str(error), retry=False,
                             elapsed_s=time.perf_counter() - start)
    except Exception as error:  # noqa: BLE001 - isolation: any bug fails this run only
        reason = f"internal error: {type(error).__name__}: {error}"
        return failed_result(spec, reason, retry=True, elapsed_s=time.perf_counter() - start)
    finally:
        shutil.rmtree(staging, ignore_errors=True)


class NoRecords(Exception):
    """The run's logs hold no valid record at all: it fails (not ``ok`` with only rejects)."""


def suspicion(dataset: Path, ingested: Any) -> str | None:
    """Why a run that was ingested looks wrong (None when it does not): more than
    SUSPECT_REJECT_SHARE of its record lines rejected, or a file-level problem (parts that
    overlap in time, a part that is another part in other compression). NoRecords when no
    record line was valid."""
    from tracelab.fleet.summary import SUSPECT_REJECT_SHARE
    from tracelab.store.dataset import open_dataset

    manifest = open_dataset(dataset).manifest()
    records = int(sum(manifest[c].fill_null(0).sum()
                      for c in ("frames", "errors", "status", "marks", "losses")))
    rejects = int(manifest["rejects"].fill_null(0).sum())
    if records == 0:
        raise NoRecords(f"no valid record in the run's logs ({rejects} line(s) rejected)")
    reasons = []
    share = rejects / (records + rejects)
    if share > SUSPECT_REJECT_SHARE:
        reasons.append(f"{share:.0%} of the record lines were rejected ({rejects} of "
                       f"{records + rejects}; more than {SUSPECT_REJECT_SHARE:.0%})")
    overlapping = manifest.filter(pl.col("overlaps").is_not_null())["file"].to_list()
    if overlapping:
        reasons.append(f"parts overlap in time: {', '.join(overlapping)}")
    for file, twin in getattr(ingested, "same_content", []) or []:
        reasons.append(f"{file} is the same log as {twin}")
    return "; ".join(reasons) or None


def _run_pipeline(spec: RunSpec, fleet: Path, staging: Path, steps: PipelineSteps) -> dict[str, Any]:
    from tracelab.fleet import summary
    from tracelab.store.dataset import open_dataset

    dataset = staging / "dataset"
    catalog = Path(spec.catalog) if spec.catalog else None
    ingested = steps.ingest([Path(f) for f in spec.files], dataset, quiet=True)
    suspect = suspicion(dataset, ingested)
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
        if suspect is not None:
            row.update(status="suspect", reason=suspect)
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
