"""A dataset directory: manifest, part folders, analyses, and DuckDB views over them.

    DATASET/manifest.parquet              one row per ingested file; the commit record
    DATASET/parts/<sha16>/<table>/<n>.parquet
    DATASET/analyses/<name>.parquet | <name>.json

Readers see only the part folders the manifest lists, so a writer stages parts, renames them
into place and replaces the manifest last (``os.replace``): an interrupted write leaves the
dataset as it was. One writer at a time per dataset: every writer holds ``writing()``
(store/lock.py); staging folders carry their writer's pid and host, so start-up clean-up
removes only those whose owner is gone.

DuckDB reads a path with ``[``, ``*`` or ``?`` as a pattern, so the views name files by
``glob_escape()``d paths: a dataset ``gl[X]`` never reads its sibling ``glX``.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import re
import shutil
import socket
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import polars as pl

from tracelab.errors import StorageError, StoreError, UsageError
from tracelab.store import schema
from tracelab.store.frames_view import BusTiming, bus_timings, frames_view_sql
from tracelab.store.limits import configure
from tracelab.store.lock import LOCK_FILE, write_lock

if TYPE_CHECKING:
    import duckdb

MANIFEST_FILE = "manifest.parquet"
PARTS_DIR = "parts"
ANALYSES_DIR = "analyses"
STAGING_PREFIX = ".staging-"
TRASH_PREFIX = ".trash-"
_NAME_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_OS_ERRNO = re.compile(r"(?:os error|errno|Errno)\s*(\d+)")
PARQUET_MAGIC = b"PAR1"


def sha16(sha256: str) -> str:
    """The part-folder name of a file: the first 16 hex digits of its sha256."""
    return sha256[:16]



def glob_escape(path: str | Path) -> str:
    """``path`` as a DuckDB file pattern that matches only itself (``[`` -> ``[[]`` ...)."""
    return "".join(f"[{char}]" if char in "[*?" else char for char in str(path))


def _existing(path: Path) -> Path:
    for candidate in (path, *path.parents):
        if candidate.exists():
            return candidate
    return Path("/")


def os_reason(error: BaseException, where: Path | None = None) -> str | None:
    """The operating system's reason behind a failed write, also when a library wrapped it
    (polars: "... (os error 28)"; pyarrow: "[errno 28]"; a bare "transport error"): from the
    errno, else from the message, else from probing the folder written to."""
    if isinstance(error, OSError) and error.errno:
        return os.strerror(error.errno)
    if match := _OS_ERRNO.search(str(error)):
        return os.strerror(int(match.group(1)))
    if where is None:
        return None
    folder = _existing(where)
    try:
        stat = os.statvfs(folder)
    except OSError:
        return None
    if stat.f_flag & os.ST_RDONLY:
        return os.strerror(errno.EROFS)
    if stat.f_bavail == 0:
        return os.strerror(errno.ENOSPC)
    if not os.access(folder, os.W_OK):
        return os.strerror(errno.EACCES)
    return None


def storage_error(path: str | Path, error: BaseException, doing: str = "cannot write"
                  ) -> StorageError:
    """``PATH: cannot write (No space left on device)`` (exit 5)."""
    reason = os_reason(error, Path(path).parent)
    if reason is None:
        reason = " ".join(str(error).split()) or type(error).__name__
    return StorageError(f"{path}: {doing} ({reason})")


@contextlib.contextmanager
def storage_guard(path: str | Path, doing: str = "cannot write") -> Iterator[None]:
    """Turn a write failure the machine caused (disk full, read-only, permissions), however a
    library reports it, into StorageError naming ``path``; any other error passes through."""
    try:
        yield
    except StorageError:
        raise
    except Exception as error:
        if isinstance(error, OSError) or os_reason(error, Path(path).parent) is not None:
            raise storage_error(path, error, doing) from error
        raise


def replace_atomically(target: Path, write: Callable[[Path], Any]) -> Path:
    """Write through a temporary sibling and ``os.replace`` it: readers see old or new, never half."""
    tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex}.tmp")
    try:
        with storage_guard(target):
            target.parent.mkdir(parents=True, exist_ok=True)
            write(tmp)
            os.replace(tmp, target)
    finally:
        with contextlib.suppress(OSError):
            tmp.unlink(missing_ok=True)
    return target


def parquet_intact(path: Path) -> bool:
    """Whether ``path`` starts and ends with the Parquet magic (a truncated file does not)."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(4)
            handle.seek(-4, os.SEEK_END)
            return head == PARQUET_MAGIC and handle.read(4) == PARQUET_MAGIC
    except OSError:
        return False


def _check_parts(files: list[Path]) -> None:
    for file in files:  # loops over part files (a few per ingested file), not rows
        if not parquet_intact(file):
            raise StorageError(f"{file}: damaged Parquet file (truncated or overwritten); "
                               "re-ingest its log with --force")


def _owner_alive(name: str) -> bool:
    """Whether the writer named in a ``.staging-<pid>@<host>-<uuid>`` folder still runs."""
    body = name.split("-", 1)[1] if "-" in name else ""
    pid_text, at, rest = body.partition("@")
    if not at or not pid_text.isdigit():
        return False  # an older layout: its writer is gone (we hold the lock)
    host = rest.rsplit("-", 1)[0]
    if host != socket.gethostname():
        return True  # another machine's writer: not ours to judge
    try:
        os.kill(int(pid_text), 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _owned_name(prefix: str) -> str:
    return f"{prefix}{os.getpid()}@{socket.gethostname()}-{uuid.uuid4().hex}"


class Dataset:
    """Handle on a dataset directory; cheap to create, reads the disk on demand."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        #: After connect(): the frames part files when the frames view reads them in one
        #: scan, in its order (their stored columns are the view's as they are), else None.
        self.frame_files: list[Path] | None = None

    # --- reading ------------------------------------------------------------------------

    @property
    def manifest_path(self) -> Path:
        return self.path / MANIFEST_FILE

    def manifest(self) -> pl.DataFrame:
        """One row per ingested file (schema.MANIFEST); empty before the first ingest."""
        if not self.manifest_path.exists():
            return schema.empty("manifest")
        if not parquet_intact(self.manifest_path):
            raise StorageError(f"{self.manifest_path}: damaged manifest (truncated or "
                               "overwritten); the dataset cannot be read")
        try:
            frame = pl.read_parquet(self.manifest_path, glob=False)
        except Exception as error:  # pyarrow / polars I/O errors become ours, with the path
            raise storage_error(self.manifest_path, error, "cannot read the manifest") from error
        missing = [name for name in schema.MANIFEST if name not in frame.columns]
        if missing:  # a manifest of an older tracelab: the new columns are empty
            frame = frame.with_columns(pl.lit(None, schema.MANIFEST[name]).alias(name)
                                       for name in missing)
        layouts = set(frame["layout"].fill_null(1).to_list())
        if not layouts <= set(schema.KNOWN_LAYOUTS):
            raise StoreError(
                f"{self.path}: written by a newer tracelab (parts layout "
                f"{max(layouts)}; this version reads layouts "
                f"{', '.join(map(str, schema.KNOWN_LAYOUTS))}); upgrade tracelab, or re-ingest "
                "the logs into a new dataset with this version")
        return frame

    def writing(self, what: str) -> contextlib.AbstractContextManager[None]:
        """Hold the dataset's write lock (store/lock.py) while the block writes."""
        self.path.mkdir(parents=True, exist_ok=True)
        return write_lock(self.path, what)

    def runs(self) -> list[str]:
        """The runs in the dataset, sorted."""
        return sorted(self.manifest()["run"].unique().drop_nulls().to_list())

    def part_files(self, table: str, shas: list[str] | None = None) -> list[Path]:
        """The Parquet files of ``table`` in the part folders the manifest lists."""
        files: list[Path] = []
        for sha in self.manifest()["sha256"].to_list() if shas is None else shas:
            folder = self.path / PARTS_DIR / sha16(sha) / table
            try:  # a listing, not a pattern: the dataset path may hold [ ] * ?
                names = [n for n in os.listdir(folder)
                         if n.endswith(".parquet") and n[:-8].isdigit()]
            except FileNotFoundError:
                continue
            except OSError as error:
                raise storage_error(folder, error, "cannot list the part") from error
            files.extend(folder / n for n in sorted(names, key=lambda n: int(n[:-8])))
        return files

    def table(self, table: str) -> pl.LazyFrame:
        """One table over the committed parts, as the views show it (frames with its
        derived columns; read through DuckDB, so held in memory: tests, small datasets)."""
        if table == "frames":
            con = self.connect()
            try:
                return con.sql("SELECT * FROM frames").pl().lazy()
            finally:
                con.close()
        files = self.part_files(table)
        if not files:
            return schema.empty(table).lazy()
        _check_parts(files)
        return pl.scan_parquet(files, glob=False)

    def connect(self) -> duckdb.DuckDBPyConnection:
        """In-memory DuckDB with views frames, errors, status, marks, losses, rejects,
        manifest, and one view per ``analyses/*.parquet`` named after the file stem; under
        the current memory limits (``store.limits``), spilling to ``DATASET/.tmp``."""
        import duckdb  # here, not at import time: ingest never needs it (0.2 s of start-up)

        try:
            self.frame_files = None
            con = duckdb.connect(":memory:")
            configure(con, self.path)  # memory budget, spill folder, threads (store/limits.py)
            manifest = self.manifest()
            shas = manifest["sha256"].to_list()
            for table in schema.TABLES:
                files = self.part_files(table, shas)
                if files and table == "frames":
                    _check_parts(files)
                    groups = self._frame_groups(manifest)
                    con.execute(f"CREATE VIEW frames AS {self._frames_sql(groups)}")
                    # one scan: the stored columns as they are, in this order
                    self.frame_files = next(iter(groups.values())) if len(groups) == 1 \
                        else None
                elif files:
                    _check_parts(files)
                    listing = ", ".join(schema.sql_string(_sql_path(f)) for f in files)
                    con.execute(f"CREATE VIEW {table} AS SELECT * FROM read_parquet([{listing}])")
                else:
                    con.register(f"_empty_{table}", schema.empty(table).to_arrow())
                    con.execute(f"CREATE VIEW {table} AS SELECT * FROM _empty_{table}")
            if self.manifest_path.exists():
                con.execute("CREATE VIEW manifest AS SELECT * FROM read_parquet("
                            f"{schema.sql_string(_sql_path(self.manifest_path))})")
            else:
                con.register("_empty_manifest", schema.empty("manifest").to_arrow())
                con.execute("CREATE VIEW manifest AS SELECT * FROM _empty_manifest")
            taken = set(schema.TABLES) | {"manifest"}
            for file in self._analysis_files():
                if file.stem in taken or not _NAME_RE.match(file.stem):
                    continue
                if not parquet_intact(file):  # stale: the next analysis run rewrites it
                    continue
                con.execute(f'CREATE VIEW "{file.stem}" AS SELECT * FROM read_parquet('
                            f"{schema.sql_string(_sql_path(file))})")
            return con
        except duckdb.Error as error:
            raise StoreError(f"{self.path}: cannot open the dataset views ({error})") from error

    def _frames_sql(self, groups: dict[tuple[int, tuple[BusTiming, ...]], list[Path]]) -> str:
        """The frames view over every part: files of the same layout and bus settings share
        one scan (store/frames_view.py derives start/end/duration for layout 2)."""
        return frames_view_sql([
            (layout, buses, ", ".join(schema.sql_string(_sql_path(f)) for f in files))
            for (layout, buses), files in groups.items()])

    def _frame_groups(self, manifest: pl.DataFrame
                      ) -> dict[tuple[int, tuple[BusTiming, ...]], list[Path]]:
        """The frames part files by (layout, bus settings), in manifest order."""
        groups: dict[tuple[int, tuple[BusTiming, ...]], list[Path]] = {}
        rows = manifest.select("sha256", "buses", pl.col("layout").fill_null(1)).iter_rows()
        for sha, buses, layout in rows:  # one row per ingested file, not per frame
            files = self.part_files("frames", [sha])
            if files:
                key = (layout, bus_timings(schema.manifest_buses(buses)))
                groups.setdefault(key, []).extend(files)
        return groups

    def _analysis_files(self) -> list[Path]:
        folder = self.path / ANALYSES_DIR
        try:
            names = sorted(n for n in os.listdir(folder) if n.endswith(".parquet"))
        except FileNotFoundError:
            return []
        return [folder / n for n in names]

    # --- analyses -----------------------------------------------------------------------

    def _analysis_path(self, name: str, suffix: str) -> Path:
        if not _NAME_RE.match(name):
            raise UsageError(f"analysis name {name!r} must be letters, digits and _")
        return self.path / ANALYSES_DIR / f"{name}{suffix}"

    def write_analysis(self, name: str, frame: pl.DataFrame) -> Path:
        """Atomically write analyses/<name>.parquet (a view of that name in connect())."""
        path = self._analysis_path(name, ".parquet")
        return replace_atomically(
            path, lambda tmp: frame.write_parquet(tmp, compression="zstd"))

    def write_analysis_json(self, name: str, obj: Any) -> Path:
        """Atomically write analyses/<name>.json."""
        path = self._analysis_path(name, ".json")
        text = json.dumps(obj, indent=2, default=str)
        return replace_atomically(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))

    def read_analysis(self, name: str) -> pl.DataFrame | None:
        """The stored output, or None when absent or damaged (then it counts as stale)."""
        path = self._analysis_path(name, ".parquet")
        if not path.exists() or not parquet_intact(path):
            return None
        try:
            return pl.read_parquet(path, glob=False)
        except Exception:  # noqa: BLE001 - damaged inside: stale, recomputed by its analysis
            return None

    def read_analysis_json(self, name: str) -> Any:
        """The stored JSON output, or None when absent or damaged (stale)."""
        path = self._analysis_path(name, ".json")
        try:
            return json.loads(path.read_text(encoding="utf-8")) if path.exists() else None
        except (OSError, ValueError):
            return None

    def has_analysis(self, name: str) -> bool:
        """Whether a usable (present and intact) output ``name`` is stored."""
        parquet = self._analysis_path(name, ".parquet")
        if parquet.exists():
            return parquet_intact(parquet)
        return self.read_analysis_json(name) is not None

    # --- writing parts (ingest) ---------------------------------------------------------

    def new_staging_dir(self) -> Path:
        """A fresh folder under parts/ that readers never see until commit() renames it."""
        folder = self.path / PARTS_DIR / _owned_name(STAGING_PREFIX)
        with storage_guard(folder):
            folder.mkdir(parents=True)
        return folder

    def remove_leftovers(self) -> None:
        """Delete staging / trash folders whose writer is gone (killed, crashed); a live
        writer's folders stay, whoever runs this."""
        parts = self.path / PARTS_DIR
        if parts.is_dir():
            for folder in parts.iterdir():
                if (folder.name.startswith((STAGING_PREFIX, TRASH_PREFIX))
                        and not _owner_alive(folder.name)):
                    shutil.rmtree(folder, ignore_errors=True)

    def commit(self, staged: dict[str, Path], rows: pl.DataFrame) -> None:
        """Move each staged folder to parts/<sha16> and add ``rows`` to the manifest
        (replacing rows of the same sha256); the manifest replacement is the commit point."""
        old = self.manifest()
        trash: list[Path] = []
        try:
            for sha, folder in staged.items():
                target = self.path / PARTS_DIR / sha16(sha)
                if target.exists():  # a --force replacement or an unlisted leftover
                    away = target.with_name(_owned_name(TRASH_PREFIX))
                    os.replace(target, away)
                    trash.append(away)
                os.replace(folder, target)
            merged = pl.concat([
                old.filter(~pl.col("sha256").is_in(rows["sha256"].implode())),
                schema.conform(rows, "manifest"),
            ])
            replace_atomically(
                self.manifest_path, lambda tmp: merged.write_parquet(tmp, compression="zstd"))
        except OSError as error:
            raise storage_error(self.path, error, "cannot commit the ingest") from error
        for folder in trash:
            shutil.rmtree(folder, ignore_errors=True)


def is_dataset(path: str | Path) -> bool:
    return (Path(path) / MANIFEST_FILE).is_file()


def open_dataset(path: str | Path) -> Dataset:
    """Open an existing dataset; a path that is not one is the user's mistake (UsageError, exit 2)."""
    path = Path(path)
    if not is_dataset(path):
        raise UsageError(f"{path}: not a tracelab dataset (no {MANIFEST_FILE}; "
                         "create one with 'tracelab ingest LOG -o DATASET')")
    return Dataset(path)


def create_or_open(path: str | Path) -> Dataset:
    """The dataset at ``path``, creating the directory when missing or empty."""
    path = Path(path)
    if is_dataset(path):
        return Dataset(path)
    leftovers_only = path.is_dir() and {p.name for p in path.iterdir()} <= {PARTS_DIR, LOCK_FILE}
    if path.exists() and not leftovers_only:
        raise UsageError(f"{path}: exists and is not a tracelab dataset; choose another -o")
    make_output_dir(path, "dataset")
    return Dataset(path)


def make_output_dir(path: Path, what: str) -> Path:
    """The one rule for outputs: missing parent folders are created; a path that cannot be
    created (``/proc/nope``, under a file, no permission) is a usage error (exit 2)."""
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise UsageError(f"{path}: cannot create the {what} folder "
                         f"({error.strerror or error})") from error
    return path


def make_output_parent(path: Path, what: str) -> Path:
    """Create the folder an output file goes into (see ``make_output_dir``)."""
    if path.is_dir():
        raise UsageError(f"{path}: is a folder; give a file name for the {what}")
    make_output_dir(path.parent, what)
    return path


def _sql_path(path: Path) -> str:
    """An absolute path DuckDB reads as exactly that file."""
    return glob_escape(path.absolute())
