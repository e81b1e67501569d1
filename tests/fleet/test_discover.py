"""Discovery: which files are logs, how parts group into runs, which catalog applies."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

from tests.fleet.synth import CATALOG, write_run
from tracelab.fleet import discover
from tracelab.fleet.discover import describe_log, find_logs, group_runs, nearest_catalog


def test_sha256_matches_coreutils(tmp_path: Path) -> None:
    log = write_run(tmp_path / "a.frames.gz", "r1", "v1", "2026-11-01T22:00:00Z", seconds=0.2)
    if shutil.which("sha256sum") is None:
        pytest.skip("sha256sum not installed")
    # source: GNU coreutils sha256sum (FIPS 180-4 SHA-256), an implementation outside tracelab
    expected = subprocess.run(["sha256sum", str(log)], capture_output=True, text=True,
                              check=True).stdout.split()[0]
    assert discover.file_sha256(log) == expected


def test_parts_group_by_run_and_origin(tmp_path: Path) -> None:
    root = tmp_path / "root"
    (root / "v1").mkdir(parents=True)
    (root / "catalog.toml").write_text(CATALOG)
    (root / "v1" / "catalog.toml").write_text(CATALOG + "\n# vehicle one\n")
    origin = "2026-11-01T22:00:00Z"
    write_run(root / "v1" / "part1.frames", "drive", "v1", origin, seconds=0.2)
    write_run(root / "v1" / "deep" / "part2.frames.zst", "drive", "v1", origin, seconds=0.2, seed=1)
    write_run(root / "v1" / "next.frames.gz", "drive", "v1", "2026-11-02T22:00:00Z", seconds=0.2)
    write_run(root / "v2" / "x.frames", "other", "v2", "2026-11-03T01:00:00Z", seconds=0.2)
    (root / "v2" / "notes.txt").write_text("not a log")
    (root / ".hidden").mkdir()
    write_run(root / ".hidden" / "y.frames", "hidden", "v2", origin, seconds=0.2)

    logs = [describe_log(p) for p in find_logs(root)]
    assert len(logs) == 4
    specs = group_runs(logs, root)
    by_run = {(s.run, s.origin): s for s in specs}
    drive = by_run[("drive", origin)]
    assert sorted(Path(f).name for f in drive.files) == ["part1.frames", "part2.frames.zst"]
    assert drive.vehicle == "v1" and drive.date == "2026-11-01"
    assert drive.catalog == str((root / "v1" / "catalog.toml").resolve())
    assert by_run[("drive", "2026-11-02T22:00:00Z")].files != drive.files
    other = by_run[("other", "2026-11-03T01:00:00Z")]
    assert other.catalog == str((root / "catalog.toml").resolve())  # nearest folder above
    assert other.partition == "vehicle=v2/date=2026-11-03"
    # the key follows content, not paths: a moved file keeps its key
    assert len({s.key for s in specs}) == 3


def test_key_changes_with_catalog_and_parts(tmp_path: Path) -> None:
    assert discover.run_key(["a", "b"], "c") == discover.run_key(["b", "a"], "c")
    assert discover.run_key(["a", "b"], "c") != discover.run_key(["a", "b"], "d")
    assert discover.run_key(["a", "b"], "c") != discover.run_key(["a"], "c")


def test_nearest_catalog_stops_at_root(tmp_path: Path) -> None:
    (tmp_path / "catalog.toml").write_text(CATALOG)
    root = tmp_path / "root"
    log = write_run(root / "a" / "b" / "x.frames", "r", "v", "2026-11-01T22:00:00Z", seconds=0.1)
    assert nearest_catalog(log, root) is None


def test_unchanged_file_is_not_rehashed(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    log = write_run(tmp_path / "a.frames", "r", "v", "2026-11-01T22:00:00Z", seconds=0.1)
    first = describe_log(log)
    monkeypatch.setattr(discover, "file_sha256", lambda path: pytest.fail("hashed again"))
    assert describe_log(log, {str(log): first}) is first


def test_unreadable_header_is_its_own_failed_run(tmp_path: Path) -> None:
    bad = tmp_path / "broken.frames"
    bad.write_text("%tracelab-frames 1\n%bus P nominal=fast\n")
    logs = [describe_log(bad)]
    assert logs[0].error and "broken.frames:2" in logs[0].error
    (spec,) = group_runs(logs, tmp_path)
    assert spec.error == logs[0].error and spec.run == "broken"


def test_parts_naming_two_vehicles_fail_the_run(tmp_path: Path) -> None:
    origin = "2026-11-01T22:00:00Z"
    write_run(tmp_path / "a.frames", "r", "v1", origin, seconds=0.1)
    write_run(tmp_path / "b.frames", "r", "v2", origin, seconds=0.1)
    (spec,) = group_runs([describe_log(p) for p in find_logs(tmp_path)], tmp_path)
    assert spec.error is not None and "different vehicles" in spec.error
