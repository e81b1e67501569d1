"""The TEC / REC figure's data against the replayed counters it draws.

Reference: the counter rows themselves, walked in plain numpy (not the SQL under test). Every
change must be reproduced exactly where a display bucket holds few changes, and each bucket's
lowest and highest value, at the time they occurred, where it holds many; no drawn value may
be one the counter never had (a mean would invent a level).
"""

from __future__ import annotations

import duckdb
import numpy as np
import polars as pl
from hypothesis import given, settings
from hypothesis import strategies as st

from tracelab.analyses.envelopes import counter_envelopes

RUN = "r1"


def _connect(counters: pl.DataFrame) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.register("_c", counters.to_arrow())
    con.execute("CREATE VIEW counters AS SELECT * FROM _c")
    return con


def _drawn(counters: pl.DataFrame, bucket_ns: int) -> pl.DataFrame:
    with _connect(counters) as con:
        return counter_envelopes(con, RUN, bucket_ns, {"counters"})


def test_a_falling_counter_is_drawn_falling() -> None:
    # the case that misled: TEC 95 at 0.98 s, then one step down per good frame to 4 at 1.99 s
    t = np.concatenate([[980_000_000], 980_000_000 + 11_000_000 * np.arange(1, 92)])
    tec = np.concatenate([[95], 95 - np.arange(1, 92)])
    counters = pl.DataFrame({"run": RUN, "bus": "P", "node": "n1", "t_ns": t, "tec": tec,
                             "rec": np.zeros(len(t), np.int64)})
    drawn = _drawn(counters, 100_000_000).filter(pl.col("counter") == "tec")
    # within every 100 ms bucket the drawn points reach the bucket's lowest value
    b = t // 100_000_000
    for bucket in np.unique(b):
        lowest = tec[b == bucket].min()
        mine = drawn.filter((pl.col("t_ns") // 100_000_000) == int(bucket))
        assert int(mine["value"].min()) == lowest  # type: ignore[arg-type]
    # the last drawn value is the counter's last value, at its time
    assert drawn.sort("t_ns")["value"][-1] == 4 and drawn["t_ns"].max() == t[-1]
    assert set(drawn["value"].to_list()) <= set(tec.tolist())


@settings(max_examples=40, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3_000), st.integers(-9, 9)), min_size=1, max_size=300),
       st.sampled_from([1, 7, 50, 400]))
def test_every_change_or_the_bucket_extremes(steps: list[tuple[int, int]], bucket_ms: int) -> None:
    gaps, moves = zip(*steps, strict=True)
    t = np.cumsum(np.asarray(gaps, np.int64)) * 1_000_000  # ties allowed (gap 0)
    tec = np.clip(np.cumsum(moves), 0, 300)
    rec = np.clip(np.cumsum(np.asarray(moves)[::-1]), 0, 255)
    counters = pl.DataFrame({"run": RUN, "bus": "P", "node": "n1", "t_ns": t, "tec": tec,
                             "rec": rec})
    bucket_ns = bucket_ms * 1_000_000
    drawn = _drawn(counters, bucket_ns)
    for name, values in (("tec", tec), ("rec", rec)):
        mine = drawn.filter(pl.col("counter") == name).sort("t_ns", "seq")
        b = t // bucket_ns
        for bucket in np.unique(b):  # few buckets: a test, not a hot path
            sel = b == bucket
            got = mine.filter((pl.col("t_ns") // bucket_ns) == int(bucket))
            assert int(got["value"].min()) == values[sel].min()  # type: ignore[arg-type]
            assert int(got["value"].max()) == values[sel].max()  # type: ignore[arg-type]
            if sel.sum() <= 2:  # first and last cover every change of the bucket
                assert got["value"].to_list() == values[sel].tolist()
            # the value after the bucket is the true last value (the step holds it)
            assert got["value"][-1] == values[sel][-1]
        # every drawn point is a real (time, value) of the counter
        real = set(zip(t.tolist(), values.tolist(), strict=True))
        assert set(zip(mine["t_ns"].to_list(), mine["value"].to_list(), strict=True)) <= real
