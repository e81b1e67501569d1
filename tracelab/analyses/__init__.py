"""analyses layer: pure functions over the dataset's DuckDB views.

The SQL lives beside the code in ``analyses/sql/*.sql`` (the same SQL `tracelab sql` users can
read); ``run_sql`` executes one named file, statement by statement, with named parameters.
"""

from __future__ import annotations

import re
from functools import cache
from importlib import resources
from typing import Any

import duckdb
import polars as pl

from tracelab.errors import QueryError
from tracelab.format.grammar import id_text

_PARAM_RE = re.compile(r"\$([A-Za-z_][A-Za-z0-9_]*)")


@cache
def sql_text(name: str) -> str:
    """The text of ``analyses/sql/<name>.sql``."""
    return resources.files("tracelab.analyses").joinpath("sql", f"{name}.sql").read_text("utf-8")


def statements(name: str) -> list[str]:
    """The statements of one SQL file, in order."""
    return [s.query for s in duckdb.extract_statements(sql_text(name))]


def run_sql(con: duckdb.DuckDBPyConnection, name: str,
            params: dict[str, Any] | None = None) -> duckdb.DuckDBPyRelation | None:
    """Execute every statement of ``sql/<name>.sql``; each gets the parameters it names.

    Returns the relation of the last statement when it is a query (else None).
    """
    params = params or {}
    relation = None
    for text in statements(name):
        code = "\n".join(line for line in text.splitlines()
                         if not line.lstrip().startswith("--"))
        wanted = {p: params[p] for p in set(_PARAM_RE.findall(code)) if p in params}
        try:
            relation = con.sql(text, params=wanted or None)
        except duckdb.Error as error:
            raise QueryError(f"analyses/sql/{name}.sql: {error}".splitlines()[0]) from error
    return relation


def run_sql_frame(con: duckdb.DuckDBPyConnection, name: str,
                  params: dict[str, Any] | None = None) -> pl.DataFrame:
    """Run ``sql/<name>.sql`` and return the result of its final query as a polars frame."""
    relation = run_sql(con, name, params)
    if relation is None:
        raise QueryError(f"analyses/sql/{name}.sql: does not end with a query")
    try:
        return relation.pl()
    except duckdb.Error as error:
        raise QueryError(f"analyses/sql/{name}.sql: {error}".splitlines()[0]) from error


def install_macros(con: duckdb.DuckDBPyConnection) -> None:
    """Create the documented macros (sql/macros.sql) as temporary macros on ``con``."""
    run_sql(con, "macros")


def query_frame(con: duckdb.DuckDBPyConnection, sql: str,
                params: dict[str, Any] | None = None) -> pl.DataFrame:
    """Run one statement and return its result as a polars frame."""
    return con.sql(sql, params=params or None).pl()


def query_scalar(con: duckdb.DuckDBPyConnection, sql: str,
                 params: dict[str, Any] | None = None) -> Any:
    """The first column of the first row of one query (None when it returns no rows)."""
    rows = con.sql(sql, params=params or None).fetchall()
    return rows[0][0] if rows else None


def text_table(frame: pl.DataFrame, max_rows: int = 200) -> str:
    """A plain readable table for describe() output (markdown-like, no dtypes)."""
    with pl.Config(tbl_rows=max_rows, tbl_cols=-1, tbl_width_chars=1000,
                   tbl_formatting="ASCII_MARKDOWN", tbl_hide_column_data_types=True,
                   tbl_hide_dataframe_shape=True, fmt_str_lengths=40):
        text = str(frame)
    if frame.height > max_rows:
        text += f"\n... {frame.height - max_rows} more rows (see the parquet output)"
    return text


def hex_id_expr() -> pl.Expr:
    """The identifier as the frame log writes it (3 or 8 hex digits); for describe() tables
    (one row per message, so the per-row formatting is cheap)."""
    def digits(ext: bool) -> pl.Expr:
        return pl.col("id").cast(pl.Int64).map_elements(lambda v: id_text(v, ext),
                                                         return_dtype=pl.String)

    return pl.when(pl.col("ext")).then(digits(True)).otherwise(digits(False))
