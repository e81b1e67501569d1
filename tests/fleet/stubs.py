"""Stand-ins for pipeline steps teammates have not landed yet (early tests only)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from tracelab.store.dataset import open_dataset


def timing(dataset: Path, catalog: Path | None = None, **_: Any) -> None:
    from tracelab.analyses.timing import timing as compute
    from tracelab.network.catalog import load_catalog

    ds = open_dataset(dataset)
    result = compute(ds.connect(), load_catalog(catalog) if catalog else None)
    ds.write_analysis("timing", result.timing)
    ds.write_analysis("gaps", result.gaps)


def load(dataset: Path, **_: Any) -> None:
    from tracelab.analyses.load import bus_load

    ds = open_dataset(dataset)
    result = bus_load(ds.connect())
    ds.write_analysis("load", result.windows)
    ds.write_analysis("load_summary", result.summary)


class _Faults:
    def as_json(self) -> dict[str, Any]:
        return {"results": []}


def faults(dataset: Path, catalog: Path, **_: Any) -> _Faults:
    open_dataset(dataset).write_analysis_json("faults", _Faults().as_json())
    return _Faults()


def report(dataset: Path, output: Path, **_: Any) -> list[Path]:
    output.write_text("<html><body>run report</body></html>", encoding="utf-8")
    return [output]


def broken_timing(dataset: Path, catalog: Path | None = None, **_: Any) -> None:
    raise RuntimeError("boom")
