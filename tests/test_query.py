"""`tracelab sql`: one-shot formats, read-only guard, one-line errors (exit 3), the prompt."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import polars as pl
import pytest

from tests.analyses.synth import make_dataset
from tracelab import workflow
from tracelab.cli import main
from tracelab.errors import EXIT_INPUT, QueryError, UsageError
from tracelab.query import interactive, open_session, run_query, sql_command


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    ds = make_dataset(tmp_path_factory.mktemp("q"))
    workflow.timing(ds)
    workflow.load(ds)
    return ds


def test_formats(dataset: Path, tmp_path: Path) -> None:
    query = "SELECT hex_id(id, ext) AS id, count(*) AS n FROM frames GROUP BY 1 ORDER BY 1"
    out = io.StringIO()
    sql_command(dataset, query, fmt="csv", stdout=out)
    rows = list(csv.reader(io.StringIO(out.getvalue())))
    assert rows == [["id", "n"], ["0C0", "394"], ["18FF0010", "40"], ["3A0", "40"]]
    out = io.StringIO()
    sql_command(dataset, query, fmt="json", stdout=out)
    assert json.loads(out.getvalue())[0] == {"id": "0C0", "n": 394}
    sql_command(dataset, query, fmt="parquet", out=tmp_path / "r.parquet")
    assert pl.read_parquet(tmp_path / "r.parquet")["n"].to_list() == [394, 40, 40]
    out = io.StringIO()
    sql_command(dataset, query, fmt="table", stdout=out)
    assert "18FF0010" in out.getvalue() and "(3 rows)" in out.getvalue()
    with pytest.raises(UsageError):
        sql_command(dataset, query, fmt="parquet")
    with pytest.raises(UsageError):
        sql_command(dataset, query, fmt="xml")


def test_analysis_views_and_macros(dataset: Path) -> None:
    con = open_session(dataset)
    gaps = run_query(con, "SELECT missing, in_loss FROM gaps ORDER BY from_ns")
    assert gaps.rows() == [(3, False), (3, True)]
    wall = run_query(con, "SELECT wall_time(run, 1500000000) AS w FROM manifest").item()
    assert str(wall) == "2026-03-01 08:00:01.500000"
    assert run_query(con, "SELECT bucket(-1, 10) AS b, secs(2500000000) AS s").row(0) == (-10, 2.5)


@pytest.mark.parametrize("statement", [
    "CREATE TABLE x AS SELECT 1", "COPY frames TO 'x.csv'", "DROP VIEW frames",
    "INSERT INTO frames SELECT * FROM frames", "ATTACH 'other.db'", "SET threads = 1",
    "SELECT 1; DELETE FROM frames", "PRAGMA version",
])
def test_refuses_statements_that_are_not_queries(dataset: Path, statement: str) -> None:
    con = open_session(dataset)
    with pytest.raises(QueryError, match="read-only"):
        run_query(con, statement)


def test_cannot_read_or_write_outside_the_dataset(dataset: Path) -> None:
    con = open_session(dataset)
    with pytest.raises(QueryError, match="Permission"):
        run_query(con, "SELECT * FROM read_csv('/etc/hostname')")
    manifest_before = (dataset / "manifest.parquet").read_bytes()
    assert run_query(con, "SELECT count(*) FROM frames").item() == 474
    assert (dataset / "manifest.parquet").read_bytes() == manifest_before


def test_sql_error_is_one_line_and_exit_3(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["sql", str(dataset), "SELECT nope FROM frames"])
    err = capsys.readouterr().err
    assert code == EXIT_INPUT
    assert err.count("\n") == 1 and "nope" in err and "Traceback" not in err


def test_interactive_prompt(dataset: Path) -> None:
    out = io.StringIO()
    con = open_session(dataset)
    interactive(con, [".tables", ".schema gaps", "SELECT count(*) AS n", "FROM frames;",
                      "SELECT nope;", ".schema nothing", ".quit", "SELECT 'not reached';"], out)
    text = out.getvalue()
    assert "timing" in text.splitlines() and "frames" in text.splitlines()
    assert "in_loss" in text and "474" in text
    assert "error: Binder Error" in text and "no view named 'nothing'" in text
    assert "not reached" not in text
