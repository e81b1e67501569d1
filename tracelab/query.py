"""Read-only, ad-hoc SQL over a dataset or a fleet: `tracelab sql`.

The session is an in-memory DuckDB with the dataset views (frames, errors, status, marks,
losses, rejects, manifest, one view per analysis output) and the macros of
analyses/sql/macros.sql. It is read-only twice over: only SELECT / EXPLAIN statements are
accepted, and DuckDB may read files only under the dataset directory (enable_external_access
off, allowed_directories, configuration locked), so nothing can write through it.
"""

from __future__ import annotations

import contextlib
import csv
import io
import json
import sys
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import TextIO

import duckdb
import polars as pl

from tracelab.analyses import install_macros
from tracelab.errors import QueryError, UsageError

FLEET_MANIFEST = "fleet-manifest.parquet"  # contract G: a fleet directory holds this file
FORMATS = ("table", "csv", "json", "parquet")
#: Statement kinds that only read.
READ_ONLY_TYPES = {duckdb.StatementType.SELECT, duckdb.StatementType.EXPLAIN}
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
    # the views name files by the path as given; a symlinked path is allowed both ways
    roots = sorted({str(p).rstrip("/") + "/" for p in (path.absolute(), path.resolve())})
    try:
        con.execute("SET allowed_directories = $dirs", {"dirs": roots})
        con.execute("SET enable_external_access = false")
        con.execute("SET lock_configuration = true")
    except duckdb.Error as error:  # never run unlocked
        raise QueryError(f"cannot make the session read-only: {one_line(error)}") from error
    return con


def check_read_only(sql: str) -> list[str]:
    """The statements of ``sql``; QueryError for an empty text or any statement that is not
    a query (CREATE, COPY, INSERT, ATTACH, SET, PRAGMA ...)."""
    try:
        parsed = duckdb.extract_statements(sql)
    except duckdb.Error as error:
        raise QueryError(one_line(error)) from error
    if not parsed:
        raise QueryError("empty query")
    for statement in parsed:
        if statement.type not in READ_ONLY_TYPES:
            kind = statement.type.name
            raise QueryError(f"read-only: {kind} statements are not allowed here "
                             "(only SELECT / EXPLAIN; the dataset cannot be changed)")
    return [s.query for s in parsed]


def run_query(con: duckdb.DuckDBPyConnection, sql: str) -> pl.DataFrame:
    """Run read-only SQL (one or more statements) and return the last result."""
    result: pl.DataFrame | None = None
    for text in check_read_only(sql):
        try:
            relation = con.sql(text)
            result = relation.pl() if relation is not None else None
        except duckdb.Error as error:
            raise QueryError(one_line(error)) from error
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
        try:
            frame.write_parquet(out)
        except OSError as error:
            raise UsageError(f"{out}: cannot write ({error})") from error
        return
    text = {"table": lambda f: format_table(f) + "\n", "csv": format_csv,
            "json": format_json}[fmt](frame)
    if out is None:
        stdout.write(text)
        return
    try:
        Path(out).write_text(text, encoding="utf-8")
    except OSError as error:
        raise UsageError(f"{out}: cannot write ({error})") from error


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
                stdout: TextIO | None = None) -> int:
    """The prompt: statements end with ';', dot commands on their own line. ``lines`` feeds
    input (tests, pipes); otherwise input() with history. Errors print and the prompt goes on."""
    stdout = stdout or sys.stdout
    save_history: Callable[[], None] = lambda: None  # noqa: E731
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
                stdout.write(format_table(run_query(con, text)) + "\n")
            except (QueryError, UsageError) as error:
                stdout.write(f"error: {error}\n")
    finally:
        save_history()
    return 0


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
                lines: Iterable[str] | None = None, stdout: TextIO | None = None) -> None:
    """`tracelab sql`: one query to stdout / --out, or the interactive prompt without one."""
    if fmt not in FORMATS:
        raise UsageError(f"--format {fmt!r} is not one of {', '.join(FORMATS)}")
    con = open_session(path)
    try:
        if query is None:
            interactive(con, lines, stdout)
            return
        write_result(run_query(con, query), fmt, out, stdout)
    finally:
        con.close()


__all__ = ["open_session", "run_query", "check_read_only", "write_result", "interactive",
           "sql_command", "one_line", "FORMATS"]
