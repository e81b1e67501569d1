"""The dataset under disk faults and odd paths: one line naming the path and the OS reason
(exit 5), damaged files named or recomputed, glob characters taken literally, the same log
in another compression recognised, output folders made or refused by one rule."""

from __future__ import annotations

import errno
import gzip
import os
from pathlib import Path

import polars as pl
import pytest

from tracelab import workflow
from tracelab.cli import main
from tracelab.errors import EXIT_STORAGE, StorageError
from tracelab.store import dataset as dataset_module
from tracelab.store import ingest as ingest_module
from tracelab.store.dataset import open_dataset, os_reason
from tracelab.store.ingest import ingest_logs

HEADER = "%tracelab-frames 1\n%bus P nominal=500000 stamp=end\n"


def _log(path: Path, run: str, frames: int = 50, start_ns: int = 0, text: str = "") -> Path:
    body = "".join(f"{start_ns + i * 10_000_000}\tP\tframe\t1{i % 3}0\ts\t2\tAABB\n"
                   for i in range(frames))
    content = f"{HEADER}%meta run={run}\n{text}{body}"
    if path.suffix == ".gz":
        path.write_bytes(gzip.compress(content.encode(), mtime=0))
    else:
        path.write_text(content)
    return path


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file() and p.name != ".tracelab.lock"}


def _one_line(err: str) -> str:
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    return lines[0]


# --- write failures: one line, path and OS reason, exit 5 -------------------------------


@pytest.mark.parametrize(("raised", "reason"), [
    # how polars reports a full disk (seen with /dev/full)
    (pl.exceptions.ComputeError("parquet: File out of specification: underlying IO error: "
                                "No space left on device (os error 28)"),
     "No space left on device"),
    (OSError(errno.EROFS, "Read-only file system"), "Read-only file system"),
    (PermissionError(errno.EACCES, "Permission denied"), "Permission denied"),
])
def test_a_failing_part_write_names_the_path_and_the_reason(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str],
        raised: Exception, reason: str) -> None:
    dataset = tmp_path / "ds"
    assert main(["ingest", str(_log(tmp_path / "a.frames", "a")), "-o", str(dataset), "-q"]) == 0
    before = _snapshot(dataset)

    def fail(self: object, frame: object, path: Path) -> None:
        raise raised

    monkeypatch.setattr(ingest_module._PartWriter, "_write_frames", fail)
    capsys.readouterr()
    code = main(["ingest", str(_log(tmp_path / "b.frames", "b")), "-o", str(dataset), "-q"])
    line = _one_line(capsys.readouterr().err)
    assert code == EXIT_STORAGE == 5
    assert str(dataset / "parts") in line and "frames/0.parquet" in line
    assert line.endswith(f"({reason})")
    assert _snapshot(dataset) == before


def test_a_failing_analysis_write_is_exit_5(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                            capsys: pytest.CaptureFixture[str]) -> None:
    dataset = tmp_path / "ds"
    ingest_logs([_log(tmp_path / "a.frames", "a")], dataset, quiet=True)

    def fail(self: pl.DataFrame, path: object, **kwargs: object) -> None:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(pl.DataFrame, "write_parquet", fail)
    assert main(["load", str(dataset)]) == 5
    line = _one_line(capsys.readouterr().err)
    assert f"{dataset / 'analyses' / 'load'}" in line and "No space left on device" in line
    assert not list((dataset / "analyses").glob(".*.tmp"))  # no temporary file left


