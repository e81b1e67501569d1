"""`tracelab sql` really is read-only: every statement class DuckDB has, bare and wrapped in
EXPLAIN / EXPLAIN ANALYZE, is refused and leaves the dataset and the fleet byte-identical;
the engine itself refuses what a statement check might miss; Ctrl-C and --timeout stop a
query at once; piped refusals give exit 3; dot commands work as QUERY."""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.analyses.synth import make_dataset
from tracelab import workflow
from tracelab.cli import main
from tracelab.errors import QueryError
from tracelab.query import check_read_only, interactive, open_session, run_query, sql_command

CLI = "import sys; from tracelab.cli import main; sys.exit(main(sys.argv[1:]))"


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


@pytest.fixture(scope="module")
def dataset(tmp_path_factory: pytest.TempPathFactory) -> Path:
    ds = make_dataset(tmp_path_factory.mktemp("ro"))
    workflow.load(ds)
    return ds


def _statements(ds: Path) -> list[str]:
    """One statement of every class DuckDB's parser knows (StatementType, duckdb 2.0), each
    aimed at the dataset's own files where it can be."""
    manifest = ds / "manifest.parquet"
    analysis = ds / "analyses" / "load.parquet"
    return [
        # INSERT, UPDATE, DELETE, MERGE_INTO
        "INSERT INTO frames SELECT * FROM frames",
        "UPDATE frames SET id = 0",
        "DELETE FROM frames",
        "TRUNCATE frames",
        "MERGE INTO frames USING frames AS f ON (frames.id = f.id) WHEN MATCHED THEN DELETE",
        # CREATE, DROP, ALTER, CREATE_FUNC
        "CREATE TABLE t AS SELECT 1 AS a",
        "CREATE OR REPLACE VIEW frames AS SELECT 1 AS a",
        "CREATE MACRO m(a) AS a + 1",
        "CREATE SEQUENCE s",
        "CREATE SECRET (TYPE s3, KEY_ID 'k', SECRET 'v')",
        "DROP VIEW frames",
        "ALTER VIEW frames RENAME TO gone",
        "COMMENT ON VIEW frames IS 'x'",
        # COPY, COPY_DATABASE, EXPORT / IMPORT
        f"COPY (SELECT 42 AS a) TO '{manifest}' (FORMAT parquet)",
        f"COPY (SELECT 42 AS a) TO '{manifest}' (FORMAT parquet, USE_TMP_FILE false)",
        f"COPY (SELECT 1 AS a) TO '{analysis}' (FORMAT parquet)",
        f"COPY frames FROM '{manifest}'",
        "COPY FROM DATABASE memory TO memory",
        f"EXPORT DATABASE '{ds / 'exported'}'",
        f"IMPORT DATABASE '{ds}'",
        # ATTACH / DETACH / USE
        f"ATTACH '{ds / 'x.duckdb'}' AS x",
        "DETACH memory",
        "USE memory",
        # INSTALL / LOAD / extensions
        "INSTALL httpfs",
        "FORCE INSTALL httpfs",
        "LOAD httpfs",
        "UPDATE EXTENSIONS",
        # SET / RESET / PRAGMA / VARIABLE_SET / CALL
        "SET enable_external_access = true",
        "RESET allowed_paths",
        "SET VARIABLE v = 1",
        "PRAGMA enable_profiling",
        "CALL pragma_version()",
        # CHECKPOINT, VACUUM, ANALYZE
        "CHECKPOINT",
        "FORCE CHECKPOINT",
        "VACUUM",
        "ANALYZE",
        # TRANSACTION, PREPARE / EXECUTE
        "BEGIN TRANSACTION",
        "COMMIT",
        "PREPARE p AS SELECT 1",
        "EXECUTE p",
        "DEALLOCATE p",
        # a query hiding a writer behind it
        "SELECT 1; DROP VIEW frames",
    ]


def _wrapped(statement: str) -> list[str]:
    return [statement, f"EXPLAIN {statement}", f"EXPLAIN ANALYZE {statement}",
            f"EXPLAIN (FORMAT json) {statement}", f"/* hidden */ EXPLAIN ANALYZE {statement}"]


