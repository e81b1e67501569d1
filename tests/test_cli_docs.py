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
