"""Transparent gzip / zstd for frame logs: read by content, write by file extension."""

from __future__ import annotations

import gzip
import io
from pathlib import Path
from typing import BinaryIO

import zstandard

GZIP_MAGIC = b"\x1f\x8b"
ZSTD_MAGIC = b"\x28\xb5\x2f\xfd"


def open_log_bytes(path: str | Path) -> BinaryIO:
    """Open a log for binary reading, decompressing gzip or zstd by its first bytes."""
    raw = open(path, "rb")  # noqa: SIM115 - returned to the caller
    head = raw.read(4)
    raw.seek(0)
    if head.startswith(GZIP_MAGIC):
        return gzip.GzipFile(fileobj=raw, mode="rb")  # type: ignore[return-value]
    if head.startswith(ZSTD_MAGIC):
        reader = zstandard.ZstdDecompressor().stream_reader(raw, closefd=True)
        return io.BufferedReader(reader)  # type: ignore[arg-type]
    return raw


def open_log_for_writing(path: str | Path) -> BinaryIO:
    """Open a log for binary writing; ``.gz`` / ``.zst`` compress. Output is deterministic
    (no timestamp or file name in the gzip header) so equal logs give equal bytes."""
    path = Path(path)
    raw = open(path, "wb")  # noqa: SIM115 - returned to the caller
    if path.suffix == ".gz":
        return gzip.GzipFile(filename="", mode="wb", fileobj=raw, mtime=0)  # type: ignore[return-value]
    if path.suffix == ".zst":
        return zstandard.ZstdCompressor(level=6).stream_writer(raw, closefd=True)  # type: ignore[return-value]
    return raw
