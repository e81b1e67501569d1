"""Stored columns of part files, row group by row group, decoded ahead on a thread pool.

For a pass over millions of frames that needs only stored columns (the replay's times and
identifiers), pyarrow's Parquet reader decodes them at about two thirds of the CPU DuckDB's
scan takes; reading the next row groups on worker threads while the caller works on the
current one keeps both cores busy. Memory stays bounded: at most ``ahead`` row groups are
decoded and waiting.
"""

from __future__ import annotations

import os
from collections import deque
from collections.abc import Iterator, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from tracelab.errors import StoreError
from tracelab.store.limits import ENV_THREADS


def _metadata(path: Path) -> pq.FileMetaData:
    try:
        return pq.read_metadata(path)
    except (OSError, pa.ArrowException) as error:
        raise StoreError(f"{path}: cannot read the Parquet footer ({error})") from error


def reader_threads() -> int:
    """The batch worker's share of threads (``TRACELAB_THREADS``), else up to two."""
    if threads := os.environ.get(ENV_THREADS):
        return max(1, int(threads))
    return max(1, min(2, os.cpu_count() or 1))


def stored_row_groups(files: Sequence[Path], columns: Sequence[str],
                      ahead: int | None = None) -> Iterator[pa.Table]:
    """``columns`` of every row group of ``files``, in file and row order."""
    metadata = {path: _metadata(path) for path in files}
    work = [(path, i) for path in files for i in range(metadata[path].num_row_groups)]
    ahead = ahead or reader_threads()

    def read(path: Path, i: int) -> pa.Table:
        try:  # a reader per call: a ParquetFile is not shared between threads
            return pq.ParquetFile(path, metadata=metadata[path]).read_row_group(
                i, columns=list(columns), use_threads=False)
        except (OSError, pa.ArrowException) as error:
            raise StoreError(f"{path}: cannot read row group {i} ({error})") from error

    with ThreadPoolExecutor(ahead) as pool:
        queue: deque[Future[pa.Table]] = deque()
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
