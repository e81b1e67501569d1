"""Report aggregates: bucket envelopes checked against numpy on the same data."""

from __future__ import annotations

from pathlib import Path

import duckdb
import numpy as np
import polars as pl
import pytest

from tests.report.synthetic import RUN, build_dataset
from tracelab.analyses import envelopes
from tracelab.store.dataset import open_dataset

WINDOW_NS = 100_000_000


def _con(**tables: pl.DataFrame) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    for name, frame in tables.items():
        con.register(f"_{name}", frame.to_arrow())
        con.execute(f"CREATE VIEW {name} AS SELECT * FROM _{name}")
    return con


def _load_frame(n_windows: int, seed: int = 3) -> tuple[pl.DataFrame, np.ndarray]:
    rng = np.random.default_rng(seed)
    busy = rng.integers(0, WINDOW_NS // 2, n_windows)
    frame = pl.DataFrame({"run": "r", "bus": "body", "window_ns": WINDOW_NS,
                          "t_ns": np.arange(n_windows, dtype=np.int64) * WINDOW_NS,
                          "busy_ns": busy, "load_ratio": busy / WINDOW_NS})
    return frame, busy


def test_load_envelope_matches_numpy_min_max_mean_per_bucket() -> None:
    frame, busy = _load_frame(1000)
    con = _con(load=frame)
    env, stats = envelopes.load_envelopes(con, "r", 1000 * WINDOW_NS, points=40)
    # reference: numpy on the same windows; 1 s windows are sums of ten 100 ms windows
    for window_ns in (100_000_000, 1_000_000_000, 10_000_000_000):
        per = window_ns // WINDOW_NS
        ratio = busy.reshape(-1, per).sum(axis=1) / window_ns
        got = env.filter(pl.col("window_ns") == window_ns).sort("t_ns")
        bucket_ns = int(got["t_ns"][1] - got["t_ns"][0])
        assert str(bucket_ns // window_ns)[0] in "125"  # readable: 1, 2 or 5 x 10^k windows
        per_bucket = bucket_ns // window_ns
        buckets = ratio[: len(ratio) // per_bucket * per_bucket].reshape(-1, per_bucket)
        n = len(buckets)
        assert len(got) <= 40
        np.testing.assert_allclose(got["load_max"].to_numpy()[:n], buckets.max(axis=1))
        np.testing.assert_allclose(got["load_min"].to_numpy()[:n], buckets.min(axis=1))
        np.testing.assert_allclose(got["load_mean"].to_numpy()[:n], buckets.mean(axis=1))
        row = stats.filter(pl.col("window_ns") == window_ns)
        assert row["peak_ratio"][0] == pytest.approx(ratio.max())
        assert row["mean_ratio"][0] == pytest.approx(ratio.mean())
        assert row["peak_t_ns"][0] == int(np.argmax(ratio)) * window_ns


def test_load_windows_fit_the_run() -> None:
    frame, _ = _load_frame(300)  # a 30 s run
    con = _con(load=frame)
    assert envelopes.load_windows(con, "r", 300 * WINDOW_NS) == [100_000_000, 1_000_000_000]
    odd = _con(load=frame.with_columns(window_ns=pl.lit(300_000_000)))
    assert envelopes.load_windows(odd, "r", 3600 * 300_000_000) == [300_000_000, 60_000_000_000]


def test_a_day_of_windows_stays_a_few_thousand_points() -> None:
    frame, _ = _load_frame(864_000)  # 24 h of 100 ms windows
    con = _con(load=frame)
    env, _ = envelopes.load_envelopes(con, "r", 864_000 * WINDOW_NS, points=2000)
    counts = env.group_by("window_ns").len()["len"].to_list()
    assert max(counts) <= 2000 and len(counts) == 4  # 100 ms, 1 s, 10 s, 1 min


def test_error_and_counter_buckets_match_numpy() -> None:
    rng = np.random.default_rng(5)
    t = np.sort(rng.integers(0, 10_000_000_000, 500))
    errors = pl.DataFrame({"run": "r", "bus": "body", "t_ns": t, "type": "bit"})
    tec = rng.integers(0, 300, 500)
    status = pl.DataFrame({"run": "r", "bus": "body", "node": "bcm", "t_ns": t, "tec": tec,
                           "rec": tec // 2})
    con = _con(errors=errors, status=status)
    bucket = 1_000_000_000
    got = envelopes._frame(con, envelopes.envelope_sql("errors"), {"run": "r", "bucket_ns": bucket})
    # reference: numpy.histogram over the same bucket edges
    hist, _ = np.histogram(t, bins=np.arange(0, 11) * bucket)
    assert got.sort("t_ns")["errors"].to_list() == [h for h in hist.tolist() if h]
    counters = envelopes.counter_envelopes(con, "r", bucket, views={"status"})
    idx = t // bucket
    tec_points = counters.filter(pl.col("counter") == "tec").with_columns(
        b=pl.col("t_ns") // bucket).group_by("b").agg(pl.col("value").max()).sort("b")
    rec_points = counters.filter(pl.col("counter") == "rec").with_columns(
        b=pl.col("t_ns") // bucket).group_by("b").agg(pl.col("value").min()).sort("b")
    assert tec_points["value"].to_list() == [tec[idx == k].max() for k in np.unique(idx)]
    assert rec_points["value"].to_list() == [(tec // 2)[idx == k].min() for k in np.unique(idx)]


def test_gap_cells_cover_each_bucket_a_gap_spans_and_flag_logger_loss() -> None:
    gaps = pl.DataFrame({"run": "r", "bus": ["body", "chassis"], "id": [0x120, 0x300],
                         "ext": False, "from_ns": [2_500_000_000, 7_100_000_000],
                         "to_ns": [4_200_000_000, 7_300_000_000], "missing": [84, 9],
                         "in_loss": [None, None]}, schema_overrides={"in_loss": pl.Boolean})
    losses = pl.DataFrame({"run": "r", "bus": "chassis", "t_ns": [7_000_000_000],
                           "until_ns": [8_000_000_000], "count": [5]})
    con = _con(gaps=gaps, losses=losses)
    cells = envelopes.gap_cells(con, "r", 1_000_000_000).sort("bus", "t_ns")
    assert cells.select("bus", "t_ns", "logger").rows() == [
        ("body", 2_000_000_000, False), ("body", 3_000_000_000, False),
        ("body", 4_000_000_000, False), ("chassis", 7_000_000_000, True)]


def test_report_data_of_a_dataset(tmp_path: Path) -> None:
    ds = open_dataset(build_dataset(tmp_path / "ds", duration_s=20.0))
    data = envelopes.report_data(ds.connect(), RUN, ds.read_analysis_json("faults"))
    assert data.header["vehicle"] == "test-bench-3"
    assert [b["alias"] for b in data.header["buses"]] == ["body", "chassis"]
    assert data.header["wall_start"] == "2026-03-01T08:00:00.000Z"
    assert data.header["wall_end"] == "2026-03-01T08:00:20.000Z"
    assert data.timing["missing"][0] == data.timing["missing"].max()  # worst first
    assert set(data.load["bus"].unique()) == {"body", "chassis"}
    assert len(data.marks) == data.marks_total == 3
    assert data.loss_summary.rows() == [("chassis", 1, 30_500_000_000, 31_500_000_000,
                                         1_000_000_000, 12)]
    assert [r["bus"] for r in data.faults["results"]] == ["body", "chassis"]  # type: ignore[index]


def test_faults_of_other_runs_do_not_make_a_run_clean() -> None:
    faults = {"results": [{"run": "a", "bus": "P", "first_degraded": None}]}
    assert envelopes._run_faults(faults, "b") is None
    assert envelopes._run_faults(faults, "a") == faults
