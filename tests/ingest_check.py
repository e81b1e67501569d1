"""Shared by the input-shell tests: ingest a produced log with ``--strict`` and read back what
the dataset's manifest counted (the store's own accounting, not the code under test)."""

from __future__ import annotations

from pathlib import Path

import polars as pl

from tracelab.cli import main


def ingest_strict(logs: list[Path], dataset: Path) -> pl.DataFrame:
    """Manifest rows after ``tracelab ingest --strict``; fails the test on any bad line."""
    code = main(["ingest", *map(str, logs), "-o", str(dataset), "--strict", "--quiet"])
    assert code == 0, f"ingest --strict refused {logs}"
    manifest = pl.read_parquet(dataset / "manifest.parquet")
    assert manifest["rejects"].sum() == 0
    return manifest
