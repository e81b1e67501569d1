"""Regression flags and the p99 phase jitter they compare, against independent references."""

from __future__ import annotations

import datetime as dt
import statistics

import duckdb
import numpy as np
import polars as pl

from tracelab.fleet import regressions
from tracelab.fleet.regressions import regression_flags, with_flags
from tracelab.fleet.summary import MESSAGE_STATS, phase_jitter_p99, runs_frame


def _fleet(missing: list[int], jitter_ns: list[float]) -> duckdb.DuckDBPyConnection:
    rows, stats = [], []
    for n, (miss, jit) in enumerate(zip(missing, jitter_ns, strict=True)):
        key = f"{n:064x}"
        rows.append({"run": f"r{n}", "vehicle": "ash", "date": f"2026-10-{n + 1:02d}",
                     "key": key, "status": "ok", "files": 1, "retry": False})
        stats.append({"run": f"r{n}", "key": key, "bus": "P", "id": 0x0C0, "ext": False,
                      "name": "drive_command", "period_ns": 10_000_000, "frames": 100,
                      "missing": miss, "jitter_p99_ns": jit, "drift_ppm": 5.0})
    # a second vehicle with a big value must not leak into the first one's baseline
    rows.append({"run": "other", "vehicle": "beech", "date": "2026-10-01", "key": "f" * 64,
                 "status": "ok", "files": 1, "retry": False})
    stats.append({**stats[0], "run": "other", "key": "f" * 64, "missing": 999})
    con = duckdb.connect()
    con.register("runs", runs_frame(rows).to_arrow())
    con.register("message_stats", pl.DataFrame(stats, schema=MESSAGE_STATS).to_arrow())
    return con


def test_baseline_is_median_of_previous_runs() -> None:
    missing = [2, 0, 3, 1, 3, 30, 2]
    jitter = [10_000.0, 12_000.0, 9_000.0, 11_000.0, 10_000.0, 10_500.0, 400_000.0]
    flags = regression_flags(_fleet(missing, jitter), previous=3)
    got = {(r["run"], r["metric"]): r for r in flags.iter_rows(named=True)}
    assert set(got) == {("r5", "missing"), ("r6", "jitter_p99_ns")}
    # source: Python's statistics.median over the previous 3 runs (independent of DuckDB)
    assert got[("r5", "missing")]["baseline"] == statistics.median(missing[2:5])
    assert got[("r6", "jitter_p99_ns")]["baseline"] == statistics.median(jitter[3:6])
    assert got[("r5", "missing")]["history"] == 3


def test_small_or_early_increases_are_not_flagged() -> None:
    # 0 -> 2 missing doubles but stays under the 3-frame floor; run 1 has one previous run only
    flags = regression_flags(_fleet([0, 50, 0, 0, 2], [1e4] * 5), previous=5)
    assert flags.is_empty()
    assert regressions.MISSING_MIN_INCREASE > 2


def test_flags_fill_the_runs_columns() -> None:
    con = _fleet([1, 1, 1, 40], [1e4] * 4)
    runs = con.sql("SELECT * FROM runs").pl()
    flagged = with_flags(runs, regression_flags(con, previous=5))
    row = flagged.filter(pl.col("run") == "r3").row(0, named=True)
    assert row["regressions"] == 1 and row["flagged"] == "P:drive_command missing"
    assert flagged.filter(pl.col("run") != "r3")["regressions"].to_list() == [0, 0, 0, 0]


def test_phase_jitter_p99_matches_numpy() -> None:
    rng = np.random.default_rng(3)
    period_ns = 10_000_000
    n = 400
    cycles = np.arange(n)
    cycles = np.delete(cycles, [50, 51, 200])  # two gaps: the cycle index must skip them
    t_ns = (cycles * period_ns * (1 + 40e-6)).astype(np.int64) + 1_000_000
    t_ns += rng.integers(-80_000, 80_000, size=t_ns.size)
    frames = pl.DataFrame({"run": "r", "bus": "P", "id": np.uint32(0x0C0), "ext": False,
                           "t_ns": t_ns})
    con = duckdb.connect()
    con.register("frames", frames.to_arrow())
    con.register("timing", pl.DataFrame({"run": ["r"], "bus": ["P"], "id": [0x0C0],
                                         "ext": [False], "period_ns": [period_ns]},
                                        schema_overrides={"id": pl.UInt32}).to_arrow())
    got = phase_jitter_p99(con)["jitter_p99_ns"][0]
    # source: numpy.polyfit least-squares line through (cycle, arrival) and numpy.percentile
    # (linear interpolation, the same definition as DuckDB's quantile_cont)
    rel = (t_ns - t_ns[0]).astype(float)
    cycle = np.concatenate([[0], np.cumsum(np.round(np.diff(t_ns) / period_ns))])
    slope, icpt = np.polyfit(cycle, rel, 1)
    expected = np.percentile(np.abs(rel - (icpt + slope * cycle)), 99)
    assert abs(got - expected) < 1.0


def test_flag_dates_are_dates() -> None:
    flags = regression_flags(_fleet([0, 0, 0, 20], [1e4] * 4), previous=5)
    assert flags["date"][0] == dt.date(2026, 10, 4)
