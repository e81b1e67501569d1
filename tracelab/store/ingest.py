"""Ingest frame logs into a dataset: reader chunks -> physics -> staged parts -> manifest.

Every line of a file is accounted for (header/directive/comment/blank + records + rejects);
the dataset changes only at the final commit, so an interrupted or failed ingest (``--strict``
stop, corrupt file, crash) leaves it as it was.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import threading
from collections import deque
from collections.abc import Callable
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

import tracelab
from tracelab.errors import LogFormatError, UsageError, printable
from tracelab.format.compression import compression_name, open_log
from tracelab.format.reader import Block, Chunk, LogReader
from tracelab.format.writer import LogHeader
from tracelab.physics.bitlength import frame_bits
from tracelab.progress import progress
from tracelab.store import schema
from tracelab.store.dataset import Dataset, create_or_open, storage_guard
from tracelab.wording import counted

RECORD_TABLES = ("frames", "errors", "status", "marks", "losses")
SHOWN_REJECTS = 3
PARQUET_ZSTD_LEVEL = 1  # level 1 compresses frame tables nearly as well as 3, much faster
#: Chunks parsed, measured and written at once (polars and numpy release the GIL); one
#: more waits read ahead, so memory stays at a few chunks whatever the file size.
WORKERS = 2
#: frames columns that rise (nearly) steadily within a chunk: delta encoding packs them small.
DELTA_COLUMNS = ("t_ns", "line")


@dataclass
class FileSummary:
    """What one file contributed; ``row()`` is its manifest row."""

    file: str
    sha256: str
    bytes: int
    run: str
    header: LogHeader
    lines: int = 0
    header_lines: int = 0
    counts: dict[str, int] = field(default_factory=lambda: dict.fromkeys(RECORD_TABLES, 0))
    rejects: int = 0
    first_t_ns: int | None = None
    last_t_ns: int | None = None
    backward_steps: int = 0
    first_backward_line: int | None = None
    first_rejects: list[tuple[int, str]] = field(default_factory=list)
    content_sha256: str = ""
    overlaps: list[str] = field(default_factory=list)

    @property
    def records(self) -> int:
        return sum(self.counts.values())

    def add(self, chunk: Chunk, counts: dict[str, int]) -> None:
        """Fold in one chunk (in line order); ``counts``: rows per table of the chunk."""
        self.lines += chunk.lines
        self.header_lines += chunk.other_lines
        for table in RECORD_TABLES:
            self.counts[table] += counts[table]
        self.rejects += counts["rejects"]
        if len(self.first_rejects) < SHOWN_REJECTS and counts["rejects"]:
            head = chunk.rejects.head(SHOWN_REJECTS - len(self.first_rejects))
            self.first_rejects.extend(zip(head["line"].to_list(), head["reason"].to_list(),
                                          strict=True))
        if chunk.first_t_ns is not None:
            self.first_t_ns = min(chunk.first_t_ns, self.first_t_ns if self.first_t_ns
                                  is not None else chunk.first_t_ns)
        if chunk.last_t_ns is not None:
            self.last_t_ns = max(chunk.last_t_ns, self.last_t_ns or 0)
        if chunk.backward_steps and self.first_backward_line is None:
            self.first_backward_line = chunk.first_backward_line
        self.backward_steps += chunk.backward_steps

    def reconciliation(self) -> str:
        c = self.counts
        return (f"{self.file}: {counted(self.lines, 'line')} = {self.header_lines:,} "
                f"header/comment/blank + {counted(self.records, 'record')} "
                f"({counted(c['frames'], 'frame')}, {counted(c['errors'], 'error')}, "
                f"{counted(c['status'], 'status')}, {counted(c['marks'], 'mark')}, "
                f"{counted(c['losses'], 'loss')}) + {counted(self.rejects, 'reject')}")

    def row(self) -> dict[str, object]:
        buses = [{"alias": b.alias, "nominal_bps": b.nominal_bps, "data_bps": b.data_bps,
                  "stamp": b.stamp, "name": b.name} for b in self.header.buses]
        return {
            "file": self.file, "sha256": self.sha256, "bytes": self.bytes, "lines": self.lines,
            "header_lines": self.header_lines, **self.counts, "rejects": self.rejects,
            "first_t_ns": self.first_t_ns, "last_t_ns": self.last_t_ns,
            "backward_steps": self.backward_steps,
            "first_backward_line": self.first_backward_line, "origin": self.header.origin,
            "buses": json.dumps(buses), "meta": json.dumps(self.header.meta), "run": self.run,
            "vehicle": self.header.meta.get("vehicle"),
            "tracelab_version": tracelab.__version__,
            "ingested_at": datetime.now(UTC).isoformat(timespec="seconds"),
            "content_sha256": self.content_sha256 or self.sha256,
            "overlaps": ", ".join(self.overlaps) or None,
            "layout": schema.PARTS_LAYOUT,
        }


@dataclass
class IngestSummary:
    """Result of ``ingest_logs``: per-file reconciliation, skips and the first rejects."""

    dataset: Path
    files: list[FileSummary] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    #: (file, the file already holding the same decompressed content)
    same_content: list[tuple[str, str]] = field(default_factory=list)

    @property
    def lines(self) -> int:
        return sum(f.lines for f in self.files)

    @property
    def records(self) -> int:
        return sum(f.records for f in self.files)

    @property
    def frames(self) -> int:
        return sum(f.counts["frames"] for f in self.files)

    @property
    def rejects(self) -> int:
        return sum(f.rejects for f in self.files)

    @property
    def backward_steps(self) -> int:
        return sum(f.backward_steps for f in self.files)

    def describe(self) -> str:
        out = [f"ingested {counted(len(self.files), 'file')} into {self.dataset}"]
        if self.skipped:
            out[0] += (f"; skipped {len(self.skipped)} already ingested (use --force to "
                       f"replace): {', '.join(self.skipped)}")
        for file, twin in self.same_content:
            out.append(f"{file}: skipped, same content as {twin} (already ingested in "
                       "another compression)")
        for f in self.files:
            out.append(f.reconciliation())
            if f.overlaps:
                out.append(f"warning: {f.file}: its time span overlaps {', '.join(f.overlaps)} "
                           f"of the same run {f.run!r} on a common bus (recorded in the "
                           "manifest's overlaps column; a log ingested twice?)")
            if f.backward_steps:
                out.append(f"{f.file}: {counted(f.backward_steps, 'backward time step')}, first at "
                           f"line {f.first_backward_line} (kept; analyses order by time)")
        if self.rejects:
            first = [f"{f.file}:{line}: {reason}" for f in self.files
                     for line, reason in f.first_rejects][:SHOWN_REJECTS]
            out.append(f"{counted(self.rejects, 'line')} rejected (see the rejects table); first: "
                       + " | ".join(first))
        return "\n".join(printable(line) for line in out)  # a name or a log's bytes: escaped


def file_sha256(path: Path) -> str:
    """The sha256 of a file's bytes (hex): the identity of an ingested file."""
    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


