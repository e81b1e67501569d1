"""Jobs: each joins the pure layers (format, physics, store, analyses, report) into one step
that reads a dataset, computes, and writes its outputs. The CLI and pipelines call these.

Each function below is owned by one area; keep edits inside your own function(s).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

# --- memory limits (every dataset-reading command) ----------------------------------------


def limits(memory: str | None = None, temp_dir: Path | None = None) -> Any:
    """Context manager: every dataset or fleet connection opened inside gets this memory
    budget (``--memory``, else $TRACELAB_MEMORY, else 2 GiB) and spills to ``temp_dir``
    (else $TRACELAB_TEMP_DIR, else DATASET/.tmp). Nested jobs (report computing timing)
    inherit it."""
    from tracelab.store.limits import use_limits

    return use_limits(memory, temp_dir)


# --- foundation: ingest / info ------------------------------------------------------------


def ingest(logs: list[Path], dataset: Path, strict: bool = False, force: bool = False,
           quiet: bool = False) -> Any:
    from tracelab.store.ingest import ingest_logs

    return ingest_logs(logs, dataset, strict=strict, force=force, quiet=quiet)


def info(dataset: Path) -> Any:
    from tracelab.store.info import dataset_info

    return dataset_info(dataset)


# --- simulator ----------------------------------------------------------------------------


def simulate(scenario: Path, output: Path, duration: str | None = None, seed: int | None = None,
             quiet: bool = False) -> Any:
    from tracelab.errors import UsageError
    from tracelab.network.catalog import parse_duration_ns
    from tracelab.simulate import load_scenario
    from tracelab.simulate import simulate as run_simulation

    duration_ns = None
    if duration is not None:
        try:
            duration_ns = parse_duration_ns(duration)
        except ValueError as error:
            raise UsageError(f"--duration: {error}") from None
        if duration_ns <= 0:
            raise UsageError("--duration must be longer than 0")
    if seed is not None and seed < 0:
        raise UsageError("--seed must be a non-negative integer")
    from tracelab.store.dataset import make_output_parent

    output = make_output_parent(Path(output), "log")  # missing folders are made, as everywhere
    return run_simulation(load_scenario(scenario), output, duration_ns=duration_ns, seed=seed,
                          quiet=quiet)


# --- timing / load / sql ------------------------------------------------------------------


def _check_run(ds: Any, run: str | None) -> None:
    """UsageError naming the dataset's runs when ``run`` is not one of them."""
    from tracelab.errors import UsageError, did_you_mean

    if run is not None and run not in (runs := ds.runs()):
        raise UsageError(f"{ds.path}: no run {run!r}{did_you_mean(run, runs)} "
                         f"(runs: {', '.join(runs) or 'none'})")


def _store(ds: Any, name: str, frame: Any, run: str | None) -> None:
    """Write an analysis; with --run, keep the other runs' rows of an earlier output."""
    import contextlib

    import polars as pl

    if run is not None and (old := ds.read_analysis(name)) is not None and "run" in old.columns:
        # an output of an older layout cannot be merged: then it is replaced
        with contextlib.suppress(pl.exceptions.PolarsError):
            frame = pl.concat([old.filter(pl.col("run") != run), frame], how="vertical_relaxed")
    ds.write_analysis(name, frame)


def timing(dataset: Path, catalog: Path | None = None, run: str | None = None,
           gap_factor: float = 1.5) -> Any:
    from tracelab.analyses.timing import timing as compute_timing
    from tracelab.network.catalog import load_catalog
    from tracelab.store.dataset import open_dataset

    ds = open_dataset(dataset)
    cat = load_catalog(catalog) if catalog is not None else None
    _check_run(ds, run)
    with ds.writing("timing"), ds.connect() as con:  # one writer at a time
        result = compute_timing(con, cat, run=run, gap_factor=gap_factor)
        _store(ds, "timing", result.timing, run)
        _store(ds, "gaps", result.gaps, run)
        _store(ds, "node_drift", result.node_drift, run)
    return result


def load(dataset: Path, window: str = "100ms", run: str | None = None) -> Any:
    from tracelab.analyses.load import bus_load
    from tracelab.errors import UsageError
    from tracelab.network.catalog import parse_duration_ns
    from tracelab.store.dataset import open_dataset

    try:
        window_ns = parse_duration_ns(window)
    except ValueError as error:
        raise UsageError(f"--window: {error}") from None
    ds = open_dataset(dataset)
    _check_run(ds, run)
    with ds.writing("load"), ds.connect() as con:  # one writer at a time
        result = bus_load(con, window_ns=window_ns, run=run)
        _store(ds, "load", result.windows, run)
        _store(ds, "load_summary", result.summary, run)
        _store(ds, "load_top_ids", result.top_ids, run)
    return result


