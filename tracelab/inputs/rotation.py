"""The parts of one capture run: file names, headers, rotation by interval or size.

Every part is a complete log: its own header (the run's ``%origin``, buses and ``%meta`` with
the same ``run=`` and its ``part=`` number), whole lines only, compressed as it is written
(``.gz`` / ``.zst`` by the name) and flushed at least every second, so a reader or a power
cut finds complete lines up to the last flush. ``tracelab batch`` groups files by ``%meta
run`` and ``%origin`` (fleet/discover.py), so the parts of one run form one run.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO

from tracelab.errors import UsageError
from tracelab.format.compression import open_log_for_writing
from tracelab.format.writer import BusDecl, LogHeader

LOG_SUFFIXES = (".frames.zst", ".frames.gz", ".frames")


@dataclass(frozen=True)
class Rotation:
    """Start a new part after ``interval_ns`` of wall time or once a part has ``size_bytes``
    on disk (checked at each flush); both None: one part."""

    interval_ns: int | None = None
    size_bytes: int | None = None

    @property
    def active(self) -> bool:
        return self.interval_ns is not None or self.size_bytes is not None


def split_log_name(path: Path) -> tuple[str, str]:
    """``night.frames.zst`` -> (``night``, ``.frames.zst``); UsageError for other names."""
    for suffix in LOG_SUFFIXES:
        if path.name.endswith(suffix) and len(path.name) > len(suffix):
            return path.name[: -len(suffix)], suffix
    raise UsageError(f"{path}: name the log NAME.frames, NAME.frames.gz or NAME.frames.zst "
                     "(ingest and batch find logs by these endings)")


def part_path(output: Path, part: int, rotating: bool) -> Path:
    """The file of part ``part`` (1-based): ``OUT`` itself without rotation, else
    ``NAME-p0001.frames.zst`` beside it."""
    if not rotating:
        return output
    stem, suffix = split_log_name(output)
    return output.with_name(f"{stem}-p{part:04d}{suffix}")


@dataclass
class PartLog:
    """Writes the parts of one run; ``write()`` takes whole record lines."""

    output: Path
    buses: list[BusDecl]
    meta: dict[str, str]
    rotation: Rotation = field(default_factory=Rotation)
    flush_every_s: float = 1.0
    part: int = 0
    paths: list[Path] = field(default_factory=list)
    origin: str | None = None
    _out: BinaryIO | None = None
    _opened_mono: float = 0.0
    _flushed_mono: float = 0.0
    _pending: list[str] = field(default_factory=list)
    records_in_part: int = 0

    @property
    def current(self) -> Path | None:
        return self.paths[-1] if self.paths else None

    def open(self, origin: str) -> None:
        """Start the next part (the first one fixes the run's origin)."""
        self.origin = self.origin or origin
        self.part += 1
        path = part_path(self.output, self.part, self.rotation.active)
        meta = {**self.meta, "part": str(self.part)}
        header = LogHeader(buses=self.buses, origin=self.origin, meta=meta)
        self._out = open_log_for_writing(path)
        self._out.write(("\n".join(header.lines()) + "\n").encode("utf-8"))
        self._out.flush()
        self.paths.append(path)
        self._opened_mono = self._flushed_mono = time.monotonic()
        self.records_in_part = 0

    def write(self, lines: list[str]) -> None:
        self._pending.extend(lines)
        self.records_in_part += len(lines)

    def tick(self, now_mono: float | None = None) -> None:
        """Flush when due, then rotate when the part is old or big enough."""
        now = time.monotonic() if now_mono is None else now_mono
        if self._out is None:
            return
        if now - self._flushed_mono >= self.flush_every_s or len(self._pending) >= 8192:
            self.flush(now)
        old = (self.rotation.interval_ns is not None
               and (now - self._opened_mono) * 1e9 >= self.rotation.interval_ns)
        big = (self.rotation.size_bytes is not None and self.current is not None
               and self.current.stat().st_size >= self.rotation.size_bytes)
        if old or big:
            self.rotate()

    def flush(self, now_mono: float | None = None) -> None:
        """Whole lines to the file and through the compressor (gzip Z_SYNC_FLUSH, zstd
        FLUSH_BLOCK: the defaults of their flush())."""
        if self._out is None:
            return
        if self._pending:
            self._out.write(("\n".join(self._pending) + "\n").encode("utf-8"))
            self._pending = []
        self._out.flush()
        self._flushed_mono = time.monotonic() if now_mono is None else now_mono

    def rotate(self) -> None:
        if self._out is None or self.origin is None:
            return
        self.close()
        self.open(self.origin)

    def close(self) -> None:
        if self._out is not None:
            self.flush()
            self._out.close()
            self._out = None