def content_sha256(path: Path, stop: threading.Event | None = None) -> str | None:
    """The sha256 of a compressed log's decompressed bytes; None for a plain file (its
    sha256 is its content's). Stops early (None) when ``stop`` is set."""
    if not compression_name(path):
        return None
    digest = hashlib.sha256()
    stream, raw = open_log(path)
    try:
        while block := stream.read(1 << 20):  # 1 MiB at a time: memory stays flat
            if stop is not None and stop.is_set():
                return None
            digest.update(block)
    finally:
        stream.close()
        raw.close()
    return digest.hexdigest()


def run_name(path: Path, header: LogHeader) -> str:
    """``%meta run=``, else the file name without extensions."""
    return header.meta.get("run") or path.name.split(".")[0]


def _with_physics(frames: pl.DataFrame) -> pl.DataFrame:
    """Add bits and data_bits (u16): what the frames view derives durations and start / end
    times from (store/frames_view.py), with the file's bus settings."""
    lengths = frame_bits(frames)
    return frames.with_columns(bits=lengths["bits"], data_bits=lengths["data_phase_bits"])


class _PartWriter:
    """Writes one file's tables into a staging folder: <table>/<chunk index>.parquet."""

    def __init__(self, folder: Path, run: str, file: str, aliases: list[str] | None = None
                 ) -> None:
        self.folder, self.run, self.file, self.aliases = folder, run, file, aliases or []
        with storage_guard(folder):
            for table in schema.TABLES:
                (folder / table).mkdir()

    def write(self, table: str, frame: pl.DataFrame, index: int) -> None:
        """Write one chunk's rows of ``table``; frames may carry ``bus_code``, each row's
        bus as an index into the header's aliases (Chunk.frame_bus_codes)."""
        path = self.folder / table / f"{index}.parquet"
        with storage_guard(path):  # disk full, read-only: one line naming the path
            if table == "frames":
                self._write_frames(frame, path)
                return
            frame = frame.with_columns(run=pl.lit(self.run), file=pl.lit(self.file))
            frame = schema.conform(frame, table)
            frame.write_parquet(path, compression="zstd", compression_level=PARQUET_ZSTD_LEVEL)

    def _write_frames(self, frame: pl.DataFrame, path: Path) -> None:
        """The big table (schema.FRAMES_STORED), with per-column Parquet settings: run and
        file (constant) and bus as dictionaries, the rising times and line numbers
        delta-encoded, no min/max of the payload bytes; readers see the schema's column types
        (no stored Arrow schema, so the dictionaries read back as strings)."""
        names = list(schema.FRAMES_STORED)
        table = frame.select(pl.col(name).cast(schema.FRAMES_STORED[name]) for name in names
                             if name not in ("run", "bus", "file")).to_arrow()
        zeros = pa.array(np.zeros(frame.height, dtype=np.int32))
        constant = {name: pa.DictionaryArray.from_arrays(zeros, pa.array([value], pa.string()))
                    for name, value in (("run", self.run), ("file", self.file))}
        if "bus_code" in frame.columns and self.aliases:
            constant["bus"] = pa.DictionaryArray.from_arrays(
                frame["bus_code"].cast(pl.Int32).to_arrow(), pa.array(self.aliases, pa.string()))
        else:  # the exact path's frames: look the names up
            constant["bus"] = frame["bus"].cast(pl.Categorical).to_arrow()
        out = pa.table([constant[name] if name in constant else table.column(name)
                        for name in names], names=names)
        pq.write_table(out, path, compression="zstd", compression_level=PARQUET_ZSTD_LEVEL,
                       use_dictionary=[name for name in names if name not in DELTA_COLUMNS
                                       and name != "data"],
                       column_encoding=dict.fromkeys(DELTA_COLUMNS, "DELTA_BINARY_PACKED"),
                       write_statistics=[name for name in names if name != "data"],
                       store_schema=False)

    def close(self) -> None:
        """Every table gets at least one (possibly empty) file so views keep their schema."""
        for table in schema.TABLES:
            if not any((self.folder / table).iterdir()):
                self.write(table, schema.empty(table, stored=True), 0)