def sql(dataset: Path, query: str | None, fmt: str = "table", out: Path | None = None,
        timeout_s: float | None = None) -> int:
    from tracelab.query import sql_command

    return sql_command(dataset, query, fmt=fmt, out=out, timeout_s=timeout_s)


# --- signals ------------------------------------------------------------------------------


def signals(dataset: Path, catalog: Path, run: str | None = None,
            names: list[str] | None = None, from_: str | None = None, to: str | None = None,
            stuck: str | None = None) -> Any:
    """Decode and check the catalog's signals; store signals, signal_stats, signal_checks.

    Counter jumps are classified with the stored timing gaps when the timing analysis covers
    the runs (else they are computed here from the same catalog)."""
    from tracelab.analyses.signals import signals as compute_signals
    from tracelab.errors import UsageError
    from tracelab.network.catalog import load_catalog, parse_duration_ns
    from tracelab.store.dataset import open_dataset

    def duration(option: str, text: str | None) -> int | None:
        if text is None:
            return None
        try:
            return parse_duration_ns(text)
        except ValueError as error:
            raise UsageError(f"{option}: {error}") from None

    from_ns, to_ns, stuck_ns = duration("--from", from_), duration("--to", to), \
        duration("--stuck", stuck)
    if from_ns is not None and to_ns is not None and to_ns <= from_ns:
        raise UsageError(f"--to {to} must be later than --from {from_}")
    if stuck_ns is not None and stuck_ns <= 0:
        raise UsageError("--stuck must be longer than 0")
    ds = open_dataset(dataset)
    cat = load_catalog(catalog)
    _check_run(ds, run)
    runs = [run] if run is not None else ds.runs()
    with ds.writing("signals"):  # one writer at a time
        gaps = ds.read_analysis("gaps") if _covers(ds, "timing", runs) else None
        with ds.connect() as con:
            result = compute_signals(con, cat, run=run, names=names or None, from_ns=from_ns,
                                     to_ns=to_ns, gaps=gaps, stuck_ns=stuck_ns)
        _store(ds, "signals", result.signals, run)
        _store(ds, "signal_stats", result.stats, run)
        _store(ds, "signal_checks", result.checks, run)
    return result


# --- forensics ----------------------------------------------------------------------------


def faults(dataset: Path, catalog: Path, run: str | None = None) -> Any:
    """Replay the error counters; store counters, node_states, verdicts and faults.json.

    Uses the timing analysis' gaps for silences when they exist. With --run, the stored
    outputs keep the other runs' rows (faults.json too); the returned object has this run only.
    """
    from tracelab.forensics import replay_faults
    from tracelab.network.catalog import load_catalog
    from tracelab.store.dataset import open_dataset

    ds = open_dataset(dataset)
    cat = load_catalog(catalog)
    _check_run(ds, run)
    with ds.writing("faults"):  # one writer at a time
        gaps = ds.read_analysis("gaps") if ds.has_analysis("gaps") else None
        with ds.connect() as con:
            result = replay_faults(con, cat, run=run, gaps=gaps, frame_files=ds.frame_files)
        _store(ds, "counters", result.counters, run)
        _store(ds, "node_states", result.node_states, run)
        _store(ds, "verdicts", result.verdicts, run)
        payload = result.as_json()
        if run is not None and ds.has_analysis("faults"):
            old = ds.read_analysis_json("faults") or {}
            kept = [r for r in old.get("results", []) if r.get("run") != run]
            payload = {"results": sorted(kept + payload["results"],
                                         key=lambda r: (r["run"], r["bus"]))}
        ds.write_analysis_json("faults", payload)
    return result


# --- report / demo ------------------------------------------------------------------------


def _has_signals(catalog: Path) -> bool:
    """Whether the catalog defines any [[message.signal]] (the report then shows them)."""
    from tracelab.network.catalog import load_catalog

    return any(m.signals for m in load_catalog(catalog).messages)


def _report_path(output: Path, run: str, several: bool) -> Path:
    """``-o x.html`` is the file for one run (x-<run>.html for several); else a directory."""
    from tracelab.wording import file_stem

    safe = file_stem(run)
    if output.suffix.lower() in (".html", ".htm"):
        return output.with_name(f"{output.stem}-{safe}{output.suffix}") if several else output
    return output / f"{safe}.html"


