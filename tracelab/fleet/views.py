"""Fleet-wide SQL: DuckDB views spanning every committed run, with ``vehicle`` and ``date``.

Views: one per table under ``FLEET/data/`` (frames, errors, status, marks, losses, rejects,
timing, gaps, load, ..., message_stats, logs), each over the files of the runs ``runs.parquet``
lists as ok, read as a hive-partitioned dataset; ``runs`` (the fleet summary), ``regressions``
and ``manifest`` (the fleet manifest, one row per log).
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import polars as pl

from tracelab.errors import StoreError
from tracelab.fleet import layout
from tracelab.fleet.regressions import REGRESSIONS
from tracelab.fleet.summary import PUBLISHED
from tracelab.store import schema
from tracelab.store.dataset import glob_escape
from tracelab.store.limits import configure

_HIVE = "hive_partitioning = true, union_by_name = true, " \
        "hive_types = {'vehicle': VARCHAR, 'date': DATE}"



def connect_fleet(path: str | Path) -> duckdb.DuckDBPyConnection:
    """In-memory DuckDB over a fleet directory; StoreError when ``path`` is not a fleet."""
    fleet = Path(path)
    if not layout.is_fleet(fleet):
        raise StoreError(f"{fleet}: not a tracelab fleet (no {layout.MANIFEST_FILE}; "
                         "create one with 'tracelab batch ROOT -o FLEET')")
    runs_path = fleet / layout.RUNS_FILE
    try:
        runs = pl.read_parquet(runs_path, glob=False)
    except Exception as error:  # pyarrow / polars I/O errors become ours, with the path
        raise StoreError(f"{runs_path}: cannot read the fleet summary ({error})") from error
    regressions_path = fleet / layout.REGRESSIONS_FILE
    regressions = (pl.read_parquet(regressions_path, glob=False) if regressions_path.is_file()
                   else pl.DataFrame(schema=REGRESSIONS))
    con = connect_runs(fleet, runs, regressions)
    try:
        con.execute("CREATE VIEW manifest AS SELECT * FROM read_parquet("
                    f"{schema.sql_string(glob_escape((fleet / layout.MANIFEST_FILE).absolute()))})")
    except duckdb.Error as error:
        raise StoreError(f"{fleet}: cannot open the fleet manifest ({error})") from error
    return con


def table_files(fleet: Path, keys: set[str]) -> dict[str, list[Path]]:
    """Per table, the Parquet files of the runs whose key16 is in ``keys``."""
    tables: dict[str, list[Path]] = {}
    data = fleet / layout.DATA_DIR
    if not data.is_dir():
        return tables
    for table_dir in sorted(p for p in data.iterdir() if p.is_dir()):
        files = sorted(f for f in table_dir.glob("vehicle=*/date=*/*.parquet")
                       if layout.key_of_part(f.stem) in keys)
        if files:
            tables[table_dir.name] = files
    return tables


def connect_runs(fleet: Path, runs: pl.DataFrame,
                 regressions: pl.DataFrame | None = None) -> duckdb.DuckDBPyConnection:
    """Views over the given runs table (the batch uses this before it commits)."""
    con = duckdb.connect(":memory:")
    try:
        configure(con, fleet)  # the command's memory budget, spilling to FLEET/.tmp
        con.register("_runs", runs.to_arrow())
        con.execute("CREATE VIEW runs AS SELECT * FROM _runs")
        flags = regressions if regressions is not None else pl.DataFrame(schema=REGRESSIONS)
        con.register("_regressions", flags.to_arrow())
        con.execute("CREATE VIEW regressions AS SELECT * FROM _regressions")
        ok = runs.filter(pl.col("status").is_in(PUBLISHED))["key"].str.slice(0, 16).to_list()
        made = set()
        for table, files in table_files(fleet, set(ok)).items():
            listing = ", ".join(schema.sql_string(glob_escape(f.absolute())) for f in files)
            con.execute(f'CREATE VIEW "{table}" AS SELECT * FROM read_parquet([{listing}], '
                        f"{_HIVE})")
            made.add(table)
        for table in schema.TABLES:  # an empty fleet still has the record tables' columns
            if table not in made:
                empty = schema.empty(table).with_columns(
                    vehicle=pl.lit(None, pl.String), date=pl.lit(None, pl.Date))
                con.register(f"_empty_{table}", empty.to_arrow())
                con.execute(f"CREATE VIEW {table} AS SELECT * FROM _empty_{table}")
    except duckdb.Error as error:
        con.close()
        raise StoreError(f"{fleet}: cannot open the fleet views ({error})") from error
    return con
