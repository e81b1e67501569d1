"""Read-only, ad-hoc SQL over a dataset or a fleet: `tracelab sql`.

The session is an in-memory DuckDB with the dataset views (frames, errors, status, marks,
losses, rejects, manifest, one view per analysis output) and the macros of
analyses/sql/macros.sql. It is read-only twice over: only queries are accepted (SELECT and
its forms; EXPLAIN and EXPLAIN ANALYZE of a query), and the engine itself may open only the
files the views read (``allowed_paths``), plus its spill folder (``allowed_directories``),
with ``enable_external_access`` off and the configuration locked, so even a statement the
check let through could neither write nor read anything else. ``--out`` never points into a
dataset or a fleet. A query runs in a worker thread, so Ctrl-C and ``--timeout`` interrupt
it at once (``connection.interrupt()``).
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import os
import re
import stat
import sys
import threading
import time
import uuid
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TextIO

import duckdb
import polars as pl

from tracelab.analyses import install_macros
from tracelab.errors import EXIT_INPUT, QueryError, UsageError

FLEET_MANIFEST = "fleet-manifest.parquet"  # contract G: a fleet directory holds this file
FORMATS = ("table", "csv", "json", "parquet")
#: Statement kinds that only read (EXPLAIN only when what it explains is a query).
READ_ONLY_TYPES = {duckdb.StatementType.SELECT, duckdb.StatementType.EXPLAIN}
#: EXPLAIN [ANALYZE] [(options)] [ANALYZE] <statement>: what is explained.
_EXPLAINED = re.compile(
    r"^\s*EXPLAIN\b\s*(?:ANALY[SZ]E\b\s*)?(?:\((?:[^()]|\([^()]*\))*\)\s*)?"
    r"(?:ANALY[SZ]E\b\s*)?(?P<inner>.*)$", re.IGNORECASE | re.DOTALL)
_COMMENTS = re.compile(r"^(?:\s+|--[^\n]*(?:\n|$)|/\*.*?\*/)*", re.DOTALL)
#: Files of a dataset or fleet the session never reads (work in progress, the lock).
_NOT_READ = (".staging", ".tracelab.lock", ".batch.lock", ".tmp")
TABLE_MAX_ROWS = 1000
HISTORY_FILE = Path("~/.tracelab_sql_history")
PROMPT, CONTINUATION = "sql> ", "...> "
HELP = """.tables          list the views
.schema NAME     columns of a view
.help            this text
.quit            leave (also .exit or Ctrl-D)
End a statement with ';' (it may span lines)."""


def one_line(error: BaseException) -> str:
    """DuckDB's message on one line: its first paragraph (drops the LINE 1: ^ excerpt)."""
    text = str(error).strip().split("\n\n")[0]
    return " ".join(part.strip() for part in text.splitlines() if part.strip())


def open_session(path: str | Path) -> duckdb.DuckDBPyConnection:
    """DuckDB over a dataset (or a fleet directory), with the macros, locked read-only."""
    path = Path(path)
    if (path / FLEET_MANIFEST).is_file():
        from tracelab.fleet.views import connect_fleet

        con = connect_fleet(path)
    else:
        from tracelab.store.dataset import open_dataset

        con = open_dataset(path).connect()
    install_macros(con)
    from tracelab.store.limits import current_limits

    scratch = current_limits().scratch(path)
    dirs = sorted({str(p).rstrip("/") + "/" for p in (scratch.absolute(), scratch.resolve())})
    try:
        con.execute("SET allowed_paths = $paths", {"paths": readable_files(path)})
        con.execute("SET allowed_directories = $dirs", {"dirs": dirs})  # spilling only
        con.execute("SET enable_external_access = false")
        con.execute("SET lock_configuration = true")
    except duckdb.Error as error:  # never run unlocked
        raise QueryError(f"cannot make the session read-only: {one_line(error)}") from error
    return con


