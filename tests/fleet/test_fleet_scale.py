"""The issue's scale check: 36 simulated runs over 3 vehicles (slow: run with -m slow)."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from tests.fleet.conftest import STEPS
from tests.fleet.simfleet import DRIFT, SILENT, TX_NOISE, Night, write_catalogs, write_night
from tests.fleet.test_checks import check_first_degraded
from tracelab.fleet.batch import run_batch
from tracelab.fleet.views import connect_fleet

NODES = ("vcu", "inv", "bms", "tms")


def _nights() -> list[Night]:
    nights = []
    for n in range(1, 13):
        # ash: a fault on a different node every third night; birch: bms goes silent from
        # night 9 on (gaps made worse); cedar: the inverter's clock drifts from night 9 on
        nights.append(Night("ash", n, TX_NOISE.format(node=NODES[n % 4]) if n % 3 == 0 else "",
                            seconds=2.0))
        nights.append(Night("birch", n, SILENT if n >= 9 else "", seconds=2.0,
                            suffix=".frames.zst"))
        nights.append(Night("cedar", n, DRIFT if n >= 9 else "", seconds=2.0))
    return nights


@pytest.mark.slow
def test_fleet_of_36_runs(tmp_path: Path) -> None:
    root, fleet = tmp_path / "logs", tmp_path / "fleet"
    write_catalogs(root, ["ash", "birch", "cedar"])
    nights = _nights()
    for night in nights[:-1]:
        write_night(root, night)
    first = run_batch(root, fleet, STEPS, previous=5, quiet=True)
    assert (first.processed, first.failed) == (35, 0), first.describe()
    assert check_first_degraded(fleet, root) >= 4  # every ash fault night

    flags = connect_fleet(fleet).sql("SELECT * FROM regressions").pl()
    birch = flags.filter((pl.col("vehicle") == "birch") & (pl.col("metric") == "missing"))
    # flagged when the silence starts (night 9) and while the baseline is still clean
    assert {"birch-09", "birch-10"} <= set(birch["run"])
    cedar = flags.filter((pl.col("vehicle") == "cedar") & (pl.col("metric") == "abs_drift_ppm"))
    assert {"cedar-09", "cedar-10"} <= set(cedar["run"])
    assert not flags.filter(pl.col("metric").is_in(["missing", "abs_drift_ppm"])
                            & pl.col("vehicle").is_in(["birch", "cedar"])
                            & (pl.col("run").str.slice(-2).cast(pl.Int32) < 9)).height

    again = run_batch(root, fleet, STEPS, quiet=True)
    assert (again.processed, again.skipped) == (0, 35) and again.seconds < 10
    write_night(root, nights[-1])
    last = run_batch(root, fleet, STEPS, quiet=True)
    assert (last.processed, last.skipped, last.failed) == (1, 35, 0)
