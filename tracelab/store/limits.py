"""How much memory a command may use, and where its DuckDB connections spill.

One budget per command: ``--memory 2GiB`` on the command line, else ``TRACELAB_MEMORY`` in the
environment (the batch sets it for its workers), else 2 GiB. The budget is the whole process's
peak memory; DuckDB gets a share of it (``DUCKDB_SHARE``) as its ``memory_limit`` and spills
sorts, joins and temporary tables beyond that to a scratch folder: ``--temp-dir`` /
``TRACELAB_TEMP_DIR``, else ``DATASET/.tmp``. Every connection a command opens goes through
:func:`configure` (``Dataset.connect()`` and the fleet views call it), so each command inherits
the limits without passing them around::

    with use_limits("1GiB"):
        workflow.timing(dataset)     # every connection opened inside has the limits
"""

from __future__ import annotations

import contextlib
import os
import re
from collections.abc import Iterator
from contextvars import ContextVar
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from tracelab.errors import UsageError

if TYPE_CHECKING:
    import duckdb

ENV_MEMORY = "TRACELAB_MEMORY"
ENV_TEMP_DIR = "TRACELAB_TEMP_DIR"
ENV_THREADS = "TRACELAB_THREADS"
KIB = 1024
GIB = KIB ** 3
DEFAULT_MEMORY_BYTES = 2 * GIB
#: Smallest budget accepted: below it the interpreter and libraries alone do not fit.
MIN_MEMORY_BYTES = 256 * KIB ** 2
#: DuckDB's share of the budget; the rest is the interpreter, the libraries and the polars
#: frames a command materialises (its outputs, the per-batch inputs of the replay).
DUCKDB_SHARE = 0.5
#: Name of the default scratch folder inside the dataset (or fleet) directory.
TEMP_DIR_NAME = ".tmp"

_UNITS = {"": 1, "b": 1,
          "k": KIB, "kib": KIB, "kb": 1000,
          "m": KIB ** 2, "mib": KIB ** 2, "mb": 1000 ** 2,
          "g": GIB, "gib": GIB, "gb": 1000 ** 3,
          "t": KIB ** 4, "tib": KIB ** 4, "tb": 1000 ** 4}
_SIZE_RE = re.compile(r"^\s*(\d+(?:\.\d*)?|\.\d+)\s*([A-Za-z]*)\s*$")


def parse_size(text: str) -> int:
    """Bytes of a size written ``2GiB``, ``1.5 GB``, ``512M`` or ``1073741824``.

    KiB/MiB/GiB/TiB and the bare letters K/M/G/T are powers of 1024; kB/MB/GB/TB powers of
    1000 (IEC 80000-13 prefixes). ValueError for anything else.
    """
    match = _SIZE_RE.match(text)
    if not match or match.group(2).lower() not in _UNITS:
        raise ValueError(f"{text!r} is not a size (write e.g. 2GiB, 512MiB, 1.5GB)")
    return int(float(match.group(1)) * _UNITS[match.group(2).lower()])


def format_size(n_bytes: int) -> str:
    """``2147483648`` -> ``2.0 GiB`` (for messages)."""
    for unit, size in (("GiB", GIB), ("MiB", KIB ** 2), ("KiB", KIB)):
        if n_bytes >= size:
            return f"{n_bytes / size:.1f} {unit}"
    return f"{n_bytes} B"


@dataclass(frozen=True)
class Limits:
    """A command's memory budget and scratch folder (None: ``<dataset>/.tmp``)."""

    memory_bytes: int = DEFAULT_MEMORY_BYTES
    temp_dir: Path | None = None

    @property
    def duckdb_bytes(self) -> int:
        """DuckDB's ``memory_limit``: its share of the budget."""
        return int(self.memory_bytes * DUCKDB_SHARE)

    def scratch(self, folder: Path) -> Path:
        """Where a connection over ``folder`` (a dataset or fleet) spills."""
        return self.temp_dir if self.temp_dir is not None else folder / TEMP_DIR_NAME


_current: ContextVar[Limits | None] = ContextVar("tracelab_limits", default=None)


def make_limits(memory: str | int | None = None, temp_dir: str | Path | None = None,
                option: str = "--memory") -> Limits:
    """Limits from option values, falling back to the environment, then the defaults.
    A bad value is the user's mistake (UsageError naming ``option`` or the variable)."""
    source = option
    if memory is None and (env := os.environ.get(ENV_MEMORY)):
        memory, source = env, ENV_MEMORY
    if memory is None:
        memory_bytes = DEFAULT_MEMORY_BYTES
    elif isinstance(memory, int):
        memory_bytes = memory
    else:
        try:
            memory_bytes = parse_size(memory)
        except ValueError as error:
            raise UsageError(f"{source}: {error}") from None
    if memory_bytes < MIN_MEMORY_BYTES:
        raise UsageError(f"{source}: {format_size(memory_bytes)} is too little; "
                         f"give at least {format_size(MIN_MEMORY_BYTES)}")
    if temp_dir is None and (env_dir := os.environ.get(ENV_TEMP_DIR)):
        temp_dir = env_dir
    return Limits(memory_bytes, Path(temp_dir) if temp_dir is not None else None)


def current_limits() -> Limits:
    """The limits in force: those of the innermost :func:`use_limits`, else from the
    environment (``TRACELAB_MEMORY``, ``TRACELAB_TEMP_DIR``), else 2 GiB and ``<dataset>/.tmp``."""
    limits = _current.get()
    return limits if limits is not None else make_limits()


@contextlib.contextmanager
def use_limits(memory: str | int | None = None,
               temp_dir: str | Path | None = None) -> Iterator[Limits]:
    """Every connection opened inside the block gets these limits (options as the CLI takes
    them; None falls back to the environment and the defaults)."""
    limits = make_limits(memory, temp_dir)
    token = _current.set(limits)
    try:
        yield limits
    finally:
        _current.reset(token)


def configure(con: duckdb.DuckDBPyConnection, folder: Path) -> Limits:
    """Apply the current limits to a fresh connection over ``folder``: memory_limit, spilling
    to the scratch folder, no DuckDB progress bar (it writes to stdout on long queries),
    and the batch worker's share of threads (``TRACELAB_THREADS``).
    Insertion order stays preserved here (``tracelab sql`` users see frames in file order);
    analyses that order their own output turn it off on their connection."""
    limits = current_limits()
    con.execute(f"SET memory_limit = '{limits.duckdb_bytes // KIB}KiB'")
    con.execute("SET temp_directory = $dir", {"dir": str(limits.scratch(Path(folder)))})
    con.execute("SET enable_progress_bar = false")  # it would print into --json output
    if threads := worker_threads():
        con.execute(f"SET threads = {threads}")
    return limits


def worker_threads() -> int | None:
    """The batch worker's share of threads (``TRACELAB_THREADS``), None when not set."""
    threads = os.environ.get(ENV_THREADS)
    return int(threads) if threads else None


def memory_limit_bytes(con: duckdb.DuckDBPyConnection) -> int:
    """The memory_limit a connection runs under, in bytes (DuckDB prints it ``1.0 GiB``)."""
    text = con.sql("SELECT current_setting('memory_limit')").fetchall()[0][0]
    return parse_size(str(text))
