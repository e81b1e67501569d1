"""End-to-end simulate(): log and truth files, determinism, time order."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tracelab.errors import CatalogError
from tracelab.simulate import load_scenario, simulate, truth_path

SCENARIO = """
[run]
name = "smoke"
duration = "3s"
seed = 5
origin = "2026-11-30T21:00:00Z"
status_every = "1s"

[bus.P]
nominal = 500000
[bus.C]
nominal = 500000
data = 2000000

[node.vcu]
buses = ["P", "C"]
[node.inv]
buses = ["P"]
[node.brk]
buses = ["C"]

[[message]]
bus = "P"
id = "0C0"
dlc = 8
sender = "vcu"
period = "10ms"
jitter = "100us"
[[message]]
bus = "P"
id = "120"
dlc = 8
sender = "inv"
period = "5ms"
payload = "random"
[[message]]
bus = "C"
id = "200"
form = "sfb"
dlc = 13
sender = "vcu"
period = "20ms"
[[message]]
bus = "C"
id = "210"
form = "sf"
dlc = 4
sender = "brk"
period = "50ms"

[[fault]]
node = "inv"
kind = "rx-noise"
start = "1s"
end = "2s"
rate = 0.2

[[fault]]
kind = "logger-loss"
start = "2.2s"
end = "2.3s"

[[mark]]
at = "0.5s"
text = "step 1 <script>alert(1)</script>"
"""


def scenario_file(tmp_path: Path, text: str = SCENARIO) -> Path:
    path = tmp_path / "s.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_log_and_truth_written_in_time_order(tmp_path: Path) -> None:
    sc = load_scenario(scenario_file(tmp_path))
    out = tmp_path / "run.frames"
    summary = simulate(sc, out, quiet=True)
    lines = out.read_text().splitlines()
    assert lines[0] == "%tracelab-frames 1"
    records = [line.split("\t") for line in lines if not line.startswith("%")]
    times = [int(r[0]) for r in records]
    assert times == sorted(times)
    kinds = {r[2] for r in records}
    assert {"frame", "error", "status", "mark", "loss"} <= kinds
    truth = json.loads(truth_path(out).read_text())
    assert truth["run"] == "smoke" and truth["seed"] == 5 and truth["duration_ns"] == 3 * 10**9
    assert {f["kind"] for f in truth["faults"]} == {"rx-noise", "logger-loss"}
    frames = sum(1 for r in records if r[2] == "frame")
    sent = sum(m["sent"] for m in truth["messages"])
    lost = sum(m["logger_dropped"] for m in truth["messages"])
    assert frames == sent - lost and lost > 0
    assert sum(x["dropped"] for x in truth["logger_loss"]) >= lost
    assert summary.frames == sent
    assert "smoke" in summary.describe()


def test_same_seed_same_bytes(tmp_path: Path) -> None:
    sc = load_scenario(scenario_file(tmp_path))
    a, b, c = tmp_path / "a.frames.zst", tmp_path / "b.frames.zst", tmp_path / "c.frames.zst"
    simulate(sc, a, quiet=True)
    simulate(sc, b, quiet=True)
    simulate(sc, c, seed=6, quiet=True)
    assert a.read_bytes() == b.read_bytes()
    assert a.read_bytes() != c.read_bytes()


def test_cli_simulate_and_bad_input(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    from tracelab.cli import main

    path = scenario_file(tmp_path)
    out = tmp_path / "cli.frames.gz"
    assert main(["simulate", str(path), "-o", str(out), "--duration", "1s", "--seed", "2",
                 "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert "simulated run 'smoke' (seed 2): 1 s" in printed and str(out) in printed
    assert json.loads(truth_path(out).read_text())["duration_ns"] == 10**9
    assert main(["simulate", str(path), "-o", str(out), "--duration", "1 fortnight"]) == 2
    assert "unknown unit 'fortnight'" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text(SCENARIO.replace('kind = "rx-noise"', 'kind = "rx-nose"'), encoding="utf-8")
    assert main(["simulate", str(bad), "-o", str(out)]) == 3
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "[fault 1] unknown fault kind 'rx-nose'" in err


def test_run_meta_reaches_the_log_header(tmp_path: Path) -> None:
    text = SCENARIO.replace("[run]\n", '[run]\nmeta = { vehicle = "utv-03", site = "north-loop" }\n', 1)
    out = tmp_path / "run.frames"
    simulate(load_scenario(scenario_file(tmp_path, text)), out, quiet=True)
    meta = next(line for line in out.read_text().splitlines() if line.startswith("%meta"))
    assert meta.startswith("%meta run=smoke vehicle=utv-03 site=north-loop seed=5")


def test_run_meta_must_be_words(tmp_path: Path) -> None:
    text = SCENARIO.replace("[run]\n", '[run]\nmeta = { vehicle = "utv 03" }\n', 1)
    with pytest.raises(CatalogError, match=r"\[run\] meta vehicle must be one word"):
        load_scenario(scenario_file(tmp_path, text))
