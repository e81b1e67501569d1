"""What a new user sees first: the same words for the same fact in every command."""

from __future__ import annotations

import re
from pathlib import Path

from tracelab import workflow
from tracelab.wording import counted

SCENARIO = """
[bus.can0]
nominal = 250000

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
period = "4ms"
[[message]]
bus = "can0"
id = "200"
form = "s"
dlc = 8
sender = "ecu_b"
period = "4ms"
[[message]]
bus = "can0"
id = "300"
form = "s"
dlc = 4
sender = "ecu_c"
period = "10ms"

[run]
duration = "3s"
seed = 7
origin = "2026-11-30T21:00:00Z"
attribute_errors = true

[[fault]]
kind = "tx-noise"
node = "ecu_b"
start = "500ms"
rate = 0.3
"""

_LEAD = re.compile(r"(\w+) degraded first: ([a-z-]+) at ([0-9.]+) s")


def test_simulate_and_faults_name_the_same_first_transition(tmp_path: Path) -> None:
    scenario = tmp_path / "scenario.toml"
    scenario.write_text(SCENARIO)
    log = tmp_path / "run.frames"
    sim = workflow.simulate(scenario, log, quiet=True).describe()
    workflow.ingest([log], tmp_path / "ds", quiet=True)
    found = workflow.faults(tmp_path / "ds", catalog=scenario).describe()
    sim_lead, faults_lead = _LEAD.search(sim), _LEAD.search(found)
    assert sim_lead and faults_lead, (sim, found)
    # One definition of "degraded first": the first transition out of error-active
    # (ISO 11898-1 fault confinement: warning is not a state of the standard, but it is the
    # first level a controller reports; both commands must name the same one).
    assert sim_lead.group(1) == faults_lead.group(1) == "ecu_b"
    assert sim_lead.group(2) == faults_lead.group(2)
    # the simulator prints ms resolution, faults us: same instant to the simulator's precision
    assert abs(float(sim_lead.group(3)) - float(faults_lead.group(3))) < 1e-3
    assert "worst state" in sim


def test_counted_nouns() -> None:
    # common practice, no source: English plurals in output ("1 mark", not "1 marks")
    assert counted(1, "mark") == "1 mark"
    assert counted(0, "mark") == "0 marks"
    assert counted(1200, "frame") == "1,200 frames"
    assert counted(2, "loss") == "2 losses"
    assert counted(3, "status") == "3 status"
