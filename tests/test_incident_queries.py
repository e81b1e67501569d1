"""The incident-review queries: every ```sql block of docs/incident-review.md and README.md
runs on a small dataset, and README's queries give the simulator's known answers on the
bundled demo run (demo_logs/endurance-night.frames.zst and its truth file)."""

from __future__ import annotations

import bisect
import json
import re
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl
import pytest

from tests.analyses.synth import make_dataset
from tracelab import workflow
from tracelab.query import open_session, run_query

ROOT = Path(__file__).resolve().parent.parent
SQL_BLOCK = re.compile(r"```sql\n(.*?)```", re.DOTALL)


def _blocks() -> list[tuple[str, str]]:
    out = []
    for doc in (ROOT / "docs" / "incident-review.md", ROOT / "README.md"):
        if doc.exists():
            out += [(f"{doc.name}#{i}", b) for i, b in enumerate(SQL_BLOCK.findall(doc.read_text()))]
    return out


@pytest.fixture(scope="module")
def session(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    ds = make_dataset(tmp_path_factory.mktemp("incident"))
    workflow.timing(ds)
    workflow.load(ds)
    con = open_session(ds)
    yield con
    con.close()


def test_there_are_incident_queries() -> None:
    assert len([n for n, _ in _blocks() if n.startswith("incident-review")]) >= 4


@pytest.mark.parametrize(("name", "query"), _blocks(), ids=[n for n, _ in _blocks()])
def test_incident_query_runs(session, name: str, query: str) -> None:  # type: ignore[no-untyped-def]
    result = run_query(session, query)
    assert result.width > 0 and result.height > 0, name  # the dataset has an answer to each


# --- known answers on the demo run ------------------------------------------------------------

DEMO_LOG = ROOT / "demo_logs" / "endurance-night.frames.zst"


def _readme_query(keyword: str) -> str:
    blocks = [b for n, b in _blocks() if n.startswith("README") and keyword in b]
    assert len(blocks) == 1, keyword
    return blocks[0]


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    from tracelab.store.ingest import ingest_logs

    ds = tmp_path_factory.mktemp("demo") / "dataset"
    ingest_logs([DEMO_LOG], ds, quiet=True)
    workflow.timing(ds)
    workflow.load(ds)
    truth = json.loads(Path(f"{DEMO_LOG}.truth.json").read_text())
    con = open_session(ds)
    yield con, truth
    con.close()


def test_messages_that_lost_frames_on_the_bus(demo: Any) -> None:
    con, truth = demo
    rows = run_query(con, _readme_query("FROM timing")).to_dicts()
    # source: simulator truth: frames the bus lost (dropped + suppressed) per message
    lost = {(m["bus"], m["id_hex"]): m["dropped"] + m["suppressed"] for m in truth["messages"]
            if m["dropped"] + m["suppressed"] > 0}
    assert {(r["bus"], r["id"]): r["missing"] for r in rows} == lost
    assert [r["missing"] for r in rows] == sorted(lost.values(), reverse=True)


def test_gaps_and_the_logger_losses(demo: Any) -> None:
    con, truth = demo
    gaps = run_query(con, _readme_query("FROM gaps"))
    extra = run_query(con, "SELECT hex_id(id, ext) AS id, from_ns, to_ns, missing, in_loss "
                           "FROM gaps ORDER BY run, from_ns")
    assert gaps.height == extra.height
    # source: simulator truth: the logger's loss intervals, and the frames the bus lost
    loss = [(x["from_ns"], x["to_ns"]) for x in truth["logger_loss"]]
    for fr, to, in_loss in extra.select("from_ns", "to_ns", "in_loss").iter_rows():
        assert in_loss == any(a < to and fr < b for a, b in loss)
    bus_gaps = extra.filter(~pl.col("in_loss")).group_by("id").agg(pl.col("missing").sum())
    assert dict(bus_gaps.iter_rows()) == {m["id_hex"]: m["dropped"] for m in truth["messages"]
                                          if m["dropped"]}
    assert gaps.filter(~pl.col("in_loss"))["silent_s"].min() > 0


def test_errors_per_second(demo: Any) -> None:
    con, truth = demo
    rows = run_query(con, _readme_query("FROM errors"))
    # source: simulator truth: error frames per bus; the receive-noise fault starts at 240 s
    per_bus = {b["bus"]: b["error_frames"] for b in truth["buses"] if b["error_frames"]}
    assert dict(rows.group_by("bus").agg(pl.col("errors").sum()).iter_rows()) == per_bus
    (fault,) = [f for f in truth["faults"] if f["kind"] == "rx-noise"]
    assert rows["second_s"].min() == fault["start_ns"] // 10**9
    assert rows["second_s"].max() < truth["duration_ns"] / 1e9


def test_busiest_windows(demo: Any) -> None:
    con, truth = demo
    rows = run_query(con, _readme_query("FROM load"))
    assert rows.height == 5
    frames = run_query(con, "SELECT bus, start_ns, end_ns FROM frames")
    errors = run_query(con, "SELECT bus, t_ns FROM errors")
    w = 100_000_000  # the load job's default window
    for r in rows.iter_rows(named=True):
        a = round(r["from_s"] * 1e9)
        f = frames.filter(pl.col("bus") == r["bus"])
        s, e = f["start_ns"].to_numpy(), f["end_ns"].to_numpy()
        # derived: frames starting in the window, counted with numpy (not the load SQL)
        assert r["frames"] == int(((s >= a) & (s < a + w)).sum())
        busy = np.clip(np.minimum(e, a + w) - np.maximum(s, a), 0, None).sum()
        n_err = errors.filter((pl.col("bus") == r["bus"]) & (pl.col("t_ns") >= a - w)
                              & (pl.col("t_ns") < a + 2 * w)).height
        # frames' share from the stored spans; error frames add at most 108 + 20 + 17 bits
        # each at 500 kbit/s (docs/analyses.md estimate), never less than nothing
        pct = 100 * busy / w
        assert pct <= r["load_pct"] + 0.005
        assert r["load_pct"] <= pct + 100 * n_err * 145 * 2_000 / w + 0.005
    # the faulty stretch (240 s .. 400 s in the truth) holds every one of the five
    (fault,) = [f for f in truth["faults"] if f["kind"] == "rx-noise"]
    assert all(fault["start_ns"] / 1e9 <= x < fault["end_ns"] / 1e9 for x in rows["from_s"])


def test_counters_past_the_passive_limit(demo: Any) -> None:
    con, truth = demo
    rows = run_query(con, _readme_query("FROM status")).to_dicts()
    status = run_query(con, "SELECT bus, node, t_ns FROM status ORDER BY t_ns")
    expected = []
    for n in truth["nodes"]:
        traj = n["trajectory"]  # [t_ns, tec, rec, state]
        times = [row[0] for row in traj]
        mine = status.filter((pl.col("bus") == n["bus"]) & (pl.col("node") == n["node"]))
        # source: simulator truth trajectory, read at the logged status instants
        at = [traj[bisect.bisect_right(times, t) - 1] for t in mine["t_ns"].to_list()]
        hot = [(t, row[1], row[2]) for t, row in zip(mine["t_ns"].to_list(), at, strict=True)
               if row[1] > 127 or row[2] > 127]
        if hot:
            # the query's max_tec / max_rec are over the rows past the limit only
            expected.append((n["bus"], n["node"], hot[0][0], max(h[1] for h in hot),
                             max(h[2] for h in hot)))
    got = [(r["bus"], r["node"], r["first_t_ns"]) for r in rows]
    assert got == [e[:3] for e in expected]
    first = truth["first_degraded"][0]["first"]
    assert rows[0]["node"] == first["node"] and rows[0]["first_t_ns"] >= first["t_ns"]
    # status every 1 s; the counters can dip back below 128 between two status ticks, so
    # the first status past the limit is the first tick at which the truth is past it
    later = [t for t in status.filter(pl.col("node") == first["node"])["t_ns"].to_list()
             if t >= first["t_ns"]]
    assert rows[0]["first_t_ns"] in later
    assert [(r["max_tec"], r["max_rec"]) for r in rows] == [e[3:] for e in expected]
