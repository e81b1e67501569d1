"""The ``frames`` view's SQL: stored columns, and start_ns / end_ns / duration_ns derived.

Parts of layout 2 store ``t_ns``, ``bits`` and ``data_bits`` (bits at the data bit rate, 0
without BRS); the view derives, with each file's ``%bus`` settings (manifest ``buses``):

    duration_ns = floor((bits - data_bits) * 1e9 / nominal_bps + data_bits * 1e9 / data_bps + 0.5)
    start_ns    = t_ns - (duration_ns - ifs_ns)    stamp=end (t_ns is the end of EOF)
                = t_ns                             stamp=start
    end_ns      = start_ns + duration_ns

with ``ifs_ns`` the 3-bit intermission at the nominal rate: the float64 steps of
``physics.frame_durations_ns``, so the values are those layout 1 stored (tests hold them
equal). When both bit times are whole nanoseconds (500 kbit/s: 2000 ns) the same values come
from integer arithmetic (each quotient is then exact in float64 too), which DuckDB does faster.

Layout 1 parts (tracelab 0.1) store every column and are read as they are. Part files whose
expressions are the same (same layout, same bus settings) share one ``read_parquet``; the
branches are joined with UNION ALL, each selecting the view's columns in schema order.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from tracelab.physics.bitlength import frame_durations_ns
from tracelab.store import schema

NS_PER_S = 1_000_000_000


@dataclass(frozen=True)
class BusTiming:
    """What the view needs of one ``%bus``: rates and where t_ns is stamped."""

    alias: str
    nominal_bps: int
    data_bps: int | None
    stamp_end: bool

    @property
    def ifs_ns(self) -> int:
        """The 3-bit intermission (nominal rate), as ingest of layout 1 computed it."""
        return int(frame_durations_ns(np.array([3]), np.array([0]), self.nominal_bps,
                                      self.data_bps)[0])


def bus_timings(buses: Iterable[dict[str, Any]]) -> tuple[BusTiming, ...]:
    """The manifest's ``buses`` objects as BusTiming, sorted by alias (a grouping key)."""
    return tuple(sorted(
        (BusTiming(str(b["alias"]), int(b["nominal_bps"]),
                   int(b["data_bps"]) if b.get("data_bps") else None, b.get("stamp") != "start")
         for b in buses), key=lambda b: b.alias))



def _per_bus(buses: Sequence[BusTiming], values: Sequence[str | None]) -> str:
    """One SQL value per bus: the value itself when all buses agree (None: any value does),
    else a CASE on ``bus``."""
    known = {v for v in values if v is not None}
    if len(known) <= 1:
        return known.pop() if known else "0"
    pairs = [(b.alias, v) for b, v in zip(buses, values, strict=True) if v is not None]
    # the last value stands for itself and for the buses where any value does
    cases = " ".join(f"WHEN {schema.sql_string(alias)} THEN {v}" for alias, v in pairs[:-1])
    return f"(CASE bus {cases} ELSE {pairs[-1][1]} END)"


def _duration_sql(buses: Sequence[BusTiming]) -> str:
    whole = all(NS_PER_S % b.nominal_bps == 0 and NS_PER_S % (b.data_bps or b.nominal_bps) == 0
                for b in buses)
    slow = "(CAST(bits AS BIGINT) - data_bits)"
    # a bus without data= has no BRS frame (the reader refuses one): data_bits is 0 there,
    # so its data rate does not matter (None) and one branch serves it and the others
    if whole:
        nominal = _per_bus(buses, [str(NS_PER_S // b.nominal_bps) for b in buses])
        data = _per_bus(buses, [str(NS_PER_S // b.data_bps) if b.data_bps else None
                                for b in buses])
        return f"({slow} * {nominal} + CAST(data_bits AS BIGINT) * {data})"
    nominal = _per_bus(buses, [str(b.nominal_bps) for b in buses])
    data = _per_bus(buses, [str(b.data_bps) if b.data_bps else None for b in buses])
    if data == "0":
        data = nominal
    return (f"CAST(floor({slow} * 1e9::DOUBLE / {nominal} + CAST(data_bits AS BIGINT) "
            f"* 1e9::DOUBLE / {data} + 0.5) AS BIGINT)")


def _start_sql(buses: Sequence[BusTiming]) -> str:
    """t_ns minus what comes before the stamp: duration - ifs for stamp=end, 0 for start."""
    back = _per_bus(buses, [f"(duration_ns - {b.ifs_ns})" if b.stamp_end else "0"
                            for b in buses])
    return "t_ns" if back == "0" else f"t_ns - {back}"


def branch_sql(layout: int, buses: Sequence[BusTiming], listing: str) -> str:
    """One SELECT of the view's columns over ``listing`` (a DuckDB list of file names)."""
    columns = ", ".join(schema.FRAMES)
    scan = f"read_parquet([{listing}])"
    if layout == 1:
        return f"SELECT {columns} FROM {scan}"
    if not buses:  # a file without %bus has no frames: its (empty) parts need no rates
        buses = (BusTiming("", NS_PER_S, None, False),)
    inner = f"SELECT *, {_duration_sql(buses)} AS duration_ns FROM {scan}"
    middle = f"SELECT *, {_start_sql(buses)} AS start_ns FROM ({inner})"
    return (f"SELECT {columns.replace('end_ns', 'start_ns + duration_ns AS end_ns')} "
            f"FROM ({middle})")


def frames_view_sql(branches: Sequence[tuple[int, tuple[BusTiming, ...], str]]) -> str:
    """The view over every group of part files: (layout, buses, listing) each."""
    return "\nUNION ALL\n".join(branch_sql(*branch) for branch in branches)