def _covers(ds: Any, name: str, runs: list[str]) -> bool:
    """Whether the stored analysis ``name`` has rows for every run with frames in ``runs``."""
    import polars as pl

    with_frames = set(ds.manifest().filter(pl.col("frames").fill_null(0) > 0)
                      .filter(pl.col("run").is_in(runs))["run"].to_list())
    if name == "faults":
        stored = ds.read_analysis_json("faults")
        if stored is None:
            return False
        return with_frames <= {r.get("run") for r in stored.get("results", [])}
    path = ds.path / "analyses" / f"{name}.parquet"
    if not ds.has_analysis(name):  # absent or damaged: stale, computed again
        return False
    try:
        seen = set(pl.scan_parquet(path, glob=False).select("run").unique().collect()["run"].to_list())
    except pl.exceptions.PolarsError:  # an output without a run column: take it as it is
        return True
    return with_frames <= seen


def report(dataset: Path, output: Path, catalog: Path | None = None, run: str | None = None,
           shared_plotly: bool = False, load_limit: float = 0.5) -> list[Path]:
    from tracelab.analyses.envelopes import report_data
    from tracelab.errors import UsageError
    from tracelab.report.page import write_report
    from tracelab.store.dataset import make_output_dir, open_dataset

    if not 0 < load_limit <= 1:
        raise UsageError(f"--load-limit {load_limit} must lie in (0, 1], e.g. 0.5 for 50 %")
    ds = open_dataset(dataset)
    output = Path(output)
    is_file = output.suffix.lower() in (".html", ".htm")
    make_output_dir(output.parent if is_file else output, "report")
    runs = ds.runs()
    if not runs:
        raise UsageError(f"{dataset}: the dataset holds no runs yet; ingest a log first")
    if run is not None:
        _check_run(ds, run)
        runs = [run]
    # Compute what the dataset lacks (absent, damaged, or older than a run ingested since),
    # for every run at once, so a later --run finds it too; under the write lock, and only
    # when something is missing (a complete dataset may be read-only to this user).
    def missing() -> list[str]:
        names = ["timing", "load"] + (["faults"] if catalog is not None else [])
        names += ["signals"] if catalog is not None and _has_signals(catalog) else []
        return [name for name in names if not _covers(ds, name, runs)]

    if missing():
        with ds.writing("report"):
            todo = missing()  # again, under the lock: another writer may have done it
            if "timing" in todo:
                timing(dataset, catalog=catalog)
            if "load" in todo:
                load(dataset)
            if "faults" in todo and catalog is not None:
                faults(dataset, catalog=catalog)
            if "signals" in todo and catalog is not None:
                signals(dataset, catalog=catalog)
    faults_json = ds.read_analysis_json("faults")
    written = []
    with ds.connect() as con:
        for name in runs:  # one page per run: few
            data = report_data(con, name, faults_json)
            path = _report_path(output, name, several=len(runs) > 1)
            written.append(write_report(data, path, load_limit=load_limit,
                                        shared_plotly=shared_plotly))
    return written


def compare(source: Path, run_a: str, run_b: str, output: Path | None = None) -> Any:
    """Compare run B with reference run A, in one dataset or one fleet (runs by name)."""
    from tracelab.analyses.compare import compare_runs
    from tracelab.errors import UsageError, did_you_mean
    from tracelab.query import FLEET_MANIFEST

    if (source / FLEET_MANIFEST).is_file():
        from tracelab.fleet.views import connect_fleet

        con = connect_fleet(source)
        rows = con.sql("SELECT * FROM runs WHERE status = 'ok'").pl()
        names = rows["run"].to_list()
        verdicts = {}
        for side, name in (("a", run_a), ("b", run_b)):
            hits = rows.filter(rows["run"] == name)
            if hits.is_empty():
                con.close()
                raise UsageError(f"{source}: no ok run {name!r}{did_you_mean(name, names)}")
            if hits.height > 1:
                con.close()
                raise UsageError(f"{source}: run {name!r} is ambiguous (vehicles "
                                 f"{', '.join(str(v) for v in hits['vehicle'].to_list())})")
            verdicts[side] = _fleet_verdict(hits.row(0, named=True))
    else:
        from tracelab.store.dataset import open_dataset

        ds = open_dataset(source)
        for name in (run_a, run_b):
            _check_run(ds, name)
        if not _covers(ds, "timing", [run_a, run_b]):
            timing(source)
        if not _covers(ds, "load", [run_a, run_b]):
            load(source)
        results = (ds.read_analysis_json("faults") or {}).get("results", [])
        verdicts = {side: _run_verdict(results, name)
                    for side, name in (("a", run_a), ("b", run_b))}
        con = ds.connect()
    with con:
        result = compare_runs(con, run_a, run_b, verdicts)
    if output is not None:
        from tracelab.report.compare_page import write_compare

        write_compare(result, output)
    return result


