"""Stored columns of part files, row group by row group, decoded ahead on a thread pool.

For a pass over millions of frames that needs only stored columns (the replay's times,
identifiers and bit counts), pyarrow's Parquet reader decodes them at about two thirds of
the CPU DuckDB's scan takes; reading the next row groups on worker threads while the caller
works on the current one keeps both cores busy. Memory stays bounded: at most ``ahead``
row groups are decoded and waiting. The footers are read once, and their min/max
statistics answer "does any row have this flag set" without reading a row.
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path
from typing import Any, TypeVar, overload

import pyarrow as pa
import pyarrow.parquet as pq

from tracelab.errors import StoreError
from tracelab.store.limits import worker_threads

T = TypeVar("T")


def reader_threads() -> int:
    """The batch worker's share of threads (``TRACELAB_THREADS``), else up to two."""
    return max(1, worker_threads() or min(2, os.cpu_count() or 1))


class PartFiles:
    """Part files of one table, in the order their view reads them."""

    def __init__(self, files: Sequence[Path]) -> None:
        self.files = list(files)
        self.metadata: dict[Path, pq.FileMetaData] = {}
        for path in self.files:  # a loop over files (one footer each)
            try:
                self.metadata[path] = pq.read_metadata(path)
            except (OSError, pa.ArrowException) as error:
                raise StoreError(f"{path}: cannot read the Parquet footer ({error})") from error

    def any_true(self, column: str) -> bool | None:
        """Whether any row of a boolean column is true, from the row groups' statistics;
        None when a row group has none (then the rows must be read to tell)."""
        found = False
        for md in self.metadata.values():  # a loop over files and row groups (footers)
            names = [md.schema.column(j).name for j in range(md.num_columns)]
            if column not in names:
                return None
            j = names.index(column)
            for i in range(md.num_row_groups):
                chunk = md.row_group(i).column(j)
                stats = chunk.statistics
                if chunk.num_values == 0:
                    continue
                if stats is None or not stats.has_min_max:
                    return None
                found = found or bool(stats.max)
        return found

    @overload
    def row_groups(self, columns: Sequence[str], ahead: int | None = None) -> Iterator[pa.Table]:
        ...

    @overload
    def row_groups(self, columns: Sequence[str], ahead: int | None = None, *,
                   then: Callable[[pa.Table], T]) -> Iterator[T]:
        ...

    def row_groups(self, columns: Sequence[str], ahead: int | None = None, *,
                   then: Callable[[pa.Table], Any] | None = None) -> Iterator[Any]:
        """``columns`` of every row group, in file and row order; with ``then``, what it
        makes of each, run on the reading thread (the caller's next step, in parallel)."""
        work = [(path, i) for path in self.files
                for i in range(self.metadata[path].num_row_groups)]
        ahead = ahead or reader_threads()

        def read(path: Path, i: int) -> Any:
            try:  # a reader per call: a ParquetFile is not shared between threads
                table = pq.ParquetFile(path, metadata=self.metadata[path]).read_row_group(
                    i, columns=list(columns), use_threads=False)
            except (OSError, pa.ArrowException) as error:
                raise StoreError(f"{path}: cannot read row group {i} ({error})") from error
            return table if then is None else then(table)

        with ThreadPoolExecutor(ahead) as pool:
            queue: deque[Future[Any]] = deque()
            todo = iter(work)
            for path, i in todo:  # fill the pipeline, then one in for one out
                queue.append(pool.submit(read, path, i))
                if len(queue) >= ahead:
                    break
            while queue:
                table = queue.popleft().result()
                nxt = next(todo, None)
                if nxt is not None:
                    queue.append(pool.submit(read, *nxt))
                yield table
