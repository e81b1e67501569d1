"""Every CLI command has help text and is documented in the README's CLI reference."""

from __future__ import annotations

import re
from pathlib import Path

import click
import pytest
import typer.main

from tracelab.cli import app, main

README = Path(__file__).resolve().parents[1] / "README.md"
COMMANDS = typer.main.get_command(app).commands  # type: ignore[attr-defined]


def test_there_are_commands() -> None:
    assert {"ingest", "info", "simulate", "timing", "load", "sql", "faults", "report", "demo",
            "batch"} <= set(COMMANDS)


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_command_has_help_and_readme_entry(name: str) -> None:
    command: click.Command = COMMANDS[name]
    assert command.help and len(command.help.strip()) > 20
    reference = README.read_text(encoding="utf-8").split("## CLI reference", 1)[1]
    assert re.search(rf"^### `tracelab {name}\b", reference, re.MULTILINE), name
    section = reference.split(f"### `tracelab {name}", 1)[1].split("\n### ", 1)[0]
    for param in command.params:
        opts = [o for o in getattr(param, "opts", []) if o.startswith("-")]
        if opts:  # options: one of their spellings is documented in the command's section
            assert any(o in section for o in opts), f"{name}: option {opts} missing from README"


def test_usage_error_exit_code(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["timing"]) == 2  # missing argument: usage error
    assert main(["no-such-command"]) == 2
    assert "Traceback" not in capsys.readouterr().err


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_command_help_gives_one_example_that_parses(name: str) -> None:
    import shlex

    command: click.Command = COMMANDS[name]
    examples = [line.strip() for line in (command.help or "").splitlines()
                if line.strip().startswith("tracelab ")]
    assert len(examples) == 1 and "Example:" in (command.help or ""), name
    words = shlex.split(examples[0])
    assert words[1] == name
    command.make_context(name, words[2:])  # every option and argument of it exists


def test_version(capsys: pytest.CaptureFixture[str]) -> None:
    import tracelab

    assert main(["--version"]) == 0
    assert capsys.readouterr().out == f"tracelab {tracelab.__version__}\n"


def test_help_shows_flags_without_type_names(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["ingest", "--help"]) == 0
    out = capsys.readouterr().out
    assert "<bool>" not in out and "--strict " in out and "Example:" in out
    assert "\u256d" not in out  # no box drawing


@pytest.mark.parametrize(("argv", "expected"), [
    (["simulate", "s.toml"], "tracelab: Missing option '-o' / '--output'."),
    (["simulate", "s.toml", "-o", "x.frames", "--seed", "abc"],
     "tracelab: Invalid value for '--seed'"),
    (["ingest", "a.frames", "-o", "ds", "--no-such-flag"], "tracelab: No such option: --no-such-flag"),
    (["timing"], "tracelab: Missing argument"),
    (["no-such-command"], "tracelab: No such command 'no-such-command'"),
    (["load", "ds", "--window"], "tracelab: Option '--window' requires an argument"),
])
def test_framework_errors_are_one_line_and_exit_2(capsys: pytest.CaptureFixture[str],
                                                   argv: list[str], expected: str) -> None:
    assert main(argv) == 2
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(expected), captured.err
    assert captured.out == "" and "Traceback" not in captured.err and "\u256d" not in captured.err


def test_framework_errors_escape_control_characters(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["ingest", "a.frames", "-o", "ds", "--bad\x1b[2J"]) == 2
    err = capsys.readouterr().err
    assert "\x1b" not in err and "--bad\\x1b[2J" in err
