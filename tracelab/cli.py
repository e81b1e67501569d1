"""The ``tracelab`` command: a thin typer shell over tracelab.workflow.

Exit codes: 0 ok, 2 usage, 3 input error (bad log, catalog, query), 4 internal error.
Each command parses options, calls one library function and prints; its docstring ends with
one ``Example:`` line (tests/test_cli_docs.py checks it).
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path
from typing import Any

import typer

import tracelab
from tracelab.errors import EXIT_INTERNAL, EXIT_USAGE, TracelabError, printable, printable_lines

# Plain help (rich_markup_mode=None): flags show no "<bool>" type column and the page reads
# the same in a pipe; errors are ours (main()), so no rich boxes either.
app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    rich_markup_mode=None,
    pretty_exceptions_enable=False,
    help="Timing, bus-load and fault-confinement forensics for CAN / CAN FD frame logs.",
)


def _print_version(value: bool) -> None:
    if value:
        typer.echo(f"tracelab {tracelab.__version__}")
        raise typer.Exit()


@app.callback()
def _root(version: bool = typer.Option(False, "--version", is_eager=True, callback=_print_version,
                                       help="Print the version and exit.")) -> None:
    """Timing, bus-load and fault-confinement forensics for CAN / CAN FD frame logs."""


#: The memory options every dataset-reading command takes (store/limits.py); reuse them in
#: new commands and wrap the call in ``with workflow.limits(memory, temp_dir):``.
MEMORY_OPTION: Any = typer.Option(
    None, "--memory", metavar="SIZE",
    help="Peak memory budget, e.g. 2GiB or 512MiB (default $TRACELAB_MEMORY, else 2GiB); "
         "DuckDB spills to the temp dir beyond its share.")
TEMP_DIR_OPTION: Any = typer.Option(
    None, "--temp-dir", help="Folder to spill to (default $TRACELAB_TEMP_DIR, else DATASET/.tmp).")


def _echo(text: str, err: bool = False) -> None:
    """Print command output; control characters from logs and names come out escaped."""
    typer.echo(printable_lines(text), err=err)


def _print_json(payload: Any) -> None:
    typer.echo(json.dumps(payload, indent=2, default=str))


@app.command()
def ingest(
    logs: list[Path] = typer.Argument(..., help="Frame logs (.frames, .frames.gz, .frames.zst)."),
    output: Path = typer.Option(..., "-o", "--output", help="Dataset directory to create or extend."),
    strict: bool = typer.Option(False, "--strict", help="Stop at the first bad line (exit 3)."),
    force: bool = typer.Option(False, "--force", help="Re-ingest files already in the dataset."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar, summary only."),
) -> None:
    """Ingest frame logs into a Parquet dataset; every line is ingested or recorded as rejected.

    \b
    Example:
      tracelab ingest night-07.frames.zst -o night.ds
    """
    from tracelab import workflow

    summary = workflow.ingest(logs, output, strict=strict, force=force, quiet=quiet)
    _echo(summary.describe())


@app.command()
def info(
    dataset: Path = typer.Argument(..., help="Dataset directory."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON."),
) -> None:
    """Runs, files, time span, buses, counts per record kind, rejects, backward time steps.

    \b
    Example:
      tracelab info night.ds
    """
    from tracelab import workflow

    result = workflow.info(dataset)
    _print_json(result.as_dict()) if as_json else _echo(result.describe())


@app.command()
def simulate(
    scenario: Path = typer.Argument(..., help="Scenario TOML (catalog + run + faults)."),
    output: Path = typer.Option(..., "-o", "--output", help="Log to write (.frames[.gz|.zst])."),
    duration: str | None = typer.Option(None, "--duration", help="Override run duration, e.g. 90s."),
    seed: int | None = typer.Option(None, "--seed", help="Override the scenario seed."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
) -> None:
    """Simulate a bus scenario; writes LOG and LOG.truth.json (the ground truth).

    \b
    Example:
      tracelab simulate demo_logs/endurance-night.toml -o sim.frames --duration 60s
    """
    from tracelab import workflow

    summary = workflow.simulate(scenario, output, duration=duration, seed=seed, quiet=quiet)
    _echo(summary.describe())


@app.command()
def timing(
    dataset: Path = typer.Argument(..., help="Dataset directory."),
    catalog: Path | None = typer.Option(None, "--catalog", help="Network catalog TOML."),
    run: str | None = typer.Option(None, "--run", help="Only this run."),
    gap_factor: float = typer.Option(1.5, "--gap-factor", help="Gap when inter-arrival > factor x period."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Period, jitter, drift and gaps per message.

    \b
    Example:
      tracelab timing night.ds --catalog catalog.toml
    """
    from tracelab import workflow

    with workflow.limits(memory, temp_dir):
        result = workflow.timing(dataset, catalog=catalog, run=run, gap_factor=gap_factor)
    _print_json(result.as_json()) if as_json else _echo(result.describe())