def readable_files(path: Path) -> list[str]:
    """Every file of the dataset or fleet at ``path``, as the engine may be asked for it: as
    given, absolute, resolved, and glob-escaped (the views escape ``[ * ?``)."""
    from tracelab.store.dataset import glob_escape

    found: set[str] = set()
    for folder, dirs, files in os.walk(path):
        dirs[:] = [d for d in dirs if d not in _NOT_READ]
        for name in files:
            if name in _NOT_READ or name.endswith(".tmp"):
                continue
            file = Path(folder) / name
            for form in {file.absolute(), file.resolve()}:
                found.update((str(form), glob_escape(form)))
    return sorted(found)


def _statement_word(text: str) -> str:
    """The statement's first keyword, as the user wrote it: INSTALL, not LOAD."""
    match = re.match(r"[A-Za-z_]+", _COMMENTS.sub("", text, count=1))
    return match.group(0).upper() if match else "this"


def _refuse(text: str) -> QueryError:
    return QueryError(f"read-only: {_statement_word(text)} statements are not allowed here "
                      "(only queries: SELECT, FROM, WITH, DESCRIBE, EXPLAIN [ANALYZE] of a "
                      "query; the dataset cannot be changed)")


def _parse(sql: str) -> list[duckdb.Statement]:
    try:
        return duckdb.extract_statements(sql)
    except duckdb.Error as error:
        raise QueryError(one_line(error)) from error
    except ValueError as error:  # a statement kind this duckdb's Python API cannot name
        raise _refuse(sql) from error


def _kind(statement: duckdb.Statement) -> duckdb.StatementType | None:
    try:
        return statement.type
    except ValueError:  # a kind this duckdb's Python API cannot name (UPDATE EXTENSIONS)
        return None


def _check_statement(statement: duckdb.Statement) -> None:
    kind = _kind(statement)
    if kind == duckdb.StatementType.SELECT:
        return
    if kind != duckdb.StatementType.EXPLAIN:
        raise _refuse(statement.query)
    # EXPLAIN ANALYZE runs what it explains: only a query may be explained
    match = _EXPLAINED.match(_COMMENTS.sub("", statement.query, count=1))
    inner = _parse(match.group("inner")) if match and match.group("inner").strip() else []
    if len(inner) != 1 or _kind(inner[0]) != duckdb.StatementType.SELECT:
        word = _statement_word(match.group("inner")) if match else "this"
        raise QueryError(f"read-only: EXPLAIN of a {word} statement is not allowed here "
                         "(EXPLAIN [ANALYZE] only of a query)")


def check_read_only(sql: str) -> list[str]:
    """The statements of ``sql``; QueryError for an empty text or any statement that is not
    a query (CREATE, COPY, INSERT, ATTACH, SET, PRAGMA, INSTALL, EXPLAIN ANALYZE COPY ...)."""
    parsed = _parse(sql)
    if not parsed:
        raise QueryError("empty query")
    for statement in parsed:
        _check_statement(statement)
    return [s.query for s in parsed]


def _execute(con: duckdb.DuckDBPyConnection, text: str,
             timeout_s: float | None) -> pl.DataFrame | None:
    """Run one statement in a worker thread: the main thread stays free to take Ctrl-C
    (then ``con.interrupt()`` stops DuckDB at once, KeyboardInterrupt goes on: exit 130) and
    to stop the query after ``timeout_s``."""
    outcome: dict[str, object] = {}
    done = threading.Event()  # not join()/is_alive(): a join cut by Ctrl-C can report a
    # running thread as finished (CPython 3.11), and closing a busy connection then fails

    def work() -> None:
        try:
            relation = con.sql(text)
            outcome["frame"] = relation.pl() if relation is not None else None
        except BaseException as error:  # noqa: BLE001 - handed to the main thread
            outcome["error"] = error
        finally:
            done.set()

    worker = threading.Thread(target=work, name="tracelab-sql", daemon=True)
    deadline = None if timeout_s is None else time.monotonic() + timeout_s
    timed_out = False
    worker.start()
    try:
        while not done.wait(0.05):
            if deadline is not None and not timed_out and time.monotonic() > deadline:
                timed_out = True
                con.interrupt()
    except KeyboardInterrupt:
        # again until it takes: an interrupt that comes before DuckDB starts executing is lost
        give_up = time.monotonic() + 10.0
        while not done.is_set() and time.monotonic() < give_up:
            con.interrupt()
            done.wait(0.05)
        raise
    error = outcome.get("error")
    if timed_out and error is not None:
        raise QueryError(f"query stopped after --timeout {timeout_s:g} s") from None
    if isinstance(error, duckdb.Error):
        raise QueryError(one_line(error)) from error
    if isinstance(error, BaseException):
        raise error
    frame = outcome.get("frame")
    return frame if isinstance(frame, pl.DataFrame) else None


