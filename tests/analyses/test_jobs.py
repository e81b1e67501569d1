"""The timing / load jobs end to end: stored outputs, --json shapes, --run, bad options."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl
import pytest

from tests.analyses.synth import make_dataset
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
    assert isinstance(by_id[0x0C0]["id"], int) and by_id[0x0C0]["missing"] == 3
    assert by_id[0x3A0]["period_ns"] is None  # the event-driven message
    for name in ("timing", "gaps", "node_drift"):
        assert (dataset / "analyses" / f"{name}.parquet").exists()
    assert "0C0" in workflow.timing(dataset).describe()


def test_load_json_and_outputs(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["load", str(dataset), "--window", "250ms", "--json"]) == 0
    (row,) = json.loads(capsys.readouterr().out)
    for key in ("run", "bus", "window_ns", "mean", "p50", "p95", "p99", "max", "max_t_ns",
                "frames_per_s"):
        assert key in row
    assert row["window_ns"] == 250_000_000 and 0 <= row["mean"] <= row["max"] <= 1
    windows = pl.read_parquet(dataset / "analyses" / "load.parquet")
    assert windows.columns == ["run", "bus", "window_ns", "t_ns", "busy_ns", "load_ratio",
                               "frames", "error_frames"]
    assert windows["error_frames"].sum() == 1


def test_bad_options_are_usage_errors(dataset: Path) -> None:
    with pytest.raises(UsageError, match="bench-07"):
        workflow.timing(dataset, run="bench-7")
    with pytest.raises(UsageError, match="1ms"):
        workflow.load(dataset, window="10us")
    assert main(["load", str(dataset), "--window", "10 parsecs"]) == EXIT_USAGE
