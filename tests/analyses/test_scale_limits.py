"""Every command's DuckDB connections run under the memory budget (store/limits.py)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import duckdb
import pytest

from tracelab.cli import main
from tracelab.errors import EXIT_USAGE, UsageError
from tracelab.store import limits

GIB = 1024 ** 3
MIB = 1024 ** 2


def test_parse_size_units() -> None:
    # source: IEC 80000-13 (Ki, Mi, Gi = 2^10, 2^20, 2^30) and SI prefixes (k, M, G = 10^3 ...)
    assert limits.parse_size("2GiB") == 2 * 2 ** 30
    assert limits.parse_size("512 MiB") == 512 * 2 ** 20
    assert limits.parse_size("1.5GB") == 1_500_000_000
    assert limits.parse_size("3kB") == 3000
    assert limits.parse_size("1073741824") == 2 ** 30
    # common practice, no source: bare K/M/G letters are binary (as `sort -S` reads them)
    assert limits.parse_size("4G") == 4 * 2 ** 30
    for bad in ("", "two GiB", "2 GiBs", "-1GiB", "1..5GB"):
        with pytest.raises(ValueError):
            limits.parse_size(bad)


def test_make_limits_options_environment_defaults(monkeypatch: pytest.MonkeyPatch,
                                                  tmp_path: Path) -> None:
    monkeypatch.delenv(limits.ENV_MEMORY, raising=False)
    monkeypatch.delenv(limits.ENV_TEMP_DIR, raising=False)
    assert limits.make_limits() == limits.Limits(2 * GIB, None)
    assert limits.make_limits().scratch(tmp_path) == tmp_path / ".tmp"
    monkeypatch.setenv(limits.ENV_MEMORY, "1GiB")
    monkeypatch.setenv(limits.ENV_TEMP_DIR, str(tmp_path / "spill"))
    assert limits.make_limits() == limits.Limits(GIB, tmp_path / "spill")
    assert limits.make_limits("768MiB").memory_bytes == 768 * MIB  # the option wins
    monkeypatch.setenv(limits.ENV_MEMORY, "lots")
    with pytest.raises(UsageError, match="TRACELAB_MEMORY"):
        limits.make_limits()
    with pytest.raises(UsageError, match="too little"):
        limits.make_limits("1MiB")


def _record(monkeypatch: pytest.MonkeyPatch) -> dict[str, list[Any]]:
    """Every duckdb.connect() and, for each configured connection, the settings DuckDB
    reports right after tracelab configured it."""
    seen: dict[str, list[Any]] = {"connects": [], "settings": []}
    real_connect, real_configure = duckdb.connect, limits.configure

    def connect(*args: Any, **kwargs: Any) -> duckdb.DuckDBPyConnection:
        con = real_connect(*args, **kwargs)
        seen["connects"].append(con)
        return con

    def configure(con: duckdb.DuckDBPyConnection, folder: Path) -> limits.Limits:
        applied = real_configure(con, folder)
        seen["settings"].append(con.sql(
            "SELECT current_setting('memory_limit'), current_setting('temp_directory')"
        ).fetchall()[0])
        return applied

    monkeypatch.setattr(duckdb, "connect", connect)
    import tracelab.fleet.views
    import tracelab.store.dataset
    monkeypatch.setattr(tracelab.store.dataset, "configure", configure)
    monkeypatch.setattr(tracelab.fleet.views, "configure", configure)
    monkeypatch.delenv(limits.ENV_MEMORY, raising=False)
    monkeypatch.delenv(limits.ENV_TEMP_DIR, raising=False)
    return seen


@pytest.fixture()
def recorded(monkeypatch: pytest.MonkeyPatch) -> dict[str, list[Any]]:
    return _record(monkeypatch)


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, list[Any]]]:
    """One `tracelab demo` for the module (about 10 s), run under TRACELAB_MEMORY=1GiB as the
    batch hands it to its workers, with its connections recorded."""
    out = tmp_path_factory.mktemp("limits") / "demo"
    with pytest.MonkeyPatch.context() as monkeypatch:
        seen = _record(monkeypatch)
        monkeypatch.setenv(limits.ENV_MEMORY, "1GiB")
        assert main(["demo", "-o", str(out), "--quiet"]) == 0
    return out, seen


@pytest.fixture(scope="module")
def demo_dir(demo_run: tuple[Path, dict[str, list[Any]]]) -> Path:
    return demo_run[0]


def _check(seen: dict[str, list[Any]], memory: str, temp_dir: Path) -> None:
    assert seen["settings"], "the command opened no configured connection"
    # every connection the command opened was configured, none bypassed the limits
    assert len(seen["settings"]) == len(seen["connects"])
    # DuckDB's memory_limit is the budget's DuckDB share (DUCKDB_SHARE = 0.5), as DuckDB prints it
    assert {s[0] for s in seen["settings"]} == {memory}
    assert {s[1] for s in seen["settings"]} == {str(temp_dir)}


@pytest.mark.parametrize("command", ["timing", "load", "faults", "report", "sql"])
def test_each_command_runs_under_its_memory_limit(command: str, demo_dir: Path, tmp_path: Path,
                                                  recorded: dict[str, list[Any]],
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    dataset = demo_dir / "dataset"
    catalog = Path(__file__).resolve().parents[2] / "demo_logs" / "endurance-night.toml"
    extra = {"timing": ["--catalog", str(catalog)], "load": [],
             "faults": ["--catalog", str(catalog)],
             "report": ["-o", str(tmp_path / "r.html"), "--catalog", str(catalog)],
             "sql": ["SELECT current_setting('memory_limit') AS m", "--format", "csv"]}[command]
    if command == "report":  # make report compute everything again, on its own connections
        for stale in (dataset / "analyses").iterdir():
            stale.unlink()
    code = main([command, str(dataset), *extra, "--memory", "768MiB",
                 "--temp-dir", str(tmp_path / "spill")])
    assert code == 0
    _check(recorded, "384.0 MiB", tmp_path / "spill")
    if command == "sql":
        assert "384.0 MiB" in capsys.readouterr().out  # the user's own session sees it too


def test_demo_and_environment_default(demo_run: tuple[Path, dict[str, list[Any]]]) -> None:
    out, seen = demo_run
    _check(seen, "512.0 MiB", out / "dataset" / ".tmp")
    assert not (out / "dataset" / ".tmp").exists()  # nothing left behind


def test_bad_memory_option_is_a_usage_error(demo_dir: Path,
                                            capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["load", str(demo_dir / "dataset"), "--memory", "plenty"]) == EXIT_USAGE
    assert capsys.readouterr().err.startswith("tracelab: --memory: 'plenty' is not a size")
