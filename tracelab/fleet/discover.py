"""Find the frame logs under a fleet root and group the parts of each run.

A run is the set of logs sharing ``%meta run`` (else the file name) and ``%origin``; its vehicle
is ``%meta vehicle`` and its date the origin's date. The content key of a run (sha256 over its
files' hashes, its catalog's hash and the pipeline version) decides whether it must be redone.

Odd entries under the root never stop the batch: anything that is not a regular file (a FIFO,
a socket, a device) and any symlink whose target lies outside the root is skipped with its
reason (``LogFile.skipped``); a dangling symlink or a file that cannot be read (I/O error,
permission) is a run of its own that fails with its reason. Vehicle names are reduced to
``[A-Za-z0-9_.-]`` once, here (``safe_name``), so ``runs``, the manifest and the hive
partitions of the data views all show the same name.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import re
import stat as stat_module
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path

from tracelab import __version__
from tracelab.errors import TracelabError
from tracelab.store.ingest import file_sha256

LOG_SUFFIXES = (".frames", ".frames.gz", ".frames.zst")
CATALOG_NAME = "catalog.toml"
#: Bump when the per-run outputs change shape, so every run is redone once.
PIPELINE_VERSION = f"{__version__}/fleet-1"
UNKNOWN_VEHICLE = "unknown"
_UNSAFE = re.compile(r"[^A-Za-z0-9_.-]")


@dataclass(frozen=True)
class LogFile:
    """One log under the root, with what its header says (or why it could not be read)."""

    path: str
    sha256: str
    bytes: int
    mtime_ns: int
    run: str
    origin: str | None
    vehicle: str
    date: str
    error: str | None = None
    skipped: str | None = None  # not a log to process at all (FIFO, outside ROOT): why


@dataclass(frozen=True)
class RunSpec:
    """Everything a worker needs to process one run; small and picklable."""

    run: str
    origin: str | None
    vehicle: str
    date: str
    files: tuple[str, ...]
    shas: tuple[str, ...]
    catalog: str | None
    catalog_sha: str | None
    key: str
    error: str | None = None  # set when a header could not be read: the run fails as is
    notes: tuple[str, ...] = field(default=())

    @property
    def part(self) -> str:
        """File stem of every per-run output: readable run name plus the content key."""
        return f"{safe_name(self.run)}-{self.key[:16]}"

    @property
    def partition(self) -> str:
        """Hive partition folder of this run: ``vehicle=V/date=D``."""
        return f"vehicle={safe_name(self.vehicle)}/date={self.date}"


def safe_name(text: str) -> str:
    """Keep a name usable as a file or hive partition value on every engine."""
    cleaned = _UNSAFE.sub("_", text)
    return cleaned or "_"


def is_log(name: str) -> bool:
    return name.endswith(LOG_SUFFIXES)


def stem(name: str) -> str:
    """File name without the log extensions (the dataset's run name without ``%meta run``)."""
    for suffix in sorted(LOG_SUFFIXES, key=len, reverse=True):
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return name


def find_logs(root: Path, exclude: Path | None = None) -> list[Path]:
    """All logs under ``root``, sorted; hidden folders and ``exclude`` (the fleet) are skipped."""
    found: list[Path] = []
    skip = exclude.resolve() if exclude is not None else None
    for folder, dirs, files in os.walk(root):
        here = Path(folder)
        dirs[:] = sorted(d for d in dirs if not d.startswith(".")
                         and (skip is None or (here / d).resolve() != skip))
        found.extend(here / name for name in sorted(files) if is_log(name))
    return found


def _date_of(origin: str | None, mtime_ns: int) -> str:
    """The run's date: the origin's calendar day (UTC), else the file's modification day."""
    if origin:
        return origin[:10]
    return dt.datetime.fromtimestamp(mtime_ns / 1e9, tz=dt.UTC).date().isoformat()


_KINDS = ((stat_module.S_ISFIFO, "a FIFO"), (stat_module.S_ISSOCK, "a socket"),
          (stat_module.S_ISCHR, "a character device"), (stat_module.S_ISBLK, "a block device"),
          (stat_module.S_ISDIR, "a folder"))


def _problem(path: Path, root: Path | None) -> tuple[str | None, str | None]:
    """(skip reason, failure reason) of an entry before it is opened; (None, None) for a
    regular file that may be read. Never opens the file (a FIFO would block)."""
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        target = os.readlink(path) if path.is_symlink() else "?"
        return None, f"{path}: dangling symlink (points to {target}, which does not exist)"
    except OSError as error:
        return None, f"{path}: cannot read ({error.strerror or error})"
    if root is not None and path.is_symlink():
        resolved, base = path.resolve(), root.resolve()
        if resolved != base and base not in resolved.parents:
            return (f"{path}: symlink to {resolved}, outside the root {root}; not followed "
                    "(link or copy the log into the root)"), None
    for test, kind in _KINDS:
        if test(mode):
            return f"{path}: not a regular file ({kind}); skipped", None
    if not os.access(path, os.R_OK):
        return None, f"{path}: cannot read ({os.strerror(13)})"
    return None, None


def _unreadable(path: Path, reason: str, skipped: bool = False) -> LogFile:
    """A LogFile for an entry that is never opened: identified by its path and reason."""
    try:
        st = os.lstat(path)
        size, mtime = st.st_size, st.st_mtime_ns
    except OSError:
        size, mtime = 0, 0
    sha = hashlib.sha256(f"unreadable:{path}:{reason}".encode()).hexdigest()
    return LogFile(str(path), sha, size, mtime, stem(path.name), None, UNKNOWN_VEHICLE,
                   _date_of(None, mtime), error=None if skipped else reason,
                   skipped=reason if skipped else None)


def describe_log(path: Path, known: Mapping[str, LogFile] | None = None,
                 root: Path | None = None) -> LogFile:
    """Hash and read the header of one log; reuse ``known[path]`` when size and mtime match.
    Entries that are not regular readable files under ``root`` are described, not opened."""
    from tracelab.format.reader import read_header

    skip, failure = _problem(path, root)
    if skip is not None:
        return _unreadable(path, skip, skipped=True)
    if failure is not None:
        return _unreadable(path, failure)
    stat = path.stat()
    previous = (known or {}).get(str(path))
    if (previous is not None and previous.bytes == stat.st_size
            and previous.mtime_ns == stat.st_mtime_ns):
        return previous
    try:
        sha = file_sha256(path)
    except OSError as error:  # an I/O error part-way: this log fails alone
        return _unreadable(path, f"{path}: cannot read ({error.strerror or error})")
    try:
        header = read_header(path)
    except TracelabError as error:
        return LogFile(str(path), sha, stat.st_size, stat.st_mtime_ns, stem(path.name), None,
                       UNKNOWN_VEHICLE, _date_of(None, stat.st_mtime_ns), error=str(error))
    except OSError as error:
        return LogFile(str(path), sha, stat.st_size, stat.st_mtime_ns, stem(path.name), None,
                       UNKNOWN_VEHICLE, _date_of(None, stat.st_mtime_ns),
                       error=f"{path}: cannot read ({error.strerror or error})")
    run = header.meta.get("run") or stem(path.name)
    vehicle = safe_name(header.meta.get("vehicle") or UNKNOWN_VEHICLE)  # one name everywhere
    return LogFile(str(path), sha, stat.st_size, stat.st_mtime_ns, run, header.origin, vehicle,
                   _date_of(header.origin, stat.st_mtime_ns))


def nearest_catalog(log: Path, root: Path) -> Path | None:
    """``catalog.toml`` in the log's folder or the nearest folder above it, up to ``root``."""
    root = root.resolve()
    folder = log.resolve().parent
    while True:
        candidate = folder / CATALOG_NAME
        if candidate.is_file():
            return candidate
        if folder == root or folder.parent == folder or root not in folder.parents:
            return None
        folder = folder.parent


def run_key(shas: list[str], catalog_sha: str | None) -> str:
    """Content key of a run: same files, same catalog, same pipeline -> same outputs."""
    text = json.dumps({"files": sorted(shas), "catalog": catalog_sha,
                       "pipeline": PIPELINE_VERSION}, sort_keys=True)
    return hashlib.sha256(text.encode()).hexdigest()


def group_runs(logs: list[LogFile], root: Path, catalog: Path | None = None) -> list[RunSpec]:
    """Group logs into runs by (run, origin); an unreadable log is a run of its own.

    Loops over files, not frames. Parts of one run must agree on the vehicle and the catalog;
    when they do not, the run fails with that reason rather than mixing vehicles.
    """
    groups: dict[tuple[str, str | None, str | None], list[LogFile]] = {}
    for log in logs:
        if log.skipped:  # not a log: listed in the manifest with its reason, never a run
            continue
        broken = log.path if log.error else None
        groups.setdefault((log.run, log.origin, broken), []).append(log)
    catalog_shas: dict[Path, str] = {}

    def catalog_sha(path: Path | None) -> str | None:
        if path is None:
            return None
        if path not in catalog_shas:
            catalog_shas[path] = file_sha256(path)
        return catalog_shas[path]

    specs: list[RunSpec] = []
    for (run, origin, _broken), members in groups.items():
        members.sort(key=lambda m: m.path)
        shas = [m.sha256 for m in members]
        first = members[0]
        error = first.error
        vehicles = sorted({m.vehicle for m in members})
        if catalog is not None:
            cats = [catalog.resolve()]
        else:
            cats = sorted({c for m in members if (c := nearest_catalog(Path(m.path), root))})
        if error is None and len(vehicles) > 1:
            error = f"run {run!r}: parts name different vehicles ({', '.join(vehicles)})"
        if error is None and len(cats) > 1:
            error = (f"run {run!r}: parts lie under different catalogs "
                     f"({', '.join(str(c) for c in cats)})")
        cat = cats[0] if cats else None
        try:
            sha = catalog_sha(cat)
        except OSError as exc:
            sha, error = None, error or f"{cat}: cannot read the catalog ({exc.strerror or exc})"
        spec = RunSpec(run=run, origin=origin, vehicle=first.vehicle, date=first.date,
                       files=tuple(m.path for m in members), shas=tuple(shas),
                       catalog=str(cat) if cat else None, catalog_sha=sha,
                       key=run_key(shas, sha), error=error)
        if cat is None and error is None:
            spec = replace(spec, notes=("no catalog.toml found; timing without names, "
                                        "no fault replay",))
        specs.append(spec)
    specs.sort(key=lambda s: (s.vehicle, s.date, s.origin or "", s.run, s.key))
    return specs
