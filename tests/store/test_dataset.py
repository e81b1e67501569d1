"""Dataset layout: manifest-listed parts only, atomic analyses, DuckDB views."""

from __future__ import annotations

from pathlib import Path

import polars as pl
import pytest

from tracelab.errors import UsageError
from tracelab.store import schema
from tracelab.store.dataset import create_or_open, open_dataset


def _manifest_row(sha: str, run: str) -> pl.DataFrame:
    row = {name: None for name in schema.MANIFEST}
    row.update(file=f"{run}.frames", sha256=sha, run=run, frames=1)
    return pl.DataFrame([row], schema=schema.MANIFEST)


def _stage(ds, run: str, t_ns: int) -> Path:
    folder = ds.new_staging_dir()
    for table in schema.TABLES:
        (folder / table).mkdir()
        frame = schema.empty(table)
        if table == "marks":
            frame = pl.DataFrame([{"run": run, "bus": "*", "t_ns": t_ns, "text": "x",
                                   "file": "f", "line": 2}], schema=schema.MARKS)
        frame.write_parquet(folder / table / "0.parquet")
    return folder


def test_open_dataset_refuses_a_plain_directory(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="not a tracelab dataset"):
        open_dataset(tmp_path)


def test_create_refuses_a_non_empty_foreign_directory(tmp_path: Path) -> None:
    (tmp_path / "notes.txt").write_text("x")
    with pytest.raises(UsageError, match="not a tracelab dataset"):
        create_or_open(tmp_path)


def test_views_see_only_committed_parts(tmp_path: Path) -> None:
    ds = create_or_open(tmp_path / "ds")
    sha_a, sha_b = "a" * 64, "b" * 64
    ds.commit({sha_a: _stage(ds, "run-a", 5)}, _manifest_row(sha_a, "run-a"))
    _stage(ds, "ghost", 9)  # staged but never committed: invisible
    con = ds.connect()
    assert con.execute("select run, t_ns from marks").fetchall() == [("run-a", 5)]
    assert con.execute("select count(*) from frames").fetchone() == (0,)
    assert con.execute("select count(*) from manifest").fetchone() == (1,)
    ds.commit({sha_b: _stage(ds, "run-b", 7)}, _manifest_row(sha_b, "run-b"))
    assert open_dataset(ds.path).runs() == ["run-a", "run-b"]
    got = ds.connect().execute("select run from marks order by run").fetchall()
    assert got == [("run-a",), ("run-b",)]


def test_commit_replaces_a_part_with_the_same_sha(tmp_path: Path) -> None:
    ds = create_or_open(tmp_path / "ds")
    sha = "c" * 64
    ds.commit({sha: _stage(ds, "r", 1)}, _manifest_row(sha, "r"))
    ds.commit({sha: _stage(ds, "r", 2)}, _manifest_row(sha, "r"))
    assert ds.manifest().height == 1
    assert ds.connect().execute("select t_ns from marks").fetchall() == [(2,)]
    ds.remove_leftovers()
    assert sorted(p.name for p in (ds.path / "parts").iterdir()) == ["c" * 16]


def test_empty_dataset_views_have_the_schema(tmp_path: Path) -> None:
    ds = create_or_open(tmp_path / "ds")
    con = ds.connect()
    cols = [row[0] for row in con.execute("describe frames").fetchall()]
    assert cols == list(schema.FRAMES)


def test_analyses_are_written_atomically_and_exposed_as_views(tmp_path: Path) -> None:
    ds = create_or_open(tmp_path / "ds")
    assert not ds.has_analysis("timing")
    ds.write_analysis("timing", pl.DataFrame({"id": [1, 2]}))
    ds.write_analysis_json("faults", {"results": []})
    assert ds.has_analysis("timing") and ds.has_analysis("faults")
    assert ds.read_analysis("timing")["id"].to_list() == [1, 2]
    assert ds.read_analysis_json("faults") == {"results": []}
    assert ds.read_analysis("load") is None
    assert ds.connect().execute("select sum(id) from timing").fetchone() == (3,)
    assert [p.name for p in (ds.path / "analyses").iterdir() if p.name.startswith(".")] == []
    with pytest.raises(UsageError):
        ds.write_analysis("../evil", pl.DataFrame({"a": [1]}))
