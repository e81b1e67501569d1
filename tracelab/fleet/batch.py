"""The nightly batch: discover runs, process new or changed ones on an executor, then commit
the fleet summary, regression flags, index and manifest.

Incremental rules (docs/fleet.md): a run whose content key (its files' sha256, its catalog's
sha256, the pipeline version) is already in ``runs.parquet`` is skipped, unless it failed for a
reason other than its input (``retry``). Hashes are reused for files whose path, size and
modification time are unchanged. A run whose logs left the root stays in the fleet; a run
whose log now has other content is replaced. The manifest is replaced last: it is the commit.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import shutil
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import polars as pl

from tracelab.errors import UsageError, did_you_mean
from tracelab.fleet import layout
from tracelab.fleet.discover import LogFile, RunSpec, describe_log, find_logs, group_runs
from tracelab.fleet.executors import EXECUTORS, DaskExecutor, LocalExecutor, make_executor
from tracelab.fleet.index import ensure_plotly
from tracelab.fleet.job import PipelineSteps, RunResult, failed_result, process_run
from tracelab.fleet.summary import PUBLISHED, runs_frame
from tracelab.store.lock import write_lock
from tracelab.wording import counted

MANIFEST = pl.Schema({
    "file": pl.String, "sha256": pl.String, "bytes": pl.Int64, "mtime_ns": pl.Int64,
    "run": pl.String, "origin": pl.String, "vehicle": pl.String, "date": pl.String,
    "key": pl.String, "status": pl.String, "reason": pl.String, "retry": pl.Boolean,
    "header_error": pl.String, "processed_at": pl.String, "elapsed_s": pl.Float64,
})


@dataclass
class BatchSummary:
    """What one batch did; ``failed`` (runs failed in this batch) is truthy on any failure."""

    fleet: Path
    runs: int
    processed: int
    skipped: int
    failures: list[tuple[str, str]] = field(default_factory=list)
    seconds: float = 0.0
    flags: int = 0
    executor: str = "local"
    suspects: list[tuple[str, str]] = field(default_factory=list)
    ignored: list[str] = field(default_factory=list)  # entries under ROOT that are no logs

    @property
    def failed(self) -> int:
        return len(self.failures)

    def describe(self) -> str:
        lines = [f"batch: {counted(self.processed, 'run')} processed, {self.skipped} skipped, "
                 f"{self.failed} failed in {self.seconds:.1f} s"]
        lines += [f"  failed {run}: {reason}" for run, reason in self.failures]
        lines += [f"  suspect {run}: {reason}" for run, reason in self.suspects]
        lines += [f"  skipped {reason}" for reason in self.ignored]
        lines.append(f"fleet: {self.fleet} ({counted(self.runs, 'run')}, "
                     f"{counted(self.flags, 'regression flag')}; "
                     f"{self.fleet / layout.INDEX_FILE})")
        return "\n".join(lines)

    def as_json(self) -> dict[str, Any]:
        return {"fleet": str(self.fleet), "runs": self.runs, "processed": self.processed,
                "skipped": self.skipped, "failed": self.failed,
                "failures": [{"run": r, "reason": why} for r, why in self.failures],
                "suspects": [{"run": r, "reason": why} for r, why in self.suspects],
                "ignored": self.ignored,
                "seconds": round(self.seconds, 3), "regression_flags": self.flags}


@contextmanager
def _locked(fleet: Path) -> Iterator[None]:
    """One batch per fleet at a time (a slow night must not overlap the next): a second
    batch exits 2 at once with the holder (pid, host, command, since). A batch that fails
    before its first commit leaves nothing behind (no lock file, no plotly.js), so the
    folder stays usable."""
    from tracelab.store.dataset import make_output_dir

    created = not fleet.exists()
    make_output_dir(fleet, "fleet")
    locked = False
    try:
        with write_lock(fleet, "batch", timeout=0):
            locked = True
            try:
                yield
            finally:
                if not layout.is_fleet(fleet):  # nothing was committed: remove what we made
                    from tracelab.fleet.index import PLOTLY_FILE

                    for name in (PLOTLY_FILE, layout.LOCK_FILE):
                        with contextlib.suppress(OSError):
                            (fleet / name).unlink(missing_ok=True)
                    shutil.rmtree(fleet / layout.STAGING_DIR, ignore_errors=True)
    finally:
        if created and (locked or not any(fleet.iterdir())):
            with contextlib.suppress(OSError):
                fleet.rmdir()  # only when empty


def _read(path: Path, schema: pl.Schema) -> pl.DataFrame:
    if not path.is_file():
        return pl.DataFrame(schema=schema)
    frame = pl.read_parquet(path, glob=False)
    return frame.select(pl.col(c).cast(t) if c in frame.columns else pl.lit(None, t).alias(c)
                        for c, t in schema.items())


def _known_logs(manifest: pl.DataFrame) -> dict[str, LogFile]:
    known: dict[str, LogFile] = {}
    for row in manifest.iter_rows(named=True):  # one row per log file
        if row["status"] == "skipped" or row["run"] is None:  # no log: described afresh
            continue
        known[row["file"]] = LogFile(row["file"], row["sha256"], row["bytes"], row["mtime_ns"],
                                     row["run"], row["origin"], row["vehicle"], row["date"],
                                     row["header_error"])
    return known


def _check_inputs(root: Path, fleet: Path, catalog: Path | None, previous: int,
                  executor: object, scheduler: str | None, workers: int | None) -> None:
    if isinstance(executor, str) and executor not in EXECUTORS:
        raise UsageError(f"--executor {executor!r}: expected local or dask"
                         f"{did_you_mean(executor, EXECUTORS)}")
    if scheduler and executor == "local":
        raise UsageError("--scheduler needs --executor dask")
    if workers is not None and workers < 1:
        raise UsageError(f"--workers must be at least 1, not {workers}")
    if not root.is_dir():
        raise UsageError(f"{root}: not a folder of frame logs")
    if catalog is not None and not catalog.is_file():
        raise UsageError(f"{catalog}: catalog not found")
    if catalog is not None:  # a bad catalog fails once, here, not once per run (exit 3)
        from tracelab.network.catalog import load_catalog

        load_catalog(catalog)
    if previous < 1:
        raise UsageError(f"--previous must be at least 1, not {previous}")
    if fleet.exists() and not fleet.is_dir():
        raise UsageError(f"{fleet}: exists and is not a folder")
    if fleet.is_dir() and not layout.is_fleet(fleet):
        from tracelab.fleet.index import PLOTLY_FILE

        # what a batch makes before its first commit (another batch may be at work in it)
        ours = {layout.LOCK_FILE, layout.LEGACY_LOCK_FILE, PLOTLY_FILE, layout.STAGING_DIR}
        if any(p.name not in ours for p in fleet.iterdir()):
            raise UsageError(f"{fleet}: exists and is not a tracelab fleet; choose another -o")


def run_batch(root: Path, fleet: Path, steps: PipelineSteps, catalog: Path | None = None,
              executor: str | LocalExecutor | DaskExecutor = "local",
              scheduler: str | None = None, workers: int | None = None, previous: int = 5,
              quiet: bool = False,
              on_result: Callable[[RunResult], None] | None = None) -> BatchSummary:
    """Process every new or changed run under ``root`` into ``fleet``; see the module doc."""
    from tracelab.progress import progress

    start = time.perf_counter()
    root, fleet = Path(root), Path(fleet)
    _check_inputs(root, fleet, catalog, previous, executor, scheduler, workers)
    with _locked(fleet):
        shutil.rmtree(fleet / layout.STAGING_DIR, ignore_errors=True)  # an interrupted batch
        old_manifest = _read(fleet / layout.MANIFEST_FILE, MANIFEST)
        old_runs = runs_frame([]) if not (fleet / layout.RUNS_FILE).is_file() else \
            pl.read_parquet(fleet / layout.RUNS_FILE, glob=False)
        known = _known_logs(old_manifest)
        logs = [describe_log(p, known, root) for p in find_logs(root, exclude=fleet)]
        specs = group_runs(logs, root, catalog)
        ignored = [log for log in logs if log.skipped]
        done = {r["key"]: r for r in old_runs.iter_rows(named=True) if not r["retry"]}
        todo = [s for s in specs if s.key not in done]
        results: dict[str, RunResult] = {}
        if todo:
            ensure_plotly(fleet)
            pool = executor if not isinstance(executor, str) else make_executor(
                executor, scheduler, workers)
            try:
                with progress("runs", total=len(todo), quiet=quiet) as advance:
                    outcomes = pool.map(process_run, todo, str(fleet.resolve()), steps)
                    for spec, result, error in outcomes:
                        if error is not None:
                            result = failed_result(
                                spec, f"worker lost: {type(error).__name__}: {error}", True)
                        results[spec.key] = result
                        if on_result is not None:
                            on_result(result)
                        advance()
            finally:
                if isinstance(executor, str):
                    pool.close()
        flags = _commit(fleet, specs, {log.path: log for log in logs}, results, done,
                        old_runs, old_manifest, previous, ignored)
    failures = [(f"{s.vehicle}/{s.date}/{s.run}", results[s.key].reason or "")
                for s in todo if results[s.key].status == "failed"]
    suspects = [(f"{s.vehicle}/{s.date}/{s.run}", results[s.key].reason or "")
                for s in todo if results[s.key].status == "suspect"]
    total = len(specs)
    name = executor if isinstance(executor, str) else executor.name
    return BatchSummary(fleet, total, len(todo) - len(failures), len(specs) - len(todo),
                        failures, time.perf_counter() - start, flags, name, suspects,
                        [log.skipped or "" for log in ignored])


def _commit(fleet: Path, specs: list[RunSpec], logs: dict[str, LogFile],
            results: dict[str, RunResult],
            done: dict[str, dict[str, Any]], old_runs: pl.DataFrame,
            old_manifest: pl.DataFrame, previous: int, ignored: list[LogFile]) -> int:
    """Write regressions, runs, index, then the manifest (the commit); drop stale outputs."""
    from tracelab.fleet.index import write_index
    from tracelab.fleet.regressions import regression_flags, with_flags
    from tracelab.fleet.views import connect_runs

    now = dt.datetime.now(dt.UTC).isoformat(timespec="seconds")
    current_files = {f for s in specs for f in s.files}
    current_keys = {s.key for s in specs}
    rows: list[dict[str, Any]] = []
    manifest_rows: list[dict[str, Any]] = []
    old_files = {r["key"]: r for r in old_manifest.iter_rows(named=True)}  # per file: key -> last
    for spec in specs:
        result = results.get(spec.key)
        row = result.row if result is not None else done[spec.key]
        status = result.status if result is not None else row["status"]
        reason = result.reason if result is not None else row["reason"]
        retry = result.retry if result is not None else False
        rows.append({**row, "status": status, "reason": reason, "retry": retry})
        previous_row = old_files.get(spec.key, {})
        for path, sha in zip(spec.files, spec.shas, strict=True):
            manifest_rows.append({
                "file": path, "sha256": sha, "run": spec.run, "origin": spec.origin,
                "vehicle": spec.vehicle, "date": spec.date, "key": spec.key, "status": status,
                "reason": reason, "retry": retry,
                "processed_at": now if result is not None else previous_row.get("processed_at"),
                "elapsed_s": result.elapsed_s if result is not None else previous_row.get(
                    "elapsed_s")})
    # runs whose logs left the root stay (archived); a run whose log changed content, or
    # that is the same (run, origin, vehicle) as a current run, is replaced
    kept = old_manifest.filter(~pl.col("key").is_in(list(current_keys)))
    gone_keys = set(kept["key"].to_list())
    replaced = set(kept.filter(pl.col("file").is_in(list(current_files)))["key"].to_list())
    current_ids = {(s.run, s.origin, s.vehicle) for s in specs}
    replaced |= {r["key"] for r in old_runs.iter_rows(named=True)
                 if (r["run"], r["origin"], r["vehicle"]) in current_ids}
    archived = gone_keys - replaced
    for row in old_runs.iter_rows(named=True):
        if row["key"] in archived:
            rows.append(row)
    manifest_rows.extend(kept.filter(pl.col("key").is_in(list(archived))).to_dicts())
    for entry in ignored:  # not logs (FIFO, outside ROOT): listed with the reason, never a run
        manifest_rows.append({"file": entry.path, "sha256": entry.sha256, "run": None,
                              "origin": None, "vehicle": None, "date": None, "key": None,
                              "status": "skipped", "reason": entry.skipped, "retry": False,
                              "processed_at": now, "elapsed_s": None})
    for item in manifest_rows:  # size, mtime and header error from discovery (kept for archived)
        log = logs.get(item["file"])
        if log is not None:
            item.update(bytes=log.bytes, mtime_ns=log.mtime_ns, header_error=log.error)
    runs = runs_frame(rows)
    con = connect_runs(fleet, runs)
    try:
        flags = regression_flags(con, previous)
    finally:
        con.close()
    runs = with_flags(runs, flags)
    layout.replace_atomically(fleet / layout.REGRESSIONS_FILE,
                              lambda tmp: flags.write_parquet(tmp))
    layout.replace_atomically(fleet / layout.RUNS_FILE, lambda tmp: runs.write_parquet(tmp))
    write_index(fleet, runs, flags)
    manifest = pl.DataFrame(manifest_rows, schema=MANIFEST, strict=False)
    layout.replace_atomically(fleet / layout.MANIFEST_FILE,
                              lambda tmp: manifest.write_parquet(tmp))
    _collect_garbage(fleet, set(runs.filter(pl.col("status").is_in(PUBLISHED))["key"].to_list()))
    return flags.height


def _collect_garbage(fleet: Path, keys: set[str]) -> None:
    """Remove per-run outputs of keys no longer in the fleet (superseded runs, orphans of a
    killed batch); loops over files of runs, not frames."""
    keep16 = {k[:16] for k in keys}
    for sub in (layout.DATA_DIR, layout.REPORTS_DIR):
        folder = fleet / sub
        if not folder.is_dir():
            continue
        for path in folder.glob("**/*-*.*"):
            key16 = layout.key_of_part(path.name)
            if key16 is not None and path.is_file() and key16 not in keep16:
                path.unlink(missing_ok=True)
    records = fleet / layout.RECORDS_DIR
    if records.is_dir():
        for path in records.glob("*.json"):
            if path.stem not in keys:
                path.unlink(missing_ok=True)
