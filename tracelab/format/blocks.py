"""The block splitter: a decompressed byte stream -> blocks of whole, numbered lines.

Sequential and cheap (a read, a search for the last LF, a count of LFs); the blocks can then
be parsed in parallel. Memory stays bounded: a line longer than MAX_LINE_BYTES stops the read.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from tracelab.errors import LogFormatError
from tracelab.format.compression import CORRUPT_ERRORS, compression_name

MAX_LINE_BYTES = 64 * 1024 * 1024


@dataclass(frozen=True)
class Block:
    """Raw bytes of whole lines (the last one unterminated only at the end of the file)."""

    body: bytes
    first_line: int
    terminated: bool
    bytes_read: int
    newlines: int | None = None  # LF count of body when the splitter counted it already


def corrupt(path: Path, error: BaseException) -> LogFormatError:
    """The one-line error for a compressed stream that cannot be read to its end."""
    kind = compression_name(path) or "file"
    return LogFormatError(str(path), None, f"corrupt or truncated {kind} data ({error})")


def split_blocks(path: Path, stream: BinaryIO, raw: BinaryIO, first: bytes, last_line: int,
                 chunk_bytes: int) -> Iterator[Block]:
    """Blocks of whole lines from ``stream``, the first starting with ``first`` (bytes the
    header reader took already) on line ``last_line + 1``; ``raw`` is the file on disk (its
    position is the progress)."""
    carry = first
    line_no = last_line
    while True:
        try:
            block = stream.read(chunk_bytes)
        except CORRUPT_ERRORS as error:
            raise corrupt(path, error) from error
        data = carry + block if carry else block
        cut = data.rfind(b"\n")
        if cut < 0:
            carry = data
            if len(carry) > MAX_LINE_BYTES:  # memory stays bounded on garbage input
                raise LogFormatError(str(path), line_no + 1, "line is longer than "
                                     f"{MAX_LINE_BYTES >> 20} MiB: not a frame log?")
        else:
            body, carry = data[: cut + 1], data[cut + 1:]
            newlines = body.count(b"\n")
            yield Block(body, line_no + 1, True, raw.tell(), newlines)
            line_no += newlines
        if not block:
            break
    if carry:
        yield Block(carry, line_no + 1, False, raw.tell())
