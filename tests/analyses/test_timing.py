"""Timing statistics against an independent numpy/scipy computation of the same definitions
(docs/analyses.md), on random synthetic arrival series."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pytest
from scipy import stats

from tests.analyses.synth import connect_tables, frames_table, losses_table
from tracelab.analyses.timing import TIMING_COLUMNS, timing
from tracelab.errors import UsageError
from tracelab.network.catalog import BusSpec, Catalog, MessageSpec, NodeSpec

RTOL = 1e-9  # the bar: to the nanosecond or 1e-9 relative


def _round_half_up(x: np.ndarray) -> np.ndarray:
    return np.floor(x + 0.5)


def reference(t: np.ndarray, period_ns: int | None, gap_factor: float = 1.5) -> dict:
    """Straightforward numpy/scipy version of every statistic of one stream."""
    dt = np.diff(t).astype(np.float64)
    out: dict = {"count": len(t), "median_ns": np.median(dt), "mean_ns": dt.mean(),
                 "min_ns": dt.min(), "max_ns": dt.max()}
    if period_ns is None:
        m0 = np.median(dt)
        band = dt[(dt >= 0.5 * m0) & (dt <= gap_factor * m0)]
        if len(dt) < 4 or len(band) < 0.8 * len(dt):
            return {"count": len(t), "period_ns": None}
        period_ns = int(_round_half_up(np.median(band)))
    p = float(period_ns)
    regular = dt <= gap_factor * p
    cj = dt[regular] - p
    cycle = np.concatenate([[0.0], np.cumsum(_round_half_up(dt / p))])
    t_rel = (t - t[0]).astype(np.float64)
    fit = stats.linregress(cycle, t_rel)
    resid = t_rel - (fit.intercept + fit.slope * cycle)
    gaps = dt[dt > gap_factor * p]
    out.update(period_ns=period_ns, cycle_std_ns=np.std(cj), cycle_p01_ns=np.percentile(cj, 1),
               cycle_p99_ns=np.percentile(cj, 99), cycle_max_abs_ns=np.abs(cj).max(),
               phase_std_ns=np.std(resid), phase_max_abs_ns=np.abs(resid).max(),
               drift_ppm=(fit.slope / p - 1) * 1e6, gaps=len(gaps),
               missing=int(np.maximum(_round_half_up(gaps / p) - 1, 1).sum()),
               bursts=int((dt < 0.5 * p).sum()))
    return out


def periodic_series(rng: np.random.Generator, period_ns: int, n: int, jitter_ns: float,
                    drift_ppm: float = 0.0, drop: int = 0, extra: int = 0) -> np.ndarray:
    """Nominal arrivals k x period x (1 + drift) plus jitter, with frames removed (gaps) and
    early duplicates added (bursts)."""
    k = np.arange(n)
    t = 1_000_000 + k * period_ns * (1 + drift_ppm * 1e-6) + rng.normal(0, jitter_ns, n)
    t = np.round(t).astype(np.int64)
    if drop:
        t = np.delete(t, rng.choice(np.arange(5, n - 5), drop, replace=False))
    if extra:
        picks = rng.choice(len(t) - 1, extra, replace=False)
        t = np.concatenate([t, t[picks] + period_ns // 5])
    return np.sort(t)


def _check(row: dict, ref: dict) -> None:
    for key, expected in ref.items():
        actual = row[key]
        if expected is None:
            assert actual is None, key
        else:
            atol = 1e-6 if key == "drift_ppm" else 1e-3  # ppm / ns
            assert actual == pytest.approx(expected, rel=RTOL, abs=atol), key


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_inferred_statistics_match_numpy_reference(seed: int) -> None:
    # source: numpy.percentile (linear), numpy.std (ddof=0), scipy.stats.linregress
    rng = np.random.default_rng(seed)
    series = {
        0x100: periodic_series(rng, 10_000_000, 3000, 20_000, drift_ppm=40, drop=12, extra=3),
        0x101: periodic_series(rng, 1_000_000, 5000, 3_000, drift_ppm=-80, drop=30),
        0x102: periodic_series(rng, 100_000_000, 200, 1_000_000),
        0x1AB: np.sort(rng.integers(0, 30_000_000_000, 400)),  # event-driven: uniform times
    }
    con = connect_tables([frames_table(t, i) for i, t in series.items()])
    result = timing(con)
    assert result.timing.columns == list(TIMING_COLUMNS)
    rows = {r["id"]: r for r in result.timing.iter_rows(named=True)}
    for frame_id, t in series.items():
        _check(rows[frame_id], reference(t, None))
    assert rows[0x100]["period_source"] == "inferred"
    assert rows[0x1AB]["period_ns"] is None and rows[0x1AB]["cycle_std_ns"] is None


def _catalog(periods: dict[int, int | None], sender: dict[int, str]) -> Catalog:
    messages = tuple(MessageSpec("P", i, False, False, False, False, 8, sender[i], p, f"m{i:X}", "s")
                     for i, p in periods.items())
    nodes = {n: NodeSpec(n, ("P",)) for n in set(sender.values())}
    return Catalog(Path("cat.toml"), {"P": BusSpec("P", 500_000)}, nodes, messages)


def test_catalog_periods_drift_and_node_median() -> None:
    # source: scipy.stats.linregress slope against the nominal period
    rng = np.random.default_rng(7)
    periods = {0x10: 10_000_000, 0x11: 20_000_000, 0x12: 50_000_000, 0x20: 10_000_000,
               0x30: None}
    sender = {0x10: "ecu_a", 0x11: "ecu_a", 0x12: "ecu_a", 0x20: "ecu_b", 0x30: "ecu_b"}
    drift = {0x10: 35.0, 0x11: 35.0, 0x12: 35.0, 0x20: -5.0}
    series = {i: periodic_series(rng, periods[i] or 0, 2000, 5_000, drift_ppm=drift[i], drop=4)
              for i in drift}
    series[0x30] = np.sort(rng.integers(0, 10**10, 50))
    series[0x7FF] = periodic_series(rng, 5_000_000, 500, 1_000)  # not in the catalog
    con = connect_tables([frames_table(t, i) for i, t in series.items()])
    cat = _catalog({**periods, 0x40: 100_000_000}, {**sender, 0x40: "ecu_b"})
    result = timing(con, cat)
    rows = {r["id"]: r for r in result.timing.iter_rows(named=True)}
    for i in drift:
        _check(rows[i], reference(series[i], periods[i]))
        assert rows[i]["period_source"] == "catalog" and rows[i]["sender"] == sender[i]
        # the 4 dropped frames of each series are the gaps' missing frames (by construction)
        assert rows[i]["missing"] == 4
    assert rows[0x30]["period_ns"] is None and rows[0x30]["count"] == 50
    assert rows[0x7FF]["period_source"] == "inferred"
    nodes = {r["node"]: r for r in result.node_drift.iter_rows(named=True)}
    expected_a = np.median([reference(series[i], periods[i])["drift_ppm"] for i in (0x10, 0x11, 0x12)])
    assert nodes["ecu_a"]["drift_ppm"] == pytest.approx(expected_a, abs=1e-6)
    assert nodes["ecu_a"]["messages"] == 3
    assert abs(nodes["ecu_a"]["drift_ppm"] - 35.0) < 2.0
    assert result.unseen["id"].to_list() == [0x40]
    assert result.unknown["id"].to_list() == [0x7FF]
    # the readable summary has the per-sender drift table when the catalog names senders,
    # and not without a catalog (no sender, no per-node drift)
    text = result.describe()
    assert "clock drift per sender" in text
    drift_part = text.split("clock drift per sender", 1)[1].split("not in the catalog")[0]
    assert "ecu_a" in drift_part and "ecu_b" in drift_part
    assert "clock drift per sender" not in timing(con).describe()


def test_gaps_rows_and_logger_loss() -> None:
    period = 10_000_000
    t = np.arange(100) * period + 5_000_000
    dropped_bus = [20, 21, 22]        # a silent sender: 3 missing, no loss record
    dropped_logger = [60, 61]         # the logger lost these: covered by a loss interval
    keep = np.setdiff1d(np.arange(100), dropped_bus + dropped_logger)
    t = t[keep]
    loss = losses_table([(605_000_000, 618_000_000)])
    con = connect_tables(frames_table(t, 0x55), losses=loss)
    result = timing(con)
    row = result.timing.row(0, named=True)
    assert (row["missing"], row["missing_in_loss"], row["gaps"]) == (3, 2, 2)
    gaps = result.gaps
    assert gaps.columns == ["run", "bus", "id", "ext", "from_ns", "to_ns", "missing", "in_loss"]
    assert gaps["in_loss"].to_list() == [False, True]
    assert gaps["from_ns"].to_list() == [19 * period + 5_000_000, 59 * period + 5_000_000]
    assert gaps["missing"].to_list() == [3, 2]


def test_run_filter_and_gap_factor() -> None:
    t = np.arange(50) * 1_000_000
    con = connect_tables([frames_table(t, 1, run="a"), frames_table(t, 1, run="b")])
    assert timing(con, run="b").timing["run"].to_list() == ["b"]
    with pytest.raises(UsageError):
        timing(con, gap_factor=1.0)
    # a 1.8-period inter-arrival is a gap at factor 1.5 and not at factor 2
    t2 = np.concatenate([t, [int(t[-1] + 1_800_000)]])
    con2 = connect_tables(frames_table(t2, 2))
    assert timing(con2).timing["gaps"].item() == 1
    assert timing(con2, gap_factor=2.0).timing["gaps"].item() == 0


def test_empty_dataset() -> None:
    con = connect_tables(frames_table(np.array([], dtype=np.int64), 1))
    result = timing(con)
    assert result.timing.height == 0 and result.gaps.height == 0
    assert isinstance(result.timing, pl.DataFrame)


def test_cycle_index_blocks_do_not_change_results(monkeypatch: pytest.MonkeyPatch) -> None:
    # tiny blocks put gaps and bursts in many blocks and at block edges
    rng = np.random.default_rng(11)
    t = periodic_series(rng, 10_000_000, 2000, 30_000, drift_ppm=20, drop=40, extra=15)
    con = connect_tables(frames_table(t, 0x42))
    import tracelab.analyses.timing as module

    for block in (1, 2, 7, 64, 4096):
        monkeypatch.setattr(module, "CYCLE_BLOCK", block)
        _check(timing(con).timing.row(0, named=True), reference(t, None))


def test_duplicate_timestamps_are_not_a_period() -> None:
    t = np.repeat(np.arange(10) * 1_000_000, 3)  # every frame logged three times
    con = connect_tables(frames_table(np.full(20, 5_000), 0x9))  # all at the same time
    row = timing(con).timing.row(0, named=True)
    assert row["count"] == 20 and row["period_ns"] is None
    row = timing(connect_tables(frames_table(t, 0xA))).timing.row(0, named=True)
    assert row["period_ns"] is None  # two thirds of the inter-arrivals are 0: not stable
