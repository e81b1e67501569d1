"""Transparent gzip / zstd for frame logs: read by content, write by file extension."""

from __future__ import annotations

import gzip
import io
import zlib
from pathlib import Path
from typing import Any, BinaryIO

import zstandard

GZIP_MAGIC = b"\x1f\x8b"
ZSTD_MAGIC = b"\x28\xb5\x2f\xfd"
#: What a corrupt or cut compressed stream raises while it is read.
CORRUPT_ERRORS = (OSError, EOFError, zlib.error, zstandard.ZstdError)


class _ZstdStream(io.RawIOBase):
    """Decompress zstd frames one after another; a stream cut inside a frame is an error
    (the library's stream reader reports a cut stream as a quiet end of file)."""

    def __init__(self, raw: BinaryIO, block_bytes: int = 1 << 20) -> None:
        self._raw = raw
        self._block_bytes = block_bytes
        self._obj = zstandard.ZstdDecompressor().decompressobj()
        self._pending = b""
        self._in_frame = False

    def readable(self) -> bool:
        return True

    def readinto(self, buffer: Any) -> int:
        while not self._pending:
            block = self._raw.read(self._block_bytes)
            if not block:
                if self._in_frame:
                    raise zstandard.ZstdError("stream ends inside a zstd frame")
                return 0
            while block:
                self._in_frame = True
                self._pending += self._obj.decompress(block)
                block = b""
                if self._obj.eof:
                    block = self._obj.unused_data
                    self._obj = zstandard.ZstdDecompressor().decompressobj()
                    self._in_frame = False
        size = min(len(buffer), len(self._pending))
        buffer[:size] = self._pending[:size]
        self._pending = self._pending[size:]
        return size


def open_log(path: Path, block_bytes: int = 1 << 20) -> tuple[BinaryIO, BinaryIO]:
    """(decompressed stream, raw file); compression is recognised by the first bytes.
    ``block_bytes``: compressed bytes a zstd read takes at a time."""
    raw = open(path, "rb")  # noqa: SIM115 - closed by the caller
    head = raw.read(4)
    raw.seek(0)
    if head.startswith(GZIP_MAGIC):
        return gzip.GzipFile(fileobj=raw, mode="rb"), raw  # type: ignore[return-value]
    if head.startswith(ZSTD_MAGIC):
        return io.BufferedReader(_ZstdStream(raw, block_bytes), 1 << 20), raw  # type: ignore[return-value]
    return raw, raw


def compression_name(path: Path) -> str:
    """'gzip', 'zstd' or '' (plain) by the file's first bytes."""
    with open(path, "rb") as raw:
        head = raw.read(4)
    return "gzip" if head.startswith(GZIP_MAGIC) else "zstd" if head.startswith(ZSTD_MAGIC) else ""


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