def _run_verdict(results: list[Any], run: str) -> Any:
    """The run's faults result whose node degraded first (else its first result; None when
    the replay did not cover the run)."""
    mine = [r for r in results if r.get("run") == run]
    degraded = [r for r in mine if r.get("first_degraded")]
    if degraded:
        return min(degraded, key=lambda r: r["first_degraded"].get("t_ns") or 0)
    return mine[0] if mine else None


def _fleet_verdict(row: dict[str, Any]) -> Any:
    """A faults-like verdict from the fleet summary's columns."""
    first = ({"node": row.get("first_degraded_node"), "bus": row.get("first_degraded_bus"),
              "state": row.get("first_degraded_state"), "t_ns": row.get("first_degraded_t_ns"),
              "confidence": row.get("confidence")} if row.get("first_degraded_node") else None)
    return {"first_degraded": first, "cause": {"kind": row.get("cause_kind"), "node": None}}


def _demo_inputs() -> tuple[Path, Path | None]:
    """The bundled demo scenario, and the committed demo log when the checkout has one."""
    from tracelab.errors import UsageError

    package = Path(__file__).resolve().parent
    scenarios = sorted((package / "demo").glob("*.toml"))
    logs_dir = package.parent / "demo_logs"
    scenarios += sorted(logs_dir.glob("*.toml"))
    if not scenarios:
        raise UsageError("no demo scenario found (tracelab/demo/*.toml)")
    scenario = scenarios[0]
    logs = [p for p in sorted(logs_dir.glob("*.frames*")) if not p.name.endswith(".json")]
    return scenario, (logs[0] if logs else None)


def demo(output: Path, quiet: bool = False) -> str:
    import shutil

    from tracelab.errors import UsageError
    from tracelab.report.page import verdict_sentence
    from tracelab.store.dataset import is_dataset, open_dataset

    scenario, log = _demo_inputs()
    output.mkdir(parents=True, exist_ok=True)
    if log is None:
        log = output / "demo.frames.zst"
        simulate(scenario, log, quiet=quiet)
    dataset = output / "dataset"
    if dataset.exists():  # start clean so every analysis matches this log
        if not is_dataset(dataset):
            raise UsageError(f"{dataset}: exists and is not a tracelab dataset; choose another -o")
        shutil.rmtree(dataset)
    ingest([log], dataset, quiet=quiet)
    timing(dataset, catalog=scenario)
    load(dataset)
    faults(dataset, catalog=scenario)
    paths = report(dataset, output / "report.html", catalog=scenario)
    ds = open_dataset(dataset)
    errors = int(ds.manifest()["errors"].fill_null(0).sum())
    faults_json = ds.read_analysis_json("faults")
    sentence, _ = verdict_sentence(faults_json, errors)
    lines = [f"verdict: {sentence}", *_demo_truth(log, faults_json)]
    lines += [f"report: {p}" for p in paths]
    lines += _demo_next_steps(dataset, paths, ds.runs())
    return "\n".join(lines)


def _demo_next_steps(dataset: Path, reports: list[Path], runs: list[str]) -> list[str]:
    """What a new user would run next on the demo dataset (quoted for a POSIX shell)."""
    import shlex

    query = ("SELECT bus, hex_id(id, ext) AS id, name, missing FROM timing "
             "WHERE missing > 0 ORDER BY missing DESC")
    steps = [f"tracelab sql {shlex.quote(str(dataset))} {shlex.quote(query)}"]
    steps += [f"open {shlex.quote(str(p))} in a browser" for p in reports[:1]]
    run = runs[0] if runs else "RUN"
    steps.append(f"tracelab compare {shlex.quote(str(dataset))} --run {shlex.quote(run)} "
                 "--run NEXT_RUN -o compare.html   (after ingesting a second night into it)")
    return ["next:", *(f"  {s}" for s in steps)]


