"""The block splitter: a decompressed byte stream -> blocks of whole, numbered lines.

Sequential and cheap (a read, a search for the last LF, a count of LFs); the blocks can then
be parsed in parallel. Memory stays bounded: a line longer than MAX_LINE_BYTES stops the read.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import numpy as np

from tracelab.errors import LogFormatError
from tracelab.format.compression import CORRUPT_ERRORS, compression_name

MAX_LINE_BYTES = 64 * 1024 * 1024
#: How far past a fault blame_damage() reads to find damage of a compressed stream.
DAMAGE_PROBE_BYTES = 8 * 1024 * 1024


@dataclass(frozen=True)
class Block:
    """Raw bytes of whole lines (the last one unterminated only at the end of the file)."""

    body: bytes
    first_line: int
    terminated: bool
    bytes_read: int
    newlines: int | None = None  # LF count of body when the splitter counted it already


#: Bytes count_byte() compares at a time: its temporary then stays in cache and is reused
#: (a fresh 8 MiB temporary costs 2,048 page faults, more than the comparison itself).
_COUNT_SLICE = 1 << 18


def count_byte(data: bytes, byte: int) -> int:
    """How many times ``byte`` occurs in ``data``: numpy compares without holding the GIL
    (``bytes.count`` holds it, and is 4 x slower on an 8 MiB block), so the other chunk's
    thread keeps running meanwhile."""
    view = np.frombuffer(data, dtype=np.uint8)
    return sum(int(np.count_nonzero(view[at:at + _COUNT_SLICE] == byte))
               for at in range(0, view.size, _COUNT_SLICE))  # slices of a block, not lines


def corrupt(path: Path, error: BaseException) -> LogFormatError:
    """The one-line error for a compressed stream that cannot be read to its end."""
    kind = compression_name(path) or "file"
    return LogFormatError(str(path), None, f"corrupt or truncated {kind} data ({error})")


def blame_damage(path: Path, stream: BinaryIO, error: LogFormatError) -> LogFormatError:
    """A fault met in a compressed log may come from damage further on (gzip checks its CRC
    only at the end of a member): read on, at most DAMAGE_PROBE_BYTES, and when the stream is
    damaged name that, with the fault it caused; else ``error`` itself."""
    if error.reason.startswith("corrupt or truncated") or not compression_name(path):
        return error
    read = 0
    try:
        while read < DAMAGE_PROBE_BYTES:
            piece = stream.read(1 << 20)
            if not piece:
                return error
            read += len(piece)
    except CORRUPT_ERRORS as damage:
        where = f"line {error.line}: " if error.line is not None else ""
        found = corrupt(path, damage)
        return LogFormatError(str(path), None, f"{found.reason}; it shows first as {where}"
                              f"{error.reason}")
    return error


def split_blocks(path: Path, stream: BinaryIO, raw: BinaryIO, first: bytes, last_line: int,
                 chunk_bytes: int) -> Iterator[Block]:
    """Blocks of whole lines from ``stream``, the first starting with ``first`` (bytes the
    header reader took already) on line ``last_line + 1``; ``raw`` is the file on disk (its
    position is the progress)."""
    # whole lines the header reader took (the first record), put before the next body
    lead = first if first.endswith(b"\n") else b""
    # the start of a line whose end is not read yet, in pieces (joined once, when it ends)
    partial: list[bytes] = [first] if first and not lead else []
    partial_bytes = len(first) if partial else 0
    line_no = last_line
    while True:
        try:
            block = stream.read(chunk_bytes)
        except CORRUPT_ERRORS as error:
            raise corrupt(path, error) from error
        cut = block.rfind(b"\n")
        if cut < 0:
            if block:
                partial.append(block)
                partial_bytes += len(block)
            if partial_bytes > MAX_LINE_BYTES:  # memory and time stay bounded on garbage
                raise LogFormatError(str(path), line_no + lead.count(b"\n") + 1,
                                     f"line is longer than {MAX_LINE_BYTES >> 20} MiB: "
                                     "not a frame log?")
            if not block:
                break
            continue
        # one copy at most: join takes a view of the block's whole lines
        head = block if cut == len(block) - 1 else memoryview(block)[: cut + 1]
        body = b"".join([lead, *partial, head]) if lead or partial or head is not block \
            else block
        lead = b""
        partial = [block[cut + 1:]] if cut < len(block) - 1 else []
        partial_bytes = len(partial[0]) if partial else 0
        newlines = count_byte(body, 10)
        yield Block(body, line_no + 1, True, raw.tell(), newlines)
        line_no += newlines
    if lead:
        yield Block(lead, line_no + 1, True, raw.tell(), lead.count(b"\n"))
        line_no += lead.count(b"\n")
    if partial:
        yield Block(b"".join(partial), line_no + 1, False, raw.tell())
