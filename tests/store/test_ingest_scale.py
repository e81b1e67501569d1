"""Scale: memory stays bounded on a large log (slow; run with -m slow)."""

from __future__ import annotations

import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tracelab.store.dataset import open_dataset

BENCH = Path(__file__).resolve().parents[2] / "bench" / "ingest.py"


@pytest.mark.slow
def test_five_million_lines_ingest_under_one_gib(tmp_path: Path) -> None:
    spec = importlib.util.spec_from_file_location("bench_ingest", BENCH)
    assert spec and spec.loader
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    log = tmp_path / "big.frames"
    bench.generate(log, 5_000_000)
    proc = subprocess.Popen([sys.executable, "-m", "tracelab.cli", "ingest", str(log), "-o",
                             str(tmp_path / "ds"), "--quiet"], stdout=subprocess.DEVNULL)
    _, status, usage = os.wait4(proc.pid, 0)  # the child's own rusage, unlike proc.wait()
    proc.returncode = os.waitstatus_to_exitcode(status)
    assert proc.returncode == 0
    assert usage.ru_maxrss * 1024 < 2**30  # Linux reports ru_maxrss in KiB
    row = open_dataset(tmp_path / "ds").manifest().row(0, named=True)
    assert row["lines"] == 5_000_000 and row["rejects"] == 0
    assert row["errors"] == (5_000_000 - bench.HEADER_LINES) // bench.ERROR_EVERY
