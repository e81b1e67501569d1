"""Every ```sql block of docs/incident-review.md and README.md runs on a small dataset."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from tests.analyses.synth import make_dataset
from tracelab import workflow
from tracelab.query import open_session, run_query

ROOT = Path(__file__).resolve().parent.parent
SQL_BLOCK = re.compile(r"```sql\n(.*?)```", re.DOTALL)


def _blocks() -> list[tuple[str, str]]:
    out = []
    for doc in (ROOT / "docs" / "incident-review.md", ROOT / "README.md"):
        if doc.exists():
            out += [(f"{doc.name}#{i}", b) for i, b in enumerate(SQL_BLOCK.findall(doc.read_text()))]
    return out


@pytest.fixture(scope="module")
def session(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    ds = make_dataset(tmp_path_factory.mktemp("incident"))
    workflow.timing(ds)
    workflow.load(ds)
    con = open_session(ds)
    yield con
    con.close()


def test_there_are_incident_queries() -> None:
    assert len([n for n, _ in _blocks() if n.startswith("incident-review")]) >= 4


@pytest.mark.parametrize(("name", "query"), _blocks(), ids=[n for n, _ in _blocks()])
def test_incident_query_runs(session, name: str, query: str) -> None:  # type: ignore[no-untyped-def]
    result = run_query(session, query)
    assert result.width > 0 and result.height > 0, name  # the dataset has an answer to each