def test_an_opaque_library_error_is_explained_by_probing_the_folder(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    class Full:
        f_flag, f_bavail = 0, 0

    monkeypatch.setattr(dataset_module.os, "statvfs", lambda path: Full())
    # the message pyarrow gave on a full disk in the adversarial pass
    assert os_reason(RuntimeError("Invalid thrift: transport error"), tmp_path) == \
        os.strerror(errno.ENOSPC)
    Full.f_flag = os.ST_RDONLY
    assert os_reason(RuntimeError("Invalid thrift"), tmp_path) == os.strerror(errno.EROFS)


# --- damaged files ------------------------------------------------------------------------


def test_a_truncated_part_is_named_in_one_line(tmp_path: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    dataset = tmp_path / "ds"
    ingest_logs([_log(tmp_path / "a.frames", "a")], dataset, quiet=True)
    part = open_dataset(dataset).part_files("frames")[0]
    part.write_bytes(part.read_bytes()[: part.stat().st_size // 2])
    assert main(["sql", str(dataset), "SELECT count(*) FROM frames"]) == 5
    line = _one_line(capsys.readouterr().err)
    assert str(part) in line and "damaged" in line


def test_a_truncated_analysis_is_stale_and_recomputed(tmp_path: Path) -> None:
    dataset = tmp_path / "ds"
    ingest_logs([_log(tmp_path / "a.frames", "a")], dataset, quiet=True)
    workflow.load(dataset)
    stored = dataset / "analyses" / "load.parquet"
    stored.write_bytes(stored.read_bytes()[:100])
    ds = open_dataset(dataset)
    assert ds.read_analysis("load") is None and not ds.has_analysis("load")
    with ds.connect() as con:  # the damaged output is no view: nothing half-read
        views = {r[0] for r in con.execute("SELECT view_name FROM duckdb_views()").fetchall()}
    assert "load" not in views and "load_summary" in views
    workflow.report(dataset, tmp_path / "r.html")
    assert dataset_module.parquet_intact(stored)
    assert ds.read_analysis("load") is not None


# --- glob characters in dataset paths -----------------------------------------------------


@pytest.mark.parametrize("name", ["gl[X]", "gl*", "gl?"])
def test_glob_characters_in_the_dataset_path_are_literal(tmp_path: Path, name: str) -> None:
    odd, sibling = tmp_path / name, tmp_path / "glX"
    ingest_logs([_log(tmp_path / "a.frames", "mine", frames=7)], odd, quiet=True)
    ingest_logs([_log(tmp_path / "b.frames", "sibling", frames=3)], sibling, quiet=True)
    assert main(["info", str(odd)]) == 0
    with open_dataset(odd).connect() as con:
        assert con.execute("SELECT run, count(*) FROM frames GROUP BY run").fetchall() == \
            [("mine", 7)]
        assert con.execute("SELECT run FROM manifest").fetchall() == [("mine",)]
    assert open_dataset(odd).table("frames").collect().height == 7
    workflow.load(odd)
    assert open_dataset(odd).read_analysis("load_summary")["run"].unique().to_list() == ["mine"]


# --- the same log twice, and overlapping spans -------------------------------------------


def test_the_same_log_in_another_compression_is_skipped(tmp_path: Path) -> None:
    plain = _log(tmp_path / "n.frames", "n")
    packed = _log(tmp_path / "n.frames.gz", "n")
    assert plain.read_bytes() != packed.read_bytes()
    dataset = tmp_path / "ds"
    ingest_logs([plain], dataset, quiet=True)
    summary = ingest_logs([packed], dataset, quiet=True)
    assert summary.files == [] and summary.same_content == [(str(packed), str(plain))]
    assert "same content as" in summary.describe()
    manifest = open_dataset(dataset).manifest()
    assert manifest.height == 1 and manifest["frames"].to_list() == [50]
    # both at once: the second one is the twin
    other = tmp_path / "ds2"
    summary = ingest_logs([packed, plain], other, quiet=True)
    assert [f.file for f in summary.files] == [str(packed)]
    assert open_dataset(other).manifest()["frames"].sum() == 50


def test_overlapping_spans_of_one_run_are_recorded_and_warned(tmp_path: Path) -> None:
    first = _log(tmp_path / "p1.frames", "r", frames=50)  # 0 .. 490 ms
    second = _log(tmp_path / "p2.frames", "r", frames=50, start_ns=400_000_000,
                  text="# another cut\n")  # 400 .. 890 ms: overlaps
    third = _log(tmp_path / "p3.frames", "r", frames=10, start_ns=10**10)  # later: fine
    dataset = tmp_path / "ds"
    ingest_logs([first], dataset, quiet=True)
    summary = ingest_logs([second, third], dataset, quiet=True)
    assert "warning:" in summary.describe() and str(first) in summary.describe()
    manifest = open_dataset(dataset).manifest()
    overlaps = dict(zip(manifest["file"].to_list(), manifest["overlaps"].to_list(), strict=True))
    assert overlaps == {str(first): None, str(second): str(first), str(third): None}


# --- output paths: one rule ---------------------------------------------------------------


def test_outputs_make_missing_parents_and_refuse_impossible_paths(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = _log(tmp_path / "a.frames", "a")
    deep = tmp_path / "new" / "deeper" / "ds"
    assert main(["ingest", str(log), "-o", str(deep), "-q"]) == 0
    assert main(["report", str(deep), "-o", str(tmp_path / "r1" / "x" / "a.html")]) == 0
    assert main(["sql", str(deep), "SELECT 1 AS a", "--format", "csv",
                 "--out", str(tmp_path / "q" / "r" / "a.csv")]) == 0
    assert (tmp_path / "q" / "r" / "a.csv").read_text() == "a\n1\n"
    capsys.readouterr()
    for args in (["ingest", str(log), "-o", "/proc/nope"],
                 ["report", str(deep), "-o", "/proc/nope/r.html"],
                 ["sql", str(deep), "SELECT 1", "--out", "/proc/nope/a.csv"],
                 ["ingest", str(log), "-o", str(log / "under-a-file")]):
        assert main(args) == 2, args
        line = _one_line(capsys.readouterr().err)
        assert line.startswith("tracelab: ") and "cannot create" in line


def test_sql_out_leaves_no_empty_file_behind(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    dataset = tmp_path / "ds"
    ingest_logs([_log(tmp_path / "a.frames", "a")], dataset, quiet=True)
    target = tmp_path / "out.parquet"

    def half_then_full(self: pl.DataFrame, handle: object, **kwargs: object) -> None:
        handle.write(b"PAR1")  # type: ignore[attr-defined]
        raise OSError(errno.ENOSPC, "No space left on device")

    with monkeypatch.context() as patch:
        patch.setattr(pl.DataFrame, "write_parquet", half_then_full)
        assert main(["sql", str(dataset), "SELECT 1 AS a", "--out", str(target),
                     "--format", "parquet"]) == 5
    line = _one_line(capsys.readouterr().err)
    assert str(target) in line and "No space left on device" in line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.frames", "ds"]
    target = tmp_path / "out.csv"
    assert main(["sql", str(dataset), "SELECT nonsense FROM frames", "--out", str(target)]) == 3
    assert not target.exists()


def test_storage_error_is_a_store_error_with_its_own_exit_code() -> None:
    from tracelab.errors import EXIT_INTERNAL, StoreError

    assert issubclass(StorageError, StoreError)
    assert StorageError.exit_code == 5 != EXIT_INTERNAL


def test_simulate_follows_the_same_output_rule(tmp_path: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    scenario = Path(__file__).resolve().parents[2] / "demo_logs" / "endurance-night.toml"
    log = tmp_path / "made" / "here" / "s.frames"
    assert main(["simulate", str(scenario), "-o", str(log), "--duration", "200ms", "-q"]) == 0
    assert log.is_file()
    capsys.readouterr()
    assert main(["simulate", str(scenario), "-o", "/proc/nope/s.frames",
                 "--duration", "200ms", "-q"]) == 2
    assert "cannot create" in _one_line(capsys.readouterr().err)