def run_query(con: duckdb.DuckDBPyConnection, sql: str,
              timeout_s: float | None = None) -> pl.DataFrame:
    """Run read-only SQL (one or more statements) and return the last result; every
    statement is checked before the first one runs."""
    result: pl.DataFrame | None = None
    for text in check_read_only(sql):
        result = _execute(con, text, timeout_s)
    return result if result is not None else pl.DataFrame()


def _plain(frame: pl.DataFrame) -> pl.DataFrame:
    """Binary as hex and nested values as JSON text, for CSV / JSON / table output."""
    exprs = []
    for name, dtype in frame.schema.items():
        if dtype == pl.Binary:
            exprs.append(pl.col(name).bin.encode("hex").str.to_uppercase())
        elif isinstance(dtype, pl.List | pl.Struct | pl.Array):
            exprs.append(pl.col(name).map_elements(
                lambda v: json.dumps(v.to_list() if isinstance(v, pl.Series) else v, default=str),
                return_dtype=pl.String))
        else:
            exprs.append(pl.col(name))
    return frame.select(exprs) if exprs else frame


def format_table(frame: pl.DataFrame, max_rows: int = TABLE_MAX_ROWS) -> str:
    """A readable text table (all columns, up to max_rows rows)."""
    shown = _plain(frame.head(max_rows))
    with pl.Config(tbl_rows=max_rows, tbl_cols=-1, tbl_width_chars=10_000,
                   fmt_str_lengths=80, tbl_hide_dataframe_shape=True,
                   tbl_hide_column_data_types=False):
        text = str(shown)
    note = f"({frame.height} rows"
    if frame.height > max_rows:
        note += f", first {max_rows} shown; use --format csv --out FILE for all"
    return f"{text}\n{note})"


def format_csv(frame: pl.DataFrame) -> str:
    buffer = io.StringIO()
    plain = _plain(frame)
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(plain.columns)
    writer.writerows(plain.iter_rows())
    return buffer.getvalue()


def format_json(frame: pl.DataFrame) -> str:
    return json.dumps(_plain(frame).to_dicts(), indent=2, default=str) + "\n"


def write_result(frame: pl.DataFrame, fmt: str, out: Path | None,
                 stdout: TextIO | None = None) -> None:
    """Print or write ``frame`` as table | csv | json | parquet (parquet needs ``out``)."""
    stdout = stdout or sys.stdout
    if fmt not in FORMATS:
        raise UsageError(f"--format {fmt!r} is not one of {', '.join(FORMATS)}")
    if fmt == "parquet":
        if out is None:
            raise UsageError("--format parquet needs --out FILE")
        _write_out(Path(out), lambda handle: frame.write_parquet(handle))
        return
    text = {"table": lambda f: format_table(f) + "\n", "csv": format_csv,
            "json": format_json}[fmt](frame)
    if out is None:
        stdout.write(text)
        return
    _write_out(Path(out), lambda handle: handle.write(text.encode("utf-8")))


