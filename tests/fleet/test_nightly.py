"""The scheduled entry point: arguments from the command line or the environment."""

from __future__ import annotations

import pytest

from pipelines.nightly import arguments


def test_arguments_from_the_environment() -> None:
    env = {"TRACELAB_ROOT": "/data/logs", "TRACELAB_FLEET": "/data/fleet",
           "TRACELAB_EXECUTOR": "dask", "TRACELAB_SCHEDULER": "tcp://10.0.0.5:8786"}
    assert arguments([], env) == ["batch", "/data/logs", "-o", "/data/fleet", "--quiet",
                                  "--executor", "dask", "--scheduler", "tcp://10.0.0.5:8786"]


def test_command_line_wins_and_help_without_config() -> None:
    assert arguments(["/r", "-o", "/f"], {"TRACELAB_ROOT": "/x"}) == [
        "batch", "/r", "-o", "/f", "--quiet"]
    assert arguments([], {}) == []


def test_no_arguments_and_no_configuration_is_a_usage_error(
        monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    from pipelines.nightly import main

    for name in ("TRACELAB_ROOT", "TRACELAB_FLEET"):
        monkeypatch.delenv(name, raising=False)
    assert main([]) == 2  # a misconfigured scheduled job must not look green
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "TRACELAB_ROOT and TRACELAB_FLEET" in err[0]
