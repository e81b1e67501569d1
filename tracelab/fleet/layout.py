"""Where things live in a fleet directory, and atomic file replacement.

    FLEET/fleet-manifest.parquet                  one row per log: sha256, run, status, reason
    FLEET/runs.parquet                            fleet summary, one row per run (view ``runs``)
    FLEET/regressions.parquet                     regression flags (view ``regressions``)
    FLEET/index.html                              fleet overview linking every run report
    FLEET/data/<table>/vehicle=V/date=D/<part>.parquet   per-run tables, hive-partitioned
    FLEET/reports/vehicle=V/date=D/<part>.html    per-run dashboards (+ <part>.faults.json)
    FLEET/records/<key>.json                      a finished run's summary row (retry shortcut)
    FLEET/.staging/                               work in progress; never read
    FLEET/.tracelab.lock                          one batch at a time (pid, host, command)

``<part>`` is ``<run>-<key16>``: the content key makes every per-run write idempotent.
"""

from __future__ import annotations

import json
import os
import re
from pathlib import Path
from typing import Any

from tracelab.store.dataset import replace_atomically

MANIFEST_FILE = "fleet-manifest.parquet"
RUNS_FILE = "runs.parquet"
REGRESSIONS_FILE = "regressions.parquet"
INDEX_FILE = "index.html"
DATA_DIR = "data"
REPORTS_DIR = "reports"
RECORDS_DIR = "records"
STAGING_DIR = ".staging"
LOCK_FILE = ".tracelab.lock"  # the store's write lock (store/lock.py), one batch at a time
LEGACY_LOCK_FILE = ".batch.lock"  # left by batches of older versions
_KEY16 = re.compile(r"^[0-9a-f]{16}$")


def write_json(target: Path, obj: Any) -> Path:
    text = json.dumps(obj, indent=2, sort_keys=True, default=str)
    return replace_atomically(target, lambda tmp: tmp.write_text(text, encoding="utf-8"))


def move_into_place(staged: Path, target: Path) -> None:
    """Rename a finished file into the fleet (same file system, so the rename is atomic)."""
    target.parent.mkdir(parents=True, exist_ok=True)
    os.replace(staged, target)


def is_fleet(path: str | Path) -> bool:
    return (Path(path) / MANIFEST_FILE).is_file()


def key_of_part(name: str) -> str | None:
    """The key16 of a ``<run>-<key16>[.ext...]`` file name, None for other files."""
    key = name.rsplit("-", 1)[-1].split(".", 1)[0]
    return key if _KEY16.match(key) and "-" in name else None