@app.command()
def load(
    dataset: Path = typer.Argument(..., help="Dataset directory."),
    window: str = typer.Option("100ms", "--window", help="Window length, 1ms .. 1h."),
    run: str | None = typer.Option(None, "--run", help="Only this run."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Bus load over time per bus, from exact frame durations.

    \b
    Example:
      tracelab load night.ds --window 1s
    """
    from tracelab import workflow

    with workflow.limits(memory, temp_dir):
        result = workflow.load(dataset, window=window, run=run)
    _print_json(result.as_json()) if as_json else _echo(result.describe())


@app.command()
def sql(
    dataset: Path = typer.Argument(..., help="Dataset or fleet directory."),
    query: str | None = typer.Argument(None, help="SQL; omit for an interactive prompt."),
    fmt: str = typer.Option("table", "--format", help="table | csv | json | parquet"),
    out: Path | None = typer.Option(None, "--out", help="Write the result to this file."),
    timeout: float | None = typer.Option(None, "--timeout", help="Stop a query after this many seconds (exit 3)."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Read-only DuckDB SQL over a dataset (or a fleet) with ready-made views and macros.

    \b
    Example:
      tracelab sql night.ds "SELECT bus, count(*) FROM frames GROUP BY bus"
    """
    from tracelab import workflow

    with workflow.limits(memory, temp_dir):
        code = workflow.sql(dataset, query, fmt=fmt, out=out, timeout_s=timeout)
    if code:
        raise typer.Exit(code)


@app.command()
def signals(
    dataset: Path = typer.Argument(..., help="Dataset directory."),
    catalog: Path = typer.Option(..., "--catalog", help="Network catalog TOML with [[message.signal]] tables."),
    run: str | None = typer.Option(None, "--run", help="Only this run."),
    signal: list[str] | None = typer.Option(None, "--signal", help="Only this signal (NAME or MESSAGE.NAME); repeatable."),
    from_: str | None = typer.Option(None, "--from", help="Start of the time window, e.g. 4m."),
    to: str | None = typer.Option(None, "--to", help="End of the time window (exclusive)."),
    stuck: str | None = typer.Option(None, "--stuck", help="Flag signals without change for this long, e.g. 10s."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Decode the catalog's signals from the payloads; statistics, counter and checksum checks.

    \b
    Example:
      tracelab signals night.ds --catalog catalog.toml --stuck 10s
    """
    from tracelab import workflow

    with workflow.limits(memory, temp_dir):
        result = workflow.signals(dataset, catalog=catalog, run=run, names=signal, from_=from_,
                                  to=to, stuck=stuck)
    _print_json(result.as_json()) if as_json else _echo(result.describe())


@app.command()
def faults(
    dataset: Path = typer.Argument(..., help="Dataset directory."),
    catalog: Path = typer.Option(..., "--catalog", help="Network catalog TOML (who sends what)."),
    run: str | None = typer.Option(None, "--run", help="Only this run."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Replay error counters and name the node that degraded first, with the evidence.

    \b
    Example:
      tracelab faults night.ds --catalog catalog.toml
    """
    from tracelab import workflow

    with workflow.limits(memory, temp_dir):
        result = workflow.faults(dataset, catalog=catalog, run=run)
    for warning in (result.catalog_warning(), result.bit_rate_warning()):
        if warning:
            _echo(f"tracelab: warning: {warning}", err=True)
    _print_json(result.as_json()) if as_json else _echo(result.describe())


@app.command()
def report(
    dataset: Path = typer.Argument(..., help="Dataset directory."),
    output: Path = typer.Option(..., "-o", "--output", help="HTML file (or directory for many runs)."),
    catalog: Path | None = typer.Option(None, "--catalog", help="Network catalog TOML."),
    run: str | None = typer.Option(None, "--run", help="Only this run."),
    shared_plotly: bool = typer.Option(False, "--shared-plotly",
                                       help="Write plotly.js once beside the reports instead of embedding it."),
    load_limit: float = typer.Option(0.5, "--load-limit", help="Recommended maximum bus load (reference line)."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Write an interactive, self-contained HTML dashboard per run.

    \b
    Example:
      tracelab report night.ds -o night.html --catalog catalog.toml
    """
    from tracelab import workflow

    with workflow.limits(memory, temp_dir):
        paths = workflow.report(dataset, output, catalog=catalog, run=run,
                                shared_plotly=shared_plotly, load_limit=load_limit)
    for path in paths:
        _echo(f"report: {path}")


@app.command()
def compare(
    source: Path = typer.Argument(..., help="Dataset or fleet directory holding both runs."),
    run: list[str] = typer.Option(..., "--run", help="Give twice: the reference run A, then B."),
    output: Path | None = typer.Option(None, "-o", "--output", help="Write the comparison page."),
    as_json: bool = typer.Option(False, "--json", help="Print JSON."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Compare two runs of one network: per message, per bus, errors and verdicts.

    \b
    Example:
      tracelab compare fleet/ --run night-06 --run night-07 -o compare.html
    """
    from tracelab import workflow
    from tracelab.errors import UsageError

    if len(run) != 2:
        raise UsageError(f"--run: give exactly two runs (reference, then the one to review); "
                         f"got {len(run)}")
    with workflow.limits(memory, temp_dir):
        result = workflow.compare(source, run[0], run[1], output=output)
    _print_json(result.as_json()) if as_json else typer.echo(result.describe())
    if output is not None and not as_json:
        typer.echo(f"comparison: {output}")


@app.command()
def demo(
    output: Path = typer.Option(Path("demo_out"), "-o", "--output", help="Working directory."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bars."),
    memory: str | None = MEMORY_OPTION,
    temp_dir: Path | None = TEMP_DIR_OPTION,
) -> None:
    """Run the whole job on the bundled demo scenario and print the verdict and report path.

    \b
    Example:
      tracelab demo -o demo_out
    """
    from tracelab import workflow

    with workflow.limits(memory, temp_dir):
        _echo(workflow.demo(output, quiet=quiet))


@app.command()
def batch(
    root: Path = typer.Argument(..., help="Folder tree of frame logs."),
    output: Path = typer.Option(..., "-o", "--output", help="Fleet directory."),
    catalog: Path | None = typer.Option(None, "--catalog", help="Catalog for all logs (else catalog.toml nearest each log)."),
    executor: str = typer.Option("local", "--executor", help="local | dask"),
    scheduler: str | None = typer.Option(None, "--scheduler", help="Dask scheduler address."),
    workers: int | None = typer.Option(None, "--workers", help="Worker processes (default: cores)."),
    previous: int = typer.Option(5, "--previous", help="Runs per vehicle the regression flags compare with."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
) -> None:
    """Nightly fleet batch: ingest, analyse and report every run; fleet summary and index.

    \b
    Example:
      tracelab batch logs/ -o fleet --workers 2
    """
    from tracelab import workflow

    summary = workflow.batch(root, output, catalog=catalog, executor=executor,
                             scheduler=scheduler, workers=workers, previous=previous, quiet=quiet)
    _echo(summary.describe())
    if summary.failed:
        raise typer.Exit(3)


@app.command()
def capture(
    ifaces: list[str] = typer.Argument(..., help="SocketCAN interfaces, e.g. can0 can1."),
    output: Path = typer.Option(..., "-o", "--output", help="Log to write (NAME.frames[.gz|.zst])."),
    rotate: str | None = typer.Option(None, "--rotate", help="New part every interval (1h) or size (512MB, 1GiB)."),
    duration: str | None = typer.Option(None, "--duration", help="Stop after this long, e.g. 8h."),
    meta: list[str] = typer.Option([], "--meta", help="key=value for %meta (run=, vehicle= ...); repeat."),
    bus: list[str] = typer.Option([], "--bus", help="IFACE=ALIAS[,nominal=BPS][,data=BPS]; rates used when the system reports none."),
    node: str = typer.Option("logger", "--node", help="Node name of the logger's own controller in status records."),
    hardware_timestamps: bool = typer.Option(False, "--hardware-timestamps", help="Use the driver's hardware receive timestamps where it gives them."),
    reorder: str = typer.Option("100ms", "--reorder", help="Reorder window across interfaces."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No live status line."),
) -> None:
    """Record SocketCAN interfaces into a frame log (format v1) until Ctrl-C, SIGTERM or --duration.

    \b
    Example:
      tracelab capture can0 -o bench.frames.zst --duration 10m
    """
    from tracelab import workflow

    summary = workflow.capture(ifaces, output, rotate=rotate, duration=duration, meta=meta,
                               bus=bus, node=node, hardware_timestamps=hardware_timestamps,
                               reorder=reorder, quiet=quiet)
    _echo(summary.describe())


@app.command()
def convert(
    tables: list[Path] = typer.Argument(..., help="Delimited frame tables (CSV, TSV ...; .gz / .zst read too)."),
    output: Path = typer.Option(..., "-o", "--output", help="Log to write (.frames[.gz|.zst])."),
    bus: list[str] = typer.Option(..., "--bus", help="[VALUE=]ALIAS,nominal=BPS[,data=BPS]; repeat per bus."),
    columns: str = typer.Option(..., "--columns", help="time=COL,id=COL,data=COL[,ext=,dlc=,rtr=,fd=,brs=,esi=,bus=]; COL a header name or 1-based number."),
    time_unit: str = typer.Option("s", "--time-unit", help="Unit of the time column: s | ms | us | ns."),
    origin: str | None = typer.Option(None, "--origin", help="UTC of t=0, e.g. 2026-11-30T21:04:05Z."),
    delimiter: str = typer.Option(",", "--delimiter", help="Field delimiter (one character; 'tab' for TAB)."),
    id_base: int = typer.Option(16, "--id-base", help="Identifiers written in base 16 or 10."),
    no_header: bool = typer.Option(False, "--no-header", help="The first row is data (columns by number)."),
    meta: list[str] = typer.Option([], "--meta", help="key=value for %meta (e.g. run=, vehicle=); repeat."),
    strict: bool = typer.Option(False, "--strict", help="Stop at the first bad row (exit 3)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
) -> None:
    """Convert delimited frame tables into one frame log (format v1); every row is accounted for.

    \b
    Example:
      tracelab convert table.csv -o t.frames --bus P,nominal=500000 --columns time=1,id=2,data=3
    """
    from tracelab import workflow

    summary = workflow.convert(tables, output, bus=bus, columns=columns, time_unit=time_unit,
                               origin=origin, delimiter=delimiter, id_base=id_base,
                               header=not no_header, meta=meta, strict=strict, quiet=quiet)
    _echo(summary.describe())


def _usage_line(error: typer.TyperException) -> str:
    """A CLI-framework error (missing option, bad value, unknown option) as our one line."""
    ctx = getattr(error, "ctx", None)
    hint = f" (see '{ctx.command_path} --help')" if ctx is not None else ""
    return printable(f"tracelab: {error.format_message()}{hint}")


def main(argv: list[str] | None = None) -> int:
    """Entry point: one line and a documented exit code for every user error.

    The CLI framework runs without its own error handling (standalone_mode=False): its usage
    errors, our own errors and bugs all come here and become one line.
    """
    try:
        command = typer.main.get_command(app)
        code = command.main(args=argv, prog_name="tracelab", standalone_mode=False)
        return code if isinstance(code, int) else 0
    except typer.TyperException as error:  # the CLI framework's usage errors
        if type(error).__name__ == "NoArgsIsHelpError":  # bare `tracelab`: the help page
            typer.echo(error.format_message())
        else:
            typer.echo(_usage_line(error), err=True)
        return EXIT_USAGE
    except typer.Abort:
        typer.echo("tracelab: interrupted", err=True)
        return 130
    except SystemExit as stop:
        code = stop.code
        return code if isinstance(code, int) else (0 if code is None else EXIT_USAGE)
    except TracelabError as error:
        typer.echo(f"tracelab: {error}", err=True)
        return error.exit_code
    except KeyboardInterrupt:
        typer.echo("tracelab: interrupted", err=True)
        return 130
    except Exception as error:  # a bug: keep the one-line promise, traceback on request
        if os.environ.get("TRACELAB_DEBUG"):
            raise
        typer.echo(printable(f"tracelab: internal error: {type(error).__name__}: {error} ")
                   + "(set TRACELAB_DEBUG=1 for a traceback)", err=True)
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())


def console() -> None:
    """Console-script shim: exit with main()'s code."""
    sys.exit(main())
