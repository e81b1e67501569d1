"""The examples in docs/frame-log-format.md are read exactly as the page says."""

from __future__ import annotations

import re
from pathlib import Path

from tracelab.format.reader import read_log

SPEC = Path(__file__).resolve().parents[2] / "docs" / "frame-log-format.md"


def _blocks() -> list[str]:
    return re.findall(r"```\n(.*?)```", SPEC.read_text(encoding="utf-8"), flags=re.S)


def test_valid_example_reads_without_rejects(tmp_path: Path) -> None:
    (valid,) = [b for b in _blocks() if b.startswith("%tracelab-frames 1\n%origin")]
    path = tmp_path / "valid.frames"
    path.write_text(valid)
    log = read_log(path)
    assert log.rejects.height == 0
    assert (log.frames.height, log.errors.height, log.status.height, log.marks.height,
            log.losses.height) == (6, 2, 1, 1, 2)
    assert log.frames.filter(log.frames["dlc"] == 15)["data"].bin.size().to_list() == [64]


def test_invalid_examples_give_the_documented_reasons(tmp_path: Path) -> None:
    (invalid,) = [b for b in _blocks() if "data has 2 bytes, DLC 8" in b]
    valid = [b for b in _blocks() if b.startswith("%tracelab-frames 1\n%origin")][0]
    header = "".join(line + "\n" for line in valid.splitlines()[:4])  # magic, origin, 2 buses
    cases = [re.match(r"^(.*?)\s{2,}9: (.*)$", line).groups()  # type: ignore[union-attr]
             for line in invalid.strip().splitlines()]
    assert len(cases) == 14
    for record, reason in cases:
        path = tmp_path / "bad.frames"
        path.write_text(header + "# pad\n" * 4 + record.rstrip(" ") + "\n")
        log = read_log(path)
        assert log.rejects.select("line", "reason").row(0) == (9, reason), record