def _check_paths(logs: list[Path]) -> None:
    for path in logs:
        if not path.exists():
            raise UsageError(f"{path}: no such file")
        if not path.is_file():
            raise UsageError(f"{path}: not a file")
        if not os.access(path, os.R_OK):
            raise UsageError(f"{path}: not readable (permission denied)")


class _AlreadyIngested(Exception):
    """The file's sha256 (computed alongside) is in the dataset: stop and skip it."""

    def __init__(self, done_bytes: int) -> None:
        super().__init__()
        self.done_bytes = done_bytes


def _ingest_file(path: Path, sha_future: Future[str], is_new: Callable[[str], bool],
                 ds: Dataset, strict: bool, advance: Callable[[float], None]
                 ) -> tuple[FileSummary, Path]:
    """Stage one file's parts. The sha256 is computed in parallel; once known, a file that is
    already in the dataset stops early (_AlreadyIngested), so a re-run costs about a hash."""
    folder = ds.new_staging_dir()
    done = 0

    def check_sha(wait: bool) -> None:
        if (wait or sha_future.done()) and not is_new(sha_future.result()):
            raise _AlreadyIngested(done)

    try:
        with LogReader(path) as reader:
            header = reader.header
            summary = FileSummary(file=str(path), sha256="", bytes=path.stat().st_size,
                                  run=run_name(path, header), header=header,
                                  lines=reader.header_lines, header_lines=reader.header_lines)
            parts = _PartWriter(folder, summary.run, summary.file,
                                [b.alias for b in header.buses])

            def work(index: int, block: Block) -> tuple[Chunk, dict[str, int]]:
                chunk = reader.parse(block, strict)
                counts = {table: getattr(chunk, table).height for table in schema.TABLES}
                if counts["frames"]:
                    frames = _with_physics(chunk.frames)
                    if chunk.frame_bus_codes is not None:  # the fast path's, in frame order
                        frames = frames.with_columns(bus_code=chunk.frame_bus_codes)
                    parts.write("frames", frames, index)
                for table in ("errors", "status", "marks", "losses", "rejects"):
                    if counts[table]:
                        parts.write(table, getattr(chunk, table), index)
                chunk.frames = chunk.frames.clear()  # written: free it before the merge
                return chunk, counts

            def finish(future: Future[tuple[Chunk, dict[str, int]]]) -> None:
                nonlocal done
                chunk, counts = future.result()
                reader.link(chunk)
                summary.add(chunk, counts)
                advance(chunk.bytes_read - done)
                done = chunk.bytes_read
                check_sha(wait=False)

            pending: deque[Future[tuple[Chunk, dict[str, int]]]] = deque()
            with ThreadPoolExecutor(WORKERS, thread_name_prefix="tracelab-ingest") as pool:
                try:
                    for index, block in enumerate(reader.blocks()):
                        pending.append(pool.submit(work, index, block))
                        while len(pending) > WORKERS:
                            finish(pending.popleft())
                    while pending:
                        finish(pending.popleft())
                finally:
                    for future in pending:
                        future.cancel()
            parts.close()
        check_sha(wait=True)
    except LogFormatError:
        check_sha(wait=True)  # a file already ingested is skipped, even with --strict
        shutil.rmtree(folder, ignore_errors=True)
        raise
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise
    summary.sha256 = sha_future.result()
    if summary.lines != summary.header_lines + summary.records + summary.rejects:
        raise AssertionError(f"{path}: line reconciliation failed ({summary.reconciliation()})")
    return summary, folder