def _demo_truth(log: Path, faults_json: Any) -> list[str]:
    """One line comparing the verdict with the simulator's ground truth, when it is there."""
    import json

    truth_path = log.with_name(log.name + ".truth.json")
    if not truth_path.exists():
        return []
    truth = json.loads(truth_path.read_text(encoding="utf-8"))
    found = {r.get("bus"): (r.get("first_degraded") or {}).get("node")
             for r in (faults_json or {}).get("results", [])}
    lines = []
    for entry in truth.get("first_degraded") or []:  # one entry per bus
        first = entry.get("first_warning") or entry.get("first")
        if not first:
            continue
        agrees = "agrees" if found.get(entry.get("bus")) == first.get("node") else "DIFFERS"
        lines.append(f"truth:   {first.get('node')} on bus {entry.get('bus')} reached "
                     f"{first.get('state')} first at {first.get('t_ns', 0) / 1e9:.3f} s "
                     f"(simulator ground truth; the replay {agrees})")
    return lines


# --- fleet --------------------------------------------------------------------------------


def batch(root: Path, fleet: Path, catalog: Path | None = None, executor: str = "local",
          scheduler: str | None = None, workers: int | None = None, previous: int = 5,
          quiet: bool = False) -> Any:
    # The fleet layer sits below this module, so the per-run steps are handed down to it.
    from tracelab.fleet.batch import run_batch
    from tracelab.fleet.job import PipelineSteps

    steps = PipelineSteps(ingest=ingest, timing=timing, load=load, faults=faults, report=report)
    return run_batch(root, fleet, steps, catalog=catalog, executor=executor,
                     scheduler=scheduler, workers=workers, previous=previous, quiet=quiet)


# --- inputs: capture / convert --------------------------------------------------------------


def capture(ifaces: list[str], output: Path, rotate: str | None = None,
            duration: str | None = None, meta: list[str] | None = None,
            bus: list[str] | None = None, node: str = "logger",
            hardware_timestamps: bool = False, reorder: str = "100ms",
            quiet: bool = False) -> Any:
    from tracelab.errors import UsageError
    from tracelab.inputs.capture import capture_interfaces
    from tracelab.inputs.options import parse_bus_option, parse_meta, parse_size_bytes
    from tracelab.inputs.rotation import Rotation
    from tracelab.network.catalog import parse_duration_ns
    from tracelab.store.dataset import make_output_parent

    def duration_ns(option: str, text: str) -> int:
        try:
            value = parse_duration_ns(text)
        except ValueError as error:
            raise UsageError(f"{option}: {error}") from None
        if value <= 0:
            raise UsageError(f"{option} must be longer than 0")
        return value

    rotation = None
    if rotate is not None:
        size = parse_size_bytes(rotate)
        rotation = (Rotation(size_bytes=size) if size else
                    Rotation(interval_ns=duration_ns("--rotate (an interval such as 1h or a "
                                                     "size such as 512MB)", rotate)))
    if not node or any(c in node for c in "\t\n\r"):
        raise UsageError("--node must be a name without TABs or line ends")
    make_output_parent(Path(output), "log")
    return capture_interfaces(
        ifaces, Path(output), [parse_bus_option(b) for b in bus or []], parse_meta(meta or []),
        rotation=rotation, duration_ns=duration_ns("--duration", duration) if duration else None,
        node=node, hardware=hardware_timestamps, reorder_ns=duration_ns("--reorder", reorder),
        quiet=quiet)


def convert(tables: list[Path], output: Path, bus: list[str], columns: str, time_unit: str = "s",
            origin: str | None = None, delimiter: str = ",", id_base: int = 16,
            header: bool = True, meta: list[str] | None = None, strict: bool = False,
            quiet: bool = False) -> Any:
    from tracelab.inputs.convert import ConvertOptions, convert_tables, parse_columns
    from tracelab.inputs.options import parse_bus_option, parse_meta
    from tracelab.store.dataset import make_output_parent

    make_output_parent(Path(output), "log")
    named = {"tab": "\t", "\\t": "\t", "comma": ",", "semicolon": ";", "space": " "}
    opts = ConvertOptions(buses=tuple(parse_bus_option(b) for b in bus),
                          columns=parse_columns(columns), time_unit=time_unit, origin=origin,
                          delimiter=named.get(delimiter.lower(), delimiter), id_base=id_base,
                          header=header, strict=strict, meta=parse_meta(meta or []))
    return convert_tables([Path(t) for t in tables], Path(output), opts, quiet=quiet)
