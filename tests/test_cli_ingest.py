"""`tracelab ingest` / `tracelab info` through the CLI entry point: exit codes, one-line errors,
collect vs --strict, and an unchanged dataset after every failure."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.format.cases import BAD_LINE, FATAL_CASES, GOOD, HEADER, RECORD_CASES, record_log
from tracelab.cli import main
from tracelab.wording import counted


def _write(path: Path, content: str | bytes) -> Path:
    path.write_bytes(content.encode() if isinstance(content, str) else content)
    return path


def _snapshot(dataset: Path) -> dict[str, bytes]:
    return {str(p.relative_to(dataset)): p.read_bytes() for p in sorted(dataset.rglob("*"))
            if p.is_file()}


@pytest.fixture
def dataset(tmp_path: Path) -> Path:
    good = _write(tmp_path / "good.frames", HEADER + GOOD)
    assert main(["ingest", str(good), "-o", str(tmp_path / "ds"), "--quiet"]) == 0
    return tmp_path / "ds"


def _one_line_error(err: str) -> str:
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    return lines[0]


@pytest.mark.parametrize(("name", "bad", "reason"), RECORD_CASES, ids=[c[0] for c in RECORD_CASES])
def test_strict_exits_3_with_file_line_reason_and_leaves_the_dataset(
        tmp_path: Path, dataset: Path, capsys: pytest.CaptureFixture[str], name: str, bad: str,
        reason: str) -> None:
    log = _write(tmp_path / "bad.frames", record_log(bad))
    before = _snapshot(dataset)
    capsys.readouterr()
    assert main(["ingest", str(log), "-o", str(dataset), "--strict", "-q"]) == 3
    line = _one_line_error(capsys.readouterr().err)
    assert line.startswith(f"tracelab: {log}:{BAD_LINE}: ") and reason in line
    assert _snapshot(dataset) == before


@pytest.mark.parametrize(("name", "bad", "reason"), RECORD_CASES, ids=[c[0] for c in RECORD_CASES])
def test_collect_mode_stores_the_reject_and_names_it(
        tmp_path: Path, dataset: Path, capsys: pytest.CaptureFixture[str], name: str, bad: str,
        reason: str) -> None:
    from tracelab.store.dataset import open_dataset

    log = _write(tmp_path / "bad.frames", record_log(bad))
    capsys.readouterr()
    assert main(["ingest", str(log), "-o", str(dataset), "-q"]) == 0
    out = capsys.readouterr().out
    assert f"{log}: 6 lines = 3 header/comment/blank + 2 records" in out
    assert f"1 line rejected (see the rejects table); first: {log}:{BAD_LINE}: " in out
    assert reason in out
    rows = open_dataset(dataset).connect().execute(
        "select line, raw, reason from rejects where file = ?", [str(log)]).fetchall()
    assert len(rows) == 1 and rows[0][0] == BAD_LINE and rows[0][1] == bad
    assert reason in rows[0][2]


@pytest.mark.parametrize("strict", [False, True])
@pytest.mark.parametrize(("name", "content", "line", "reason"), FATAL_CASES,
                         ids=[c[0] for c in FATAL_CASES])
def test_header_level_faults_exit_3_in_both_modes(
        tmp_path: Path, dataset: Path, capsys: pytest.CaptureFixture[str], name: str,
        content: bytes, line: int | None, reason: str, strict: bool) -> None:
    log = _write(tmp_path / "broken.frames", content)
    before = _snapshot(dataset)
    capsys.readouterr()
    args = ["ingest", str(log), "-o", str(dataset), "-q"] + (["--strict"] if strict else [])
    assert main(args) == 3
    where = f"{log}:{line}" if line is not None else f"{log}"
    message = _one_line_error(capsys.readouterr().err)
    assert message.startswith(f"tracelab: {where}: ") and reason in message
    assert _snapshot(dataset) == before


@pytest.mark.parametrize("strict", [False, True])
def test_corrupt_gzip_exits_3(tmp_path: Path, dataset: Path, capsys: pytest.CaptureFixture[str],
                              strict: bool) -> None:
    import gzip

    packed = gzip.compress((HEADER + GOOD * 20000).encode())
    log = _write(tmp_path / "cut.frames.gz", packed[: len(packed) - 40])
    before = _snapshot(dataset)
    args = ["ingest", str(log), "-o", str(dataset), "-q"] + (["--strict"] if strict else [])
    capsys.readouterr()
    assert main(args) == 3
    assert "corrupt or truncated gzip data" in _one_line_error(capsys.readouterr().err)
    assert _snapshot(dataset) == before


def test_strict_failure_on_a_new_dataset_creates_nothing(tmp_path: Path,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    log = _write(tmp_path / "bad.frames", record_log("5\tQ\tmark\tx"))
    assert main(["ingest", str(log), "-o", str(tmp_path / "new"), "--strict", "-q"]) == 3
    assert not (tmp_path / "new").exists()


def test_missing_log_is_a_usage_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["ingest", str(tmp_path / "nope.frames"), "-o", str(tmp_path / "ds")]) == 2
    assert "no such file" in _one_line_error(capsys.readouterr().err)


def test_info_prints_runs_counts_rejects_and_backward_steps(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = _write(tmp_path / "a.frames", HEADER.replace("%bus P", "%meta run=r7 vehicle=utv-07\n%bus P")
                 + "100\tP\tmark\ta\n50\tP\tmark\tb\n7\tP\tbogus\n")
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds"), "-q"]) == 0
    out = capsys.readouterr().out
    assert f"{log}: 1 backward time step, first at line 6" in out
    assert main(["info", str(tmp_path / "ds")]) == 0
    out = capsys.readouterr().out
    assert "1 run, 1 file, 7 lines" in out
    assert "rejects: 1; backward time steps: 1" in out
    assert "run r7: 1 file," in out and "vehicle utv-07" in out
    assert "bus C: nominal 500,000 bit/s, data 2,000,000 bit/s, stamp=end" in out
    assert f"  file {log} (run r7): 7 lines, 1 reject, first backward step at line 6" in out
    assert main(["info", str(tmp_path / "ds"), "--json"]) == 0
    import json

    info = json.loads(capsys.readouterr().out)
    assert info["totals"]["marks"] == 2 and info["runs"][0]["run"] == "r7"
    assert info["files"][0]["file"] == str(log) and info["files"][0]["backward_steps"] == 1


def test_info_on_a_plain_directory_is_one_line(tmp_path: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["info", str(tmp_path)]) != 0
    assert "not a tracelab dataset" in _one_line_error(capsys.readouterr().err)


def test_no_progress_bar_when_stderr_is_not_a_terminal(tmp_path: Path,
                                                      capsys: pytest.CaptureFixture[str]) -> None:
    log = _write(tmp_path / "a.frames", HEADER + GOOD * 50)
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds")]) == 0
    captured = capsys.readouterr()
    assert captured.err == "" and "50 records" in captured.out


RAW_CASES = [
    ("non-UTF-8", (HEADER + GOOD).encode() + b"5\tP\tmark\tcaf\xe9\n6\tP\tmark\tok\n",
     "not valid UTF-8 text (byte 0xE9 at column 13)", 2),
    ("truncated final line", (HEADER + GOOD + "5\tP\tframe\t0C0\ts\t8\t1122").encode(),
     "truncated final line (no line end; the logger may have lost power)", 1),
]


@pytest.mark.parametrize(("name", "content", "reason", "records"), RAW_CASES,
                         ids=[c[0] for c in RAW_CASES])
def test_raw_byte_faults_in_both_modes(tmp_path: Path, dataset: Path,
                                       capsys: pytest.CaptureFixture[str], name: str,
                                       content: bytes, reason: str, records: int) -> None:
    log = _write(tmp_path / "raw.frames", content)
    before = _snapshot(dataset)
    capsys.readouterr()
    assert main(["ingest", str(log), "-o", str(dataset), "--strict", "-q"]) == 3
    message = _one_line_error(capsys.readouterr().err)
    assert message.startswith(f"tracelab: {log}:{BAD_LINE}: ") and reason in message
    assert _snapshot(dataset) == before
    assert main(["ingest", str(log), "-o", str(dataset), "-q"]) == 0
    out = capsys.readouterr().out
    assert f"+ {counted(records, 'record')}" in out and f"first: {log}:{BAD_LINE}: " in out
    assert reason in out


def test_strict_rerun_skips_a_file_already_ingested_with_rejects(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    log = _write(tmp_path / "bad.frames", record_log("5\tQ\tmark\tx"))
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds"), "-q"]) == 0
    before = _snapshot(tmp_path / "ds")
    capsys.readouterr()
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds"), "--strict", "-q"]) == 0
    assert "skipped 1 already ingested" in capsys.readouterr().out
    assert _snapshot(tmp_path / "ds") == before


def test_control_characters_are_escaped_on_the_terminal(tmp_path: Path,
                                                       capsys: pytest.CaptureFixture[str]) -> None:
    # a log whose bad line carries ESC / CR / BEL, under a file name with a newline
    log = _write(tmp_path / "odd\nname.frames",
                 HEADER + GOOD + "5\t\x1b[2JP\x07\tframe\t0C0\ts\t0\t-\r\n")
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds"), "-q"]) == 0
    out = capsys.readouterr().out
    assert not any(ord(ch) < 32 and ch != "\n" for ch in out)
    assert "odd\\nname.frames:5: unknown bus '\\x1b[2JP\\x07'" in out
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds2"), "--strict", "-q"]) == 3
    line = _one_line_error(capsys.readouterr().err)
    assert "odd\\nname.frames:5: unknown bus '\\x1b[2JP\\x07'" in line
    assert main(["ingest", str(tmp_path / "no\rsuch.frames"), "-o", str(tmp_path / "ds3")]) == 2
    assert "no\\rsuch.frames: no such file" in _one_line_error(capsys.readouterr().err)


def test_names_from_a_log_are_escaped_in_command_output(tmp_path: Path,
                                                        capsys: pytest.CaptureFixture[str]) -> None:
    log = _write(tmp_path / "a.frames", HEADER.replace("%bus P", "%meta run=r\x1b[2J7\x07\n%bus P")
                 + GOOD)
    assert main(["ingest", str(log), "-o", str(tmp_path / "ds"), "-q"]) == 0
    assert main(["info", str(tmp_path / "ds")]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\x07" not in out and "run r\\x1b[2J7\\x07" in out
