"""`tracelab compare` on two simulated nights that differ in exactly two ways (injected in the
scenarios, so the scenario text is the truth): node ecu_b's clock runs 400 ppm slow in run B,
and message 0x300 is sent every 12 ms instead of 10 ms. The right messages must be flagged,
nothing else."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tracelab import workflow
from tracelab.cli import main

NETWORK = """
[bus.can0]
nominal = {bitrate}

[node.ecu_a]
buses = ["can0"]
[node.ecu_b]
buses = ["can0"]
[node.ecu_c]
buses = ["can0"]

[[message]]
bus = "can0"
id = "100"
form = "s"
dlc = 8
sender = "ecu_a"
period = "10ms"
[[message]]
bus = "can0"
id = "200"
form = "s"
dlc = 8
sender = "ecu_b"
period = "10ms"
[[message]]
bus = "can0"
id = "210"
form = "s"
dlc = 4
sender = "ecu_b"
period = "20ms"
[[message]]
bus = "can0"
id = "300"
form = "s"
dlc = 6
sender = "ecu_c"
period = "{period_300}"
[[message]]
bus = "can0"
id = "400"
form = "s"
dlc = 2
sender = "ecu_c"
period = "50ms"

[run]
name = "{name}"
duration = "20s"
seed = {seed}
origin = "2026-11-30T21:00:00Z"
"""


def _scenario(path: Path, name: str, seed: int, drift: bool, period_300: str,
              bitrate: int = 500000) -> Path:
    text = NETWORK.format(name=name, seed=seed, period_300=period_300, bitrate=bitrate,
                          )
    if drift:  # the node table already exists: its behaviour keys go into it
        text = text.replace('[node.ecu_b]\nbuses = ["can0"]\n',
                            '[node.ecu_b]\nbuses = ["can0"]\ndrift_ppm = 400\n')
    path.write_text(text)
    return path


@pytest.fixture(scope="module", params=[250000, 500000])
def pair(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> Path:
    base = tmp_path_factory.mktemp("compare")
    reference = _scenario(base / "a.toml", "night-a", 1, False, "10ms", request.param)
    changed = _scenario(base / "b.toml", "night-b", 2, True, "12ms", request.param)
    logs = []
    for scenario in (reference, changed):
        log = base / f"{scenario.stem}.frames"
        workflow.simulate(scenario, log, quiet=True)
        logs.append(log)
    workflow.ingest(logs, base / "ds", quiet=True)
    # the reference network's catalog: periods (and so drift) are judged against night A's
    workflow.timing(base / "ds", catalog=reference)
    workflow.load(base / "ds")
    return base


def test_only_the_changed_messages_are_flagged(pair: Path) -> None:
    result = workflow.compare(pair / "ds", "night-a", "night-b")
    flags = {m["id_hex"]: m["flags"] for m in result.messages}
    # the scenario's truth: ecu_b (0x200, 0x210) drifts by 400 ppm; 0x300's period moved
    assert flags == {"200": ["abs_drift_ppm"], "210": ["abs_drift_ppm"], "300": ["period"],
                     "100": [], "400": []}
    by_id = {m["id_hex"]: m for m in result.messages}
    # derived: 12 ms against 10 ms is +2 ms of period
    assert by_id["300"]["delta"]["period_ns"] == pytest.approx(2_000_000, abs=2_000)
    # derived: periods scaled by (1 + 400e-6); the fit over 2,000 cycles carries the
    # re-phased arbitration delays of run B (p99 up to a frame time), so +-10 ppm
    assert by_id["200"]["b"]["drift_ppm"] == pytest.approx(400.0, abs=10.0)
    assert by_id["100"]["b"]["drift_ppm"] == pytest.approx(0.0, abs=10.0)
    # worst changes first: the three flagged messages lead
    assert {m["id_hex"] for m in result.messages[:3]} == {"200", "210", "300"}


def test_json_shape_and_page(pair: Path, capsys: pytest.CaptureFixture[str]) -> None:
    page = pair / "compare.html"
    assert main(["compare", str(pair / "ds"), "--run", "night-a", "--run", "night-b",
                 "--json", "-o", str(page)]) == 0
    payload = json.loads(capsys.readouterr().out)
    assert payload["runs"] == ["night-a", "night-b"]
    assert set(payload) == {"runs", "messages", "buses", "errors", "verdicts"}
    message = payload["messages"][0]
    assert {"bus", "id", "name", "a", "b", "delta", "flags"} <= set(message)
    (bus,) = payload["buses"]
    assert bus["bus"] == "can0" and set(bus["a"]) == {"mean", "p95", "p99", "max"}
    assert payload["errors"]["a"]["total"] == payload["errors"]["b"]["total"] == 0
    text = page.read_text()
    assert 'id="compare-messages"' in text and "Caution." in text


def test_unknown_run_is_a_usage_error(pair: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["compare", str(pair / "ds"), "--run", "night-a", "--run", "night-c"]) == 2
    err = capsys.readouterr().err
    assert "no run 'night-c'" in err and "night-b" in err
    assert main(["compare", str(pair / "ds"), "--run", "night-a"]) == 2


def test_missing_frames_rule_and_the_verdict_lines() -> None:
    from tracelab.analyses.compare import Comparison, _message_flags

    # source: docs/report.md, regression rule: B at least twice A and above it by 3 frames
    assert _message_flags({"missing": 1}, {"missing": 4}, 0.0) == ["missing"]
    assert _message_flags({"missing": 2}, {"missing": 4}, 0.0) == []  # +2 < 3 frames
    assert _message_flags({"missing": 3}, {"missing": 5}, 0.0) == []  # 5 < 2 x 3
    assert _message_flags({"missing": None}, {"missing": 9}, 0.0) == []  # no reference
    # the text names each run's first degraded node, or says none degraded
    text = Comparison(["night-a", "night-b"], verdicts={
        "a": {"first_degraded": {"node": "ecu_b", "bus": "can0", "state": "error-passive"}},
        "b": None}).describe().splitlines()
    assert text[-2:] == ["  verdict night-a: ecu_b on bus can0 degraded first (error-passive)",
                         "  verdict night-b: no node degraded"]