def test_every_statement_class_is_refused_and_nothing_changes(
        dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """Each bare statement through the command (exit 3, one line); all five wrappings of each
    through the same check and engine in one session (`sql_command` opens one per call, 0.14 s:
    the 225 forms through the command took 30 s of the suite)."""
    before = _snapshot(dataset)
    refused = 0
    for statement in _statements(dataset):
        code = main(["sql", str(dataset), statement])
        err = capsys.readouterr().err
        assert code == 3, (statement, err)
        assert len(err.strip().splitlines()) == 1, (statement, err)
        assert "read-only" in err or "Parser Error" in err, (statement, err)
    con = open_session(dataset)
    try:
        for statement in _statements(dataset):
            for text in _wrapped(statement):
                with pytest.raises(QueryError) as caught:
                    run_query(con, text)
                message = str(caught.value)
                # refused by the check, or not even parsed (EXPLAIN of a non-explainable kind)
                assert "read-only" in message or "Parser Error" in message, (text, message)
                refused += "read-only" in message
    finally:
        con.close()
    assert refused >= 3 * len(_statements(dataset))  # bare, EXPLAIN and EXPLAIN ANALYZE
    assert _snapshot(dataset) == before


def test_install_is_refused_under_its_own_name() -> None:
    with pytest.raises(QueryError, match="INSTALL statements"):
        check_read_only("INSTALL httpfs")
    with pytest.raises(QueryError, match="CHECKPOINT statements"):
        check_read_only("CHECKPOINT")
    with pytest.raises(QueryError, match="EXPLAIN of a COPY statement"):
        check_read_only("EXPLAIN ANALYZE COPY (SELECT 42 AS a) TO 'm.parquet' (FORMAT parquet)")


def test_queries_and_explained_queries_still_run(dataset: Path) -> None:
    con = open_session(dataset)
    for text in ("SELECT count(*) FROM frames", "FROM frames LIMIT 1", "DESCRIBE frames",
                 "SUMMARIZE SELECT id FROM frames", "WITH a AS (SELECT 1 AS x) SELECT * FROM a",
                 "EXPLAIN SELECT count(*) FROM frames",
                 "EXPLAIN ANALYZE SELECT count(*) FROM frames", "SHOW TABLES",
                 "SELECT count(*) FROM load"):
        assert run_query(con, text).height >= 1, text


def test_the_engine_refuses_writes_and_foreign_reads_on_its_own(dataset: Path,
                                                                tmp_path: Path) -> None:
    """Past the statement check (called directly), DuckDB's own settings hold."""
    con = open_session(dataset)
    before = _snapshot(dataset)
    outside = tmp_path / "secret.csv"
    outside.write_text("a\n1\n")
    for text in (f"COPY (SELECT 42 AS a) TO '{dataset / 'manifest.parquet'}' (FORMAT parquet)",
                 f"COPY (SELECT 42 AS a) TO '{dataset / 'parts' / 'new.parquet'}'",
                 f"SELECT * FROM read_csv('{outside}')", "SELECT * FROM read_text('/etc/passwd')",
                 f"ATTACH '{tmp_path / 'x.duckdb'}'", "SET enable_external_access = true",
                 "SET allowed_paths = ['/']", "INSTALL httpfs"):
        with pytest.raises(Exception, match="(?i)permission|disabled|locked|cannot"):
            con.execute(text).fetchall()
    assert _snapshot(dataset) == before


def test_out_inside_a_dataset_is_refused(dataset: Path,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    before = _snapshot(dataset)
    for target in (dataset / "manifest.parquet", dataset / "analyses" / "x.csv",
                   dataset / "parts" / "new" / "x.parquet"):
        assert main(["sql", str(dataset), "SELECT 42 AS a", "--format", "parquet",
                     "--out", str(target)]) == 2
        assert "inside the dataset" in capsys.readouterr().err
    assert _snapshot(dataset) == before


def test_piped_refusals_exit_3_and_dot_commands_work_as_query(
        dataset: Path, tmp_path: Path) -> None:
    out = io.StringIO()
    assert interactive(open_session(dataset), ["SELECT 1 AS a;", "DROP VIEW frames;"], out) == 3
    assert "error: read-only" in out.getvalue()
    assert interactive(open_session(dataset), ["SELECT 1 AS a;", ".tables"], out) == 0
    out = io.StringIO()
    assert sql_command(dataset, ".tables", stdout=out) == 0
    assert "frames" in out.getvalue().split() and "load" in out.getvalue().split()
    out = io.StringIO()
    sql_command(dataset, ".schema frames", stdout=out)
    assert "t_ns" in out.getvalue()
    with pytest.raises(QueryError):
        sql_command(dataset, ".schema nothere")
    proc = subprocess.run([sys.executable, "-c", CLI, "sql", str(dataset)], text=True,
                          input="SELECT 1 AS a;\nCOPY frames TO 'x.csv';\n",
                          capture_output=True, timeout=120)
    assert proc.returncode == 3, proc.stderr


LONG_QUERY = "SELECT count(*) FROM range(100000000000) a WHERE a.range % 7 = 3"


def test_timeout_stops_a_long_query(dataset: Path, capsys: pytest.CaptureFixture[str]) -> None:
    start = time.monotonic()
    assert main(["sql", str(dataset), LONG_QUERY, "--timeout", "0.5"]) == 3
    assert time.monotonic() - start < 15  # stopped, not run to the end (minutes)
    assert "--timeout 0.5 s" in capsys.readouterr().err


def _cpu_s(pid: int) -> float:
    """User + system CPU seconds of a process (Linux /proc)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def test_ctrl_c_interrupts_a_long_query_at_once(dataset: Path) -> None:
    proc = subprocess.Popen([sys.executable, "-c", CLI, "sql", str(dataset), LONG_QUERY],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    # wait until the query is under way: start-up costs about 1 s of CPU, the query burns more
    waited = time.monotonic()
    while _cpu_s(proc.pid) < 2.5 and time.monotonic() - waited < 60:
        assert proc.poll() is None
        time.sleep(0.1)
    sent = time.monotonic()
    os.kill(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert time.monotonic() - sent < 10  # not the 20 s or more DuckDB took on its own
    assert "Traceback" not in err
