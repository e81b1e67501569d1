"""The timing / load jobs end to end on write_demo_log() (tests/analyses/synth.py): known
answers worked out from how that log is built, --json shapes, --run, bad options."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from tests.analyses.synth import make_dataset
from tests.oracles import frame_oracle as fo
from tracelab import workflow
from tracelab.analyses.timing import TIMING_COLUMNS
from tracelab.cli import main
from tracelab.errors import EXIT_USAGE, UsageError


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_dataset(tmp_path_factory.mktemp("jobs"))


def test_timing_json_and_outputs(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["timing", str(dataset), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [list(r) for r in rows] == [list(TIMING_COLUMNS)] * len(rows)
    by_id = {r["id"]: r for r in rows}
    assert isinstance(by_id[0x0C0]["id"], int)
    # derived from write_demo_log: 0C0 every 10 ms with frames 150..152 left out (a silent
    # sender) and the three inside the 2.50 .. 2.53 s logger loss dropped by the logger
    c0 = by_id[0x0C0]
    # inferred periods: the send times carry 0..20 us of uniform jitter
    assert (c0["missing"], c0["missing_in_loss"]) == (3, 3)
    assert c0["period_ns"] == pytest.approx(10_000_000, abs=1_000)
    x = by_id[0x18FF0010]  # every 100 ms, nothing lost
    assert (x["missing"], x["missing_in_loss"], x["gaps"]) == (0, 0, 0)
    assert x["period_ns"] == pytest.approx(100_000_000, abs=1_000)
    assert by_id[0x3A0]["period_ns"] is None  # the event-driven message
    gaps = pl.read_parquet(dataset / "analyses" / "gaps.parquet").sort("from_ns")
    # the last frame before each silence is k = 149 / 249 at 1 ms + k x 10 ms (+ < 20 us
    # jitter), the next one k = 153 / 253
    assert [(g["from_ns"] // 1_000_000, g["to_ns"] // 1_000_000, g["missing"], g["in_loss"])
            for g in gaps.iter_rows(named=True)] == [(1491, 1531, 3, False),
                                                    (2491, 2531, 3, True)]
    for name in ("timing", "gaps", "node_drift"):
        assert (dataset / "analyses" / f"{name}.parquet").exists()
    assert "0C0" in workflow.timing(dataset).describe()


def test_load_json_and_outputs(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["load", str(dataset), "--window", "250ms", "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)
    for key in ("run", "bus", "window_ns", "mean", "p50", "p95", "p99", "max", "max_t_ns",
                "frames_per_s"):
        assert key in row
    assert row["window_ns"] == 250_000_000
    # derived from write_demo_log at 500 kbit/s (2 us a bit), bits from the independent
    # frame oracle: 394 frames of 0C0, 40 of 18FF0010 (8 zero bytes each) and 40 of 3A0
    # (01 02); the crc-field error frame adds 99 + 17 bits (docs/analyses.md estimate)
    bits = (394 * fo.build(0x0C0, False, False, False, False, False, 8, bytes(8)).bits
            + 40 * fo.build(0x18FF0010, True, False, False, False, False, 8, bytes(8)).bits
            + 40 * fo.build(0x3A0, False, False, False, False, False, 2, b"\x01\x02").bits
            + 99 + 17)
    assert row["busy_ns"] == bits * 2_000
    assert (row["windows"], row["frames"], row["error_frames"]) == (16, 474, 1)  # 4 s / 250 ms
    assert row["mean"] == pytest.approx(bits * 2_000 / (16 * 250_000_000), rel=1e-12)
    windows = pl.read_parquet(dataset / "analyses" / "load.parquet")
    assert row["max"] == windows["load_ratio"].max()
    assert windows["t_ns"].to_list() == [k * 250_000_000 for k in range(16)]
    # the error at 3.000 s is charged from 99 bit times before it: the window at 2.75 s
    assert windows.filter(pl.col("error_frames") > 0)["t_ns"].to_list() == [2_750_000_000]
    assert windows.columns == ["run", "bus", "window_ns", "t_ns", "busy_ns", "load_ratio",
                               "frames", "error_frames"]
    assert windows["error_frames"].sum() == 1


def test_bad_options_are_usage_errors(dataset: Path) -> None:
    with pytest.raises(UsageError, match="bench-07"):
        workflow.timing(dataset, run="bench-7")
    with pytest.raises(UsageError, match="1ms"):
        workflow.load(dataset, window="10us")
    assert main(["load", str(dataset), "--window", "10 parsecs"]) == EXIT_USAGE
