"""What the reader yields: the typed record tables of one block of lines (``Chunk``), built
the same way by the fast and the exact path from split fields ``field_0`` .. ``field_8``."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import polars as pl

from tracelab.format.grammar import NONE, RECORD_FIELDS
from tracelab.format.writer import LogHeader

#: Fields of the longest record, plus one to notice an extra field.
MAX_FIELDS = 3 + max(len(v) for v in RECORD_FIELDS.values())
FIELDS = tuple(f"field_{i}" for i in range(MAX_FIELDS + 1))
FRAME_COLUMNS = ("bus", "t_ns", "id", "ext", "rtr", "fd", "brs", "esi", "dlc", "data", "line")


@dataclass
class Chunk:
    """The records of one byte chunk, typed, plus the rejects and the bookkeeping."""

    frames: pl.DataFrame  # FRAME_COLUMNS
    errors: pl.DataFrame  # bus t_ns type field id ext form by line
    status: pl.DataFrame  # bus t_ns node tec rec line
    marks: pl.DataFrame  # bus t_ns text line
    losses: pl.DataFrame  # bus t_ns count until_ns line
    rejects: pl.DataFrame  # line raw reason
    lines: int  # lines in this chunk
    other_lines: int  # comment and blank lines
    backward_steps: int = 0
    first_backward_line: int | None = None
    first_t_ns: int | None = None
    last_t_ns: int | None = None
    bytes_read: int = 0  # bytes of the file on disk consumed so far (for progress bars)
    bus_first: dict[str, tuple[int, int]] = field(default_factory=dict)  # bus: (t_ns, line)
    bus_last: dict[str, int] = field(default_factory=dict)  # bus: last t_ns
    #: each frame's bus as its index in the header's %bus order (u32; the fast path's, when
    #: its frames are in this order), so writers need not look the names up again
    frame_bus_codes: pl.Series | None = None

    @property
    def records(self) -> int:
        return (self.frames.height + self.errors.height + self.status.height
                + self.marks.height + self.losses.height)


def empty_rejects() -> pl.DataFrame:
    return pl.DataFrame(schema={"line": pl.Int64, "raw": pl.String, "reason": pl.String})


def frames_table(good: pl.DataFrame) -> pl.DataFrame:
    rows = good.filter(pl.col("field_2") == "frame")
    form, data = pl.col("field_4"), pl.col("field_6")
    return rows.select(
        "bus", "t_ns",
        id=pl.col("field_3").str.to_integer(base=16).cast(pl.UInt32),
        ext=form.str.starts_with("x"),
        rtr=form.str.contains("r", literal=True),
        fd=form.str.contains("f", literal=True),
        brs=form.str.contains("b", literal=True),
        esi=form.str.contains("e", literal=True),
        dlc=pl.col("field_5").str.to_integer().cast(pl.UInt8),
        data=pl.when(data == NONE).then(pl.lit(b"")).otherwise(data.str.decode("hex")),
        line="line",
    )


def errors_table(good: pl.DataFrame) -> pl.DataFrame:
    rows = good.filter(pl.col("field_2") == "error")
    ident, form, by = pl.col("field_5"), pl.col("field_6"), pl.col("field_7")
    return rows.select(
        "bus", "t_ns", type="field_3", field="field_4",
        id=pl.when(ident != NONE).then(
            ident.str.to_integer(base=16, strict=False)).cast(pl.UInt32),
        ext=pl.when(form != NONE).then(form.str.starts_with("x")),
        form=pl.when(form != NONE).then(form),
        by=pl.when(by != NONE).then(by),
        line="line",
    )


def status_table(good: pl.DataFrame) -> pl.DataFrame:
    rows = good.filter(pl.col("field_2") == "status")
    return rows.select(
        "bus", "t_ns", node="field_3",
        tec=pl.col("field_4").str.to_integer().cast(pl.Int32),
        rec=pl.col("field_5").str.to_integer().cast(pl.Int32), line="line")


def marks_table(good: pl.DataFrame) -> pl.DataFrame:
    rows = good.filter(pl.col("field_2") == "mark")
    return rows.select("bus", "t_ns", text="field_3", line="line")


def losses_table(good: pl.DataFrame) -> pl.DataFrame:
    rows = good.filter(pl.col("field_2") == "loss")
    count = pl.col("field_3")
    return rows.select(
        "bus", "t_ns",
        count=pl.when(count != NONE).then(count.str.to_integer(strict=False)),
        until_ns=pl.col("field_4").str.to_integer(), line="line")


def count_time_steps(good: pl.DataFrame, chunk: Chunk, header: LogHeader) -> None:
    """Backward time steps per bus within the chunk, and each bus's first and last time
    for LogReader.link() ('*' marks are not counted). ``good``: bus, t_ns, line in line
    order."""
    if good.height == 0:
        return
    chunk.first_t_ns = good["t_ns"].min()  # type: ignore[assignment]
    chunk.last_t_ns = good["t_ns"].max()  # type: ignore[assignment]
    t_ns, lines = good["t_ns"].to_numpy(), good["line"].to_numpy()
    firsts: list[int] = []
    for decl in header.buses:  # a loop over the few buses, numpy within each
        mask = (good["bus"] == decl.alias).to_numpy()
        t_bus = t_ns[mask]
        if t_bus.size == 0:
            continue
        lines_bus = lines[mask]
        back = np.flatnonzero(t_bus[1:] < t_bus[:-1]) + 1
        chunk.backward_steps += back.size
        if back.size:
            firsts.append(int(lines_bus[back[0]]))
        chunk.bus_first[decl.alias] = (int(t_bus[0]), int(lines_bus[0]))
        chunk.bus_last[decl.alias] = int(t_bus[-1])
    chunk.first_backward_line = min(firsts) if firsts else None
