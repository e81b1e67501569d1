"""Write frame logs in format v1. Reading a written log and writing it again gives the same bytes."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import BinaryIO

from tracelab.format.compression import open_log_for_writing
from tracelab.format.grammar import HEADER_LINE, NONE, form_letters, id_text


@dataclass(frozen=True)
class BusDecl:
    """One ``%bus`` directive."""

    alias: str
    nominal_bps: int
    data_bps: int | None = None
    stamp: str = "end"
    name: str | None = None

    def directive(self) -> str:
        parts = [f"%bus {self.alias}", f"nominal={self.nominal_bps}"]
        if self.data_bps is not None:
            parts.append(f"data={self.data_bps}")
        parts.append(f"stamp={self.stamp}")
        if self.name:
            parts.append(f"name={self.name}")
        return " ".join(parts)


@dataclass
class LogHeader:
    """Everything before the first record: origin, buses, metadata (in written order)."""

    buses: list[BusDecl]
    origin: str | None = None
    meta: dict[str, str] = field(default_factory=dict)

    def lines(self) -> list[str]:
        out = [HEADER_LINE]
        if self.origin is not None:
            out.append(f"%origin {self.origin}")
        out.extend(bus.directive() for bus in self.buses)
        if self.meta:
            out.append("%meta " + " ".join(f"{k}={v}" for k, v in self.meta.items()))
        return out


def frame_line(t_ns: int, bus: str, frame_id: int, ext: bool, rtr: bool, fd: bool, brs: bool,
               esi: bool, dlc: int, data: bytes) -> str:
    ident = id_text(frame_id, ext)
    payload = data.hex().upper() if data else NONE
    return f"{t_ns}\t{bus}\tframe\t{ident}\t{form_letters(ext, rtr, fd, brs, esi)}\t{dlc}\t{payload}"


def error_line(t_ns: int, bus: str, error_type: str, error_field: str, frame_id: int | None,
               ext: bool | None, form: str | None, by: str | None) -> str:
    if frame_id is None:
        ident = NONE
    else:
        ident = id_text(frame_id, bool(ext))
    return f"{t_ns}\t{bus}\terror\t{error_type}\t{error_field}\t{ident}\t{form or NONE}\t{by or NONE}"


def status_line(t_ns: int, bus: str, node: str, tec: int, rec: int) -> str:
    return f"{t_ns}\t{bus}\tstatus\t{node}\t{tec}\t{rec}"


def mark_line(t_ns: int, bus: str, text: str) -> str:
    return f"{t_ns}\t{bus}\tmark\t{text}"


def loss_line(t_ns: int, bus: str, count: int | None, until_ns: int) -> str:
    return f"{t_ns}\t{bus}\tloss\t{NONE if count is None else count}\t{until_ns}"


class LogWriter:
    """Streaming writer: ``with LogWriter(path, header) as w: w.line(frame_line(...))``.

    Compression follows the extension (``.gz``, ``.zst``). Lines are buffered and written in
    blocks so a simulator can emit millions of records cheaply.
    """

    def __init__(self, path: str | Path, header: LogHeader, buffer_lines: int = 65536) -> None:
        self.path = Path(path)
        self._out: BinaryIO = open_log_for_writing(self.path)
        self._buffer: list[str] = list(header.lines())
        self._buffer_lines = buffer_lines
        self.records = 0

    def line(self, record: str) -> None:
        self._buffer.append(record)
        self.records += 1
        if len(self._buffer) >= self._buffer_lines:
            self.flush()

    def lines(self, records: list[str]) -> None:
        self._buffer.extend(records)
        self.records += len(records)
        if len(self._buffer) >= self._buffer_lines:
            self.flush()

    def flush(self) -> None:
        if self._buffer:
            self._out.write(("\n".join(self._buffer) + "\n").encode("utf-8"))
            self._buffer = []

    def close(self) -> None:
        self.flush()
        self._out.close()

    def __enter__(self) -> LogWriter:
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.close()
