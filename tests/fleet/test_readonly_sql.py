"""`tracelab sql FLEET` cannot change the fleet: not through COPY to its summary (bare or
under EXPLAIN ANALYZE), not through the engine, not with --out."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.fleet.conftest import Fleet
from tracelab.cli import main
from tracelab.query import open_session


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and not p.name.endswith(".lock")}


def test_a_fleet_is_read_only(small_fleet: Fleet, capsys: pytest.CaptureFixture[str]) -> None:
    fleet = small_fleet.fleet
    before = _snapshot(fleet)
    runs = fleet / "runs.parquet"
    frames = next((fleet / "data" / "frames").rglob("*.parquet"))
    for target in (runs, frames.with_name("extra-0123456789abcdef.parquet")):
        copy = f"COPY (SELECT 1 AS a) TO '{target}' (FORMAT parquet)"
        for text in (copy, f"EXPLAIN {copy}", f"EXPLAIN ANALYZE {copy}"):
            assert main(["sql", str(fleet), text]) == 3, text
    con = open_session(fleet)
    with pytest.raises(Exception, match="(?i)permission|disabled"):
        con.execute(f"COPY (SELECT 1 AS a) TO '{runs}' (FORMAT parquet)")
    assert main(["sql", str(fleet), "SELECT 1 AS a", "--format", "parquet",
                 "--out", str(runs)]) == 2
    assert "inside the dataset or fleet" in capsys.readouterr().err
    assert main(["sql", str(fleet), "SELECT count(*) AS n FROM runs"]) == 0
    assert _snapshot(fleet) == before
