"""A dataset directory: manifest, part folders, analyses, and DuckDB views over them.

    DATASET/manifest.parquet              one row per ingested file; the commit record
    DATASET/parts/<sha16>/<table>/<n>.parquet
    DATASET/analyses/<name>.parquet | <name>.json

Readers see only the part folders the manifest lists, so a writer stages parts, renames them
into place and replaces the manifest last (``os.replace``): an interrupted write leaves the
dataset as it was. One writer at a time per dataset.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import polars as pl

from tracelab.errors import StoreError, UsageError
from tracelab.store import schema
from tracelab.store.limits import configure

if TYPE_CHECKING:
    import duckdb

MANIFEST_FILE = "manifest.parquet"
PARTS_DIR = "parts"
ANALYSES_DIR = "analyses"
STAGING_PREFIX = ".staging-"
TRASH_PREFIX = ".trash-"
_NAME_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


def sha16(sha256: str) -> str:
    """The part-folder name of a file: the first 16 hex digits of its sha256."""
    return sha256[:16]


def _sql_str(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def replace_atomically(target: Path, write: Callable[[Path], Any]) -> Path:
    """Write through a temporary sibling and ``os.replace`` it: readers see old or new, never half."""
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex}.tmp")
    try:
        write(tmp)
        os.replace(tmp, target)
    except OSError as error:
        raise StoreError(f"{target}: cannot write ({error.strerror or error})") from error
    finally:
        tmp.unlink(missing_ok=True)
    return target


class Dataset:
    """Handle on a dataset directory; cheap to create, reads the disk on demand."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)

    # --- reading ------------------------------------------------------------------------

    @property
    def manifest_path(self) -> Path:
        return self.path / MANIFEST_FILE

    def manifest(self) -> pl.DataFrame:
        """One row per ingested file (schema.MANIFEST); empty before the first ingest."""
        if not self.manifest_path.exists():
            return schema.empty("manifest")
        try:
            return pl.read_parquet(self.manifest_path)
        except Exception as error:  # pyarrow / polars I/O errors become ours, with the path
            raise StoreError(f"{self.manifest_path}: cannot read the manifest ({error})") from error

    def runs(self) -> list[str]:
        """The runs in the dataset, sorted."""
        return sorted(self.manifest()["run"].unique().drop_nulls().to_list())

    def part_files(self, table: str, shas: list[str] | None = None) -> list[Path]:
        """The Parquet files of ``table`` in the part folders the manifest lists."""
        files: list[Path] = []
        for sha in self.manifest()["sha256"].to_list() if shas is None else shas:
            folder = self.path / PARTS_DIR / sha16(sha) / table
            files.extend(sorted(folder.glob("*.parquet"), key=lambda p: int(p.stem)))
        return files

    def table(self, table: str) -> pl.LazyFrame:
        """A lazy scan of one table over the committed parts."""
        files = self.part_files(table)
        if not files:
            return schema.empty(table).lazy()
        return pl.scan_parquet(files)

    def connect(self) -> duckdb.DuckDBPyConnection:
        """In-memory DuckDB with views frames, errors, status, marks, losses, rejects,
        manifest, and one view per ``analyses/*.parquet`` named after the file stem; under
        the current memory limits (``store.limits``), spilling to ``DATASET/.tmp``."""
        import duckdb  # here, not at import time: ingest never needs it (0.2 s of start-up)

        try:
            con = duckdb.connect(":memory:")
            configure(con, self.path)  # memory budget, spill folder, threads (store/limits.py)
            shas = self.manifest()["sha256"].to_list()
            for table in schema.TABLES:
                files = self.part_files(table, shas)
                if files:
                    listing = ", ".join(_sql_str(str(f)) for f in files)
                    con.execute(f"CREATE VIEW {table} AS SELECT * FROM read_parquet([{listing}])")
                else:
                    con.register(f"_empty_{table}", schema.empty(table).to_arrow())
                    con.execute(f"CREATE VIEW {table} AS SELECT * FROM _empty_{table}")
            if self.manifest_path.exists():
                con.execute("CREATE VIEW manifest AS SELECT * FROM read_parquet("
                            f"{_sql_str(str(self.manifest_path))})")
            else:
                con.register("_empty_manifest", schema.empty("manifest").to_arrow())
                con.execute("CREATE VIEW manifest AS SELECT * FROM _empty_manifest")
            taken = set(schema.TABLES) | {"manifest"}
            for file in sorted((self.path / ANALYSES_DIR).glob("*.parquet")):
                if file.stem in taken or not _NAME_RE.match(file.stem):
                    continue
                con.execute(f'CREATE VIEW "{file.stem}" AS SELECT * FROM read_parquet('
                            f"{_sql_str(str(file))})")
            return con
        except duckdb.Error as error:
            raise StoreError(f"{self.path}: cannot open the dataset views ({error})") from error

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
        path = self._analysis_path(name, ".parquet")
        return pl.read_parquet(path) if path.exists() else None

    def read_analysis_json(self, name: str) -> Any:
        path = self._analysis_path(name, ".json")
        return json.loads(path.read_text(encoding="utf-8")) if path.exists() else None

    def has_analysis(self, name: str) -> bool:
        return (self._analysis_path(name, ".parquet").exists()
                or self._analysis_path(name, ".json").exists())

    # --- writing parts (ingest) ---------------------------------------------------------

    def new_staging_dir(self) -> Path:
        """A fresh folder under parts/ that readers never see until commit() renames it."""
        folder = self.path / PARTS_DIR / f"{STAGING_PREFIX}{uuid.uuid4().hex}"
        folder.mkdir(parents=True)
        return folder

    def remove_leftovers(self) -> None:
        """Delete staging / trash folders an interrupted writer left behind."""
        parts = self.path / PARTS_DIR
        if parts.is_dir():
            for folder in parts.iterdir():
                if folder.name.startswith((STAGING_PREFIX, TRASH_PREFIX)):
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
                    away = target.with_name(f"{TRASH_PREFIX}{uuid.uuid4().hex}")
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
            raise StoreError(f"{self.path}: cannot commit the ingest ({error})") from error
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
    leftovers_only = path.is_dir() and {p.name for p in path.iterdir()} <= {PARTS_DIR}
    if path.exists() and not leftovers_only:
        raise UsageError(f"{path}: exists and is not a tracelab dataset; choose another -o")
    path.mkdir(parents=True, exist_ok=True)
    return Dataset(path)
