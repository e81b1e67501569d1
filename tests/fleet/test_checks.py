"""The issue's checks on the simulated fleet: first-degraded nodes against the truth files,
regressions flagged where a later night was made worse."""

from __future__ import annotations

import json
from pathlib import Path

import polars as pl

from tests.fleet.conftest import NIGHTS, Fleet
from tracelab.fleet.views import connect_fleet


def _truth(root: Path, run: str) -> dict:  # type: ignore[type-arg]
    (path,) = root.glob(f"*/*/{run}.frames*.truth.json")
    return json.loads(path.read_text())


def check_first_degraded(fleet: Path, root: Path) -> int:
    """Every ok run's first-degraded node against its truth file; returns how many degraded."""
    runs = connect_fleet(fleet).sql("SELECT * FROM runs WHERE status = 'ok'").pl()
    degraded = 0
    for row in runs.iter_rows(named=True):  # one per run
        truth = _truth(root, row["run"])
        firsts = [b["first_warning"] or b["first"] for b in truth["first_degraded"]]
        firsts = sorted((f for f in firsts if f), key=lambda f: f["t_ns"])
        silent = [f for f in truth["faults"] if f["kind"] == "silent"]
        if firsts:  # a controller left error-active: the same node, a real transition of it
            degraded += 1
            assert row["first_degraded_node"] == firsts[0]["node"], row["run"]
            node = next(n for n in truth["nodes"] if n["node"] == firsts[0]["node"])
            transitions = {(t["to"], t["t_ns"]) for t in node["transitions"]}
            assert (row["first_degraded_state"], row["first_degraded_t_ns"]) in transitions
        elif silent:  # no counters moved; the silent node is the one to blame
            assert row["first_degraded_node"] == silent[0]["node"], row["run"]
            assert row["cause_kind"] not in (None, "none"), row["run"]
        else:
            assert row["first_degraded_node"] is None, row["run"]
            assert row["cause_kind"] == "none"
    return degraded


def test_first_degraded_matches_truth(small_fleet: Fleet) -> None:
    runs = connect_fleet(small_fleet.fleet).sql("SELECT * FROM runs WHERE status = 'ok'").pl()
    assert runs.height == len(NIGHTS)
    assert check_first_degraded(small_fleet.fleet, small_fleet.root) >= 1


def test_worse_nights_are_flagged(small_fleet: Fleet) -> None:
    con = connect_fleet(small_fleet.fleet)
    flags = con.sql("SELECT * FROM regressions").pl()
    # birch-03: bms silent for 0.8 s of 3 s -> its frames are missing (gaps made worse)
    birch = flags.filter((pl.col("run") == "birch-03") & (pl.col("metric") == "missing"))
    assert birch["name"].to_list() == ["battery_state"]
    # the simulator's truth: suppressed releases are the frames that never reached the bus
    truth = _truth(small_fleet.root, "birch-03")
    suppressed = next(m["suppressed"] for m in truth["messages"] if m["name"] == "battery_state")
    assert abs(birch["value"].item() - suppressed) <= 1
    # cedar-03: the inverter's oscillator 4000 ppm off (drift made worse)
    cedar = flags.filter((pl.col("run") == "cedar-03") & (pl.col("metric") == "abs_drift_ppm"))
    assert set(cedar["name"]) == {"inverter_state"}
    # nights 1 and 2 have too little history to be flagged, and nothing else regressed
    assert set(flags["run"]) <= {"alder-03", "birch-03", "cedar-03"}
    runs = con.sql("SELECT run, regressions, flagged FROM runs").pl()
    row = runs.filter(pl.col("run") == "birch-03").row(0, named=True)
    assert row["regressions"] >= 1 and "P:battery_state missing" in row["flagged"]
    page = (small_fleet.fleet / "index.html").read_text()
    # the flag sits on the panel of its metric (missing frames), named in words
    assert "battery_state" in page and "missing frames flagged" in page
