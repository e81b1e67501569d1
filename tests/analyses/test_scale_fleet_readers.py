"""The fleet's hive layout (FLEET/data/<table>/vehicle=V/date=D/<part>.parquet) reads the same
in engines other than DuckDB: polars (a dependency) and pyarrow.dataset. docs/scaling.md names
them as the way to query a fleet past one machine's DuckDB."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import polars as pl
import pyarrow.dataset as pads
from polars.testing import assert_frame_equal

from tests.analyses.synth import frames_table
from tracelab.fleet import layout
from tracelab.fleet.views import _HIVE


def _fleet(tmp_path: Path) -> Path:
    """Three vehicles over two nights, frames written where the batch writes them
    (partition keys in the path only, as summary.export_tables leaves them out)."""
    fleet = tmp_path / "fleet"
    rng = np.random.default_rng(2)
    for v, vehicle in enumerate(("rig-01", "rig-02", "van-7")):
        for date in ("2026-11-29", "2026-11-30"):
            n = 500 + 100 * v
            frames = frames_table(np.sort(rng.integers(0, 10**10, n)), 0x100 + v,
                                  run=f"{vehicle}-{date}")
            folder = fleet / layout.DATA_DIR / "frames" / f"vehicle={vehicle}" / f"date={date}"
            folder.mkdir(parents=True)
            frames.write_parquet(folder / f"{vehicle}-{date}-{v:016x}.parquet")
    return fleet


def test_polars_and_pyarrow_read_the_hive_layout_as_duckdb_does(tmp_path: Path) -> None:
    import duckdb

    fleet = _fleet(tmp_path)
    root = fleet / layout.DATA_DIR / "frames"
    query = ("SELECT vehicle, date, count(*) AS frames, sum(t_ns) AS t_sum FROM frames "
             "GROUP BY vehicle, date ORDER BY vehicle, date")
    con = duckdb.connect()
    con.execute(f"CREATE VIEW frames AS SELECT * FROM read_parquet('{root}/*/*/*.parquet', "
                f"{_HIVE})")  # the options tracelab's fleet views use
    expected = con.sql(query).pl().with_columns(pl.col("frames").cast(pl.Int64),
                                                pl.col("t_sum").cast(pl.Int64))
    con.close()
    assert expected.height == 6 and expected["frames"].sum() == 2 * (500 + 600 + 700)
    scanned = pl.scan_parquet(root, hive_partitioning=True)
    got = pl.SQLContext({"frames": scanned}).execute(query, eager=True)
    assert got.schema["date"] == pl.Date  # the date key typed, as DuckDB's hive_types says
    assert_frame_equal(got.with_columns(pl.col("frames").cast(pl.Int64),
                                        pl.col("t_sum").cast(pl.Int64)), expected)
    table = pads.dataset(root, format="parquet", partitioning="hive").to_table()
    counts = (pl.from_arrow(table).group_by("vehicle").len().sort("vehicle"))  # type: ignore[union-attr]
    assert counts["len"].to_list() == [1000, 1200, 1400]