def check_out(out: Path, source: Path) -> Path:
    """Refuse an ``--out`` inside a dataset or a fleet (it would become part of what the
    views read, or replace its manifest); create missing parent folders (exit 2 when that
    is impossible)."""
    from tracelab.store.dataset import is_dataset, make_output_parent

    target = out.absolute()
    for folder in (target.parent, *target.parent.parents):
        for form in {folder, folder.resolve()}:
            if is_dataset(form) or (form / FLEET_MANIFEST).is_file():
                raise UsageError(f"--out {out}: inside the dataset or fleet {form}; write "
                                 "results elsewhere (it is read-only here)")
    if not stat.S_ISREG(_mode(target)) and target.exists():
        return out  # a device or pipe (/dev/stdout, a FIFO): written as it is
    return make_output_parent(out, "--out")


def _mode(path: Path) -> int:
    try:
        return path.stat().st_mode
    except OSError:
        return stat.S_IFREG


def _write_out(out: Path, write: Callable[[io.BufferedWriter], object]) -> None:
    """Write ``out`` through a temporary sibling renamed into place: a failing write leaves
    no empty or partial file; a device or pipe is written directly."""
    from tracelab.store.dataset import storage_error

    direct = out.exists() and not stat.S_ISREG(_mode(out))
    tmp = out if direct else out.with_name(f".{out.name}.{uuid.uuid4().hex}.tmp")
    try:
        with open(tmp, "wb") as handle:
            write(handle)
        if not direct:
            os.replace(tmp, out)
    except (OSError, pl.exceptions.PolarsError) as error:
        from tracelab.store.dataset import os_reason

        if isinstance(error, OSError) or os_reason(error, out.parent) is not None:
            raise storage_error(out, error) from error
        raise QueryError(f"{out}: cannot write the result ({one_line(error)})") from error
    finally:
        if not direct:
            with contextlib.suppress(OSError):
                tmp.unlink(missing_ok=True)


def list_tables(con: duckdb.DuckDBPyConnection) -> list[str]:
    rows = con.sql("SELECT view_name FROM duckdb_views() WHERE NOT internal "
                   "UNION SELECT table_name FROM duckdb_tables() ORDER BY 1").fetchall()
    return [r[0] for r in rows if not str(r[0]).startswith(("_", "tl_"))]


def describe_view(con: duckdb.DuckDBPyConnection, name: str) -> pl.DataFrame:
    names = list_tables(con)
    if name not in names:
        from tracelab.errors import did_you_mean

        raise QueryError(f"no view named {name!r}{did_you_mean(name, names)}")
    frame = con.sql(f'DESCRIBE "{name}"').pl()
    return frame.select("column_name", "column_type", "null")


def statement_complete(buffer: str) -> bool:
    """True when the buffered text ends with ';' outside quotes and comments."""
    text = buffer.rstrip()
    if not text.endswith(";"):
        return False
    try:
        duckdb.extract_statements(text)
    except duckdb.Error:
        return not _open_quote(text)
    return True


def _open_quote(text: str) -> bool:
    quote = None
    for char in text:  # loop over one typed statement, not over frames
        if quote:
            if char == quote:
                quote = None
        elif char in "'\"":
            quote = char
    return quote is not None


def _setup_history() -> Callable[[], None]:
    """Line editing and a persistent history file when readline is available."""
    try:
        import readline
    except ImportError:  # e.g. Windows without pyreadline: no history, still usable
        return lambda: None
    path = HISTORY_FILE.expanduser()
    with contextlib.suppress(OSError):
        readline.read_history_file(path)
    readline.set_history_length(1000)

    def save() -> None:
        with contextlib.suppress(OSError):
            readline.write_history_file(path)

    return save


