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


#: Compressed bytes per zstd decompress call. A zstd block holds at most 128 KiB and an RLE
#: block takes 4 bytes (source: RFC 8878, 3.1.1.2: Block_Maximum_Size, RLE_Block), so one
#: step inflates to at most ~32 MiB whatever the input: a small file that inflates to GiBs
#: costs memory for one step, and time only for what the reader asks for.
ZSTD_STEP_BYTES = 1 << 10


class _ZstdStream(io.RawIOBase):
    """Decompress zstd frames one after another, a bounded step at a time; a stream cut
    inside a frame is an error (the library's stream reader reports a cut stream as a quiet
    end of file)."""

    def __init__(self, raw: BinaryIO, block_bytes: int = 1 << 20) -> None:
        self._raw = raw
        self._block_bytes = block_bytes
        self._obj = zstandard.ZstdDecompressor().decompressobj()
        self._input = memoryview(b"")
        self._pending = b""
        self._pos = 0  # of the next byte of _pending to hand out
        self._in_frame = False

    def readable(self) -> bool:
        return True

    def _step(self) -> bool:
        """Decompress one step of input into _pending; False at the end of the stream."""
        if not self._input:
            self._input = memoryview(self._raw.read(self._block_bytes))
            if not self._input:
                if self._in_frame:
                    raise zstandard.ZstdError("stream ends inside a zstd frame")
                return False
        piece, self._input = self._input[:ZSTD_STEP_BYTES], self._input[ZSTD_STEP_BYTES:]
        self._in_frame = True
        out = [self._obj.decompress(piece)]
        while self._obj.eof:  # a frame ended inside the piece: the rest starts the next
            rest = self._obj.unused_data
            self._obj = zstandard.ZstdDecompressor().decompressobj()
            self._in_frame = bool(rest)
            if not rest:
                break
            out.append(self._obj.decompress(rest))
        self._pending, self._pos = b"".join(out), 0
        return True

    def readinto(self, buffer: Any) -> int:
        view = memoryview(buffer).cast("B")
        filled = 0
        while filled < len(view):
            if self._pos < len(self._pending):
                size = min(len(view) - filled, len(self._pending) - self._pos)
                view[filled: filled + size] = self._pending[self._pos: self._pos + size]
                self._pos += size
                filled += size
            elif not self._step():
                break
        return filled


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
