"""fleet layer: the nightly batch over a folder tree of logs (docs/fleet.md).

    discover    find logs, group parts into runs, nearest catalog, content keys
    job         the per-run job a worker runs (steps handed down by the workflow)
    executors   local process pool, Dask cluster
    summary     one ``runs`` row per run, per-message stats, the per-run table export
    regressions flags against the median of a vehicle's previous runs
    index       the fleet overview page
    views       ``connect_fleet(path)``: DuckDB views spanning every run
    batch       ``run_batch()``: discovery, execution, commit
"""