def interactive(con: duckdb.DuckDBPyConnection, lines: Iterable[str] | None = None,
                stdout: TextIO | None = None, timeout_s: float | None = None) -> int:
    """The prompt: statements end with ';', dot commands on their own line. ``lines`` feeds
    input (tests, pipes); otherwise input() with history. Errors print and the prompt goes on;
    with piped input (no person to see them) any refused or failing statement makes the
    return value 3, so a script notices."""
    stdout = stdout or sys.stdout
    save_history: Callable[[], None] = lambda: None  # noqa: E731
    piped = lines is not None or not sys.stdin.isatty()
    failed = False
    if lines is None and not sys.stdin.isatty():  # piped statements: no prompts
        source: Iterable[str] = sys.stdin
    elif lines is None:
        save_history = _setup_history()
        stdout.write("tracelab sql (read-only). .tables lists the views, .help the commands, "
                     "end statements with ';'.\n")
        source = _prompted_lines()
    else:
        source = iter(lines)
    buffer = ""
    try:
        for raw in source:
            line = raw.rstrip("\n")
            if not buffer and line.strip().startswith("."):
                if not _dot_command(con, line.strip(), stdout):
                    break
                continue
            buffer += line + "\n"
            if not statement_complete(buffer):
                _PROMPT_STATE["continued"] = bool(buffer.strip())
                continue
            _PROMPT_STATE["continued"] = False
            text, buffer = buffer, ""
            try:
                stdout.write(format_table(run_query(con, text, timeout_s)) + "\n")
            except (QueryError, UsageError) as error:
                stdout.write(f"error: {error}\n")
                failed = True
            except KeyboardInterrupt:
                if piped:  # a script: stop it (exit 130)
                    raise
                stdout.write("interrupted\n")  # at the prompt: the query stops, the prompt stays
    finally:
        save_history()
    return EXIT_INPUT if failed and piped else 0


_PROMPT_STATE = {"continued": False}


def _prompted_lines() -> Iterable[str]:
    while True:
        try:
            yield input(CONTINUATION if _PROMPT_STATE["continued"] else PROMPT)
        except EOFError:
            return
        except KeyboardInterrupt:  # Ctrl-C drops the statement being typed
            _PROMPT_STATE["continued"] = False
            print()
            yield ";"


def _dot_command(con: duckdb.DuckDBPyConnection, line: str, stdout: TextIO) -> bool:
    """Handle one dot command; False means quit."""
    word, _, rest = line.partition(" ")
    if word in (".quit", ".exit", ".q"):
        return False
    if word == ".tables":
        stdout.write("\n".join(list_tables(con)) + "\n")
    elif word == ".schema":
        name = rest.strip().strip(";").strip('"')
        if not name:
            stdout.write("usage: .schema NAME\n")
        else:
            try:
                stdout.write(format_table(describe_view(con, name)) + "\n")
            except QueryError as error:
                stdout.write(f"error: {error}\n")
    elif word == ".help":
        stdout.write(HELP + "\n")
    else:
        stdout.write(f"unknown command {word}; try .help\n")
    return True


def sql_command(path: Path, query: str | None, fmt: str = "table", out: Path | None = None,
                lines: Iterable[str] | None = None, stdout: TextIO | None = None,
                timeout_s: float | None = None) -> int:
    """`tracelab sql`: one query to stdout / --out, or the interactive prompt without one.
    Returns the exit code (3 when piped statements were refused or failed)."""
    if fmt not in FORMATS:
        raise UsageError(f"--format {fmt!r} is not one of {', '.join(FORMATS)}")
    if timeout_s is not None and timeout_s <= 0:
        raise UsageError(f"--timeout must be more than 0 seconds, not {timeout_s:g}")
    if out is not None:
        out = check_out(Path(out), Path(path))
    con = open_session(path)
    try:
        if query is None:
            return interactive(con, lines, stdout, timeout_s)
        if query.strip().startswith("."):  # a dot command, as at the prompt
            buffer = io.StringIO()
            _dot_command(con, query.strip(), buffer)
            text = buffer.getvalue()
            if text.startswith(("error:", "unknown command", "usage:")):
                raise QueryError(text.strip().removeprefix("error: "))
            if out is not None:
                _write_out(out, lambda handle: handle.write(text.encode("utf-8")))
            else:
                (stdout or sys.stdout).write(text)
            return 0
        write_result(run_query(con, query, timeout_s), fmt, out, stdout)
        return 0
    finally:
        con.close()


__all__ = ["open_session", "run_query", "check_read_only", "write_result", "interactive",
           "sql_command", "one_line", "FORMATS"]