def ingest_logs(logs: list[Path] | list[str], dataset: Path | str, strict: bool = False,
                force: bool = False, quiet: bool = False) -> IngestSummary:
    """Ingest ``logs`` into ``dataset`` (created when missing) in one atomic commit.

    Files whose sha256 is already in the manifest are skipped unless ``force``, and so are
    files whose decompressed content is (the same log plain and as .gz). Bad lines go to
    ``rejects``; with ``strict`` the first one raises LogFormatError (exit 3) instead. The
    dataset's write lock is held throughout (a second writer waits, then exits 2).
    """
    paths = [Path(p) for p in logs]
    _check_paths(paths)
    created = not Path(dataset).exists()
    ds = create_or_open(dataset)
    with ds.writing("ingest"):
        return _ingest_locked(paths, ds, created, strict, force, quiet)


def _overlaps(summary: FileSummary, others: list[dict[str, object]]) -> list[str]:
    """Files of the same run whose [first, last] time span meets this file's on a bus both
    declare (loops over the files of one run)."""
    if summary.first_t_ns is None or summary.last_t_ns is None:
        return []
    buses = {b.alias for b in summary.header.buses}
    found = []
    for other in others:
        first, last = other.get("first_t_ns"), other.get("last_t_ns")
        if other.get("run") != summary.run or first is None or last is None:
            continue
        other_buses = {b["alias"] for b in schema.manifest_buses(str(other.get("buses") or ""))}
        if (buses & other_buses and int(str(first)) <= summary.last_t_ns
                and summary.first_t_ns <= int(str(last))):
            found.append(str(other["file"]))
    return found


def _ingest_locked(paths: list[Path], ds: Dataset, created: bool, strict: bool, force: bool,
                   quiet: bool) -> IngestSummary:
    ds.remove_leftovers()
    old = ds.manifest()
    known = set(old["sha256"].to_list())
    # content sha256 -> (file, sha256) of what is in the dataset or staged now
    contents = {c or s: (f, s) for s, c, f in zip(old["sha256"].to_list(),
                                                  old["content_sha256"].to_list(),
                                                  old["file"].to_list(), strict=True)}
    old_rows = old.to_dicts()
    result = IngestSummary(dataset=ds.path)
    staged: dict[str, Path] = {}
    stops: list[threading.Event] = []
    try:
        total = sum(p.stat().st_size for p in paths)
        with progress("ingest", total=total, quiet=quiet) as advance, \
                ThreadPoolExecutor(2, thread_name_prefix="tracelab-sha256") as hasher:
            for path in paths:
                def is_new(sha: str) -> bool:
                    return sha not in staged and (force or sha not in known)

                stops.append(stop := threading.Event())
                content_future = hasher.submit(content_sha256, path, stop)
                try:
                    summary, folder = _ingest_file(path, hasher.submit(file_sha256, path), is_new,
                                                   ds, strict, advance)
                except _AlreadyIngested as skip:
                    stop.set()
                    result.skipped.append(str(path))
                    advance(path.stat().st_size - skip.done_bytes)
                    continue
                except BaseException:
                    stop.set()  # failed: do not inflate the rest of it (a bomb) to hash it
                    raise
                try:
                    content = content_future.result() or summary.sha256
                except Exception:  # noqa: BLE001 - the reader read it; its bytes identify it
                    content = summary.sha256
                summary.content_sha256 = content
                twin = contents.get(content)
                if twin is not None and twin[1] != summary.sha256:  # another compression
                    shutil.rmtree(folder, ignore_errors=True)
                    result.same_content.append((str(path), twin[0]))
                    continue
                contents[content] = (str(path), summary.sha256)
                others = [r for r in old_rows if r["sha256"] != summary.sha256]
                others += [f.row() for f in result.files]
                summary.overlaps = _overlaps(summary, others)
                staged[summary.sha256] = folder
                result.files.append(summary)
        rows = pl.DataFrame([f.row() for f in result.files], schema=schema.MANIFEST)
        if staged or not ds.manifest_path.exists():  # all skipped: nothing to rewrite
            ds.commit(staged, rows)
    except BaseException:  # failed or interrupted: drop what was staged, then re-raise
        for stop in stops:
            stop.set()
        for folder in staged.values():
            shutil.rmtree(folder, ignore_errors=True)
        ds.remove_leftovers()
        if created:  # nothing was committed: leave no empty dataset behind
            shutil.rmtree(ds.path, ignore_errors=True)
        raise
    return result
