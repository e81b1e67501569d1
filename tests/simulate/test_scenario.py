"""Scenario loading: defaults, and one-line errors with the place for every bad input."""

from __future__ import annotations

from pathlib import Path

import pytest

from tracelab.errors import CatalogError
from tracelab.simulate import Scenario, load_scenario

BASE = """
[run]
name = "night-3"
duration = "90s"
seed = 4
status_every = "1s"

[bus.P]
nominal = 500000

[node.vcu]
buses = ["P"]
[node.inv]
buses = ["P"]
drift_ppm = 35

[[message]]
bus = "P"
id = "0C0"
dlc = 8
sender = "vcu"
period = "10ms"
jitter = "150us"
offset = "2ms"
payload = "constant:0102030405060708"

[[message]]
bus = "P"
id = "101"
dlc = 2
sender = "inv"
event_every = "2s"

[[fault]]
node = "inv"
kind = "rx-noise"
start = "4s"
end = "7s"
rate = 0.02

[[mark]]
at = "10s"
text = "step 1"
"""


def load(tmp_path: Path, text: str) -> Scenario:
    path = tmp_path / "scenario.toml"
    path.write_text(text, encoding="utf-8")
    return load_scenario(path)


def test_good_scenario(tmp_path: Path) -> None:
    sc = load(tmp_path, BASE)
    assert sc.run.name == "night-3" and sc.run.duration_ns == 90 * 10**9
    assert sc.run.status_every_ns == 10**9 and not sc.run.attribute_errors
    assert sc.behaviour["inv"].drift_ppm == 35
    first = sc.schedules[0]
    assert (first.jitter_ns, first.offset_ns, first.payload) == (150_000, 2_000_000, "constant")
    assert first.constant == bytes(range(1, 9))
    assert sc.schedules[1].event_every_ns == 2 * 10**9
    fault = sc.faults[0]
    assert (fault.kind, fault.node, fault.buses, fault.start_ns, fault.end_ns, fault.rate) == (
        "rx-noise", "inv", ("P",), 4 * 10**9, 7 * 10**9, 0.02)
    assert sc.marks[0].bus == "*"
    assert sc.catalog.sender_of("P", 0xC0, False) == "vcu"


def test_per_bit_local_noise_and_logger_view(tmp_path: Path) -> None:
    text = BASE.replace('node = "inv"\nkind = "rx-noise"', 'nodes = ["inv", "vcu"]\n'
                        'kind = "local-noise"').replace("rate = 0.02", "ber = 1e-4\nber_end = 1e-3")
    sc = load(tmp_path, text)
    fault = sc.faults[0]
    assert (fault.kind, fault.nodes, fault.ber, fault.ber_end, fault.rate) == (
        "local-noise", ("inv", "vcu"), 1e-4, 1e-3, None)
    assert fault.as_json()["nodes"] == ["inv", "vcu"] and fault.as_json()["ber"] == 1e-4
    assert sc.run.logger_view == "own"
    detector = load(tmp_path, '[logger]\nview = "detector"\n' + BASE)
    assert detector.run.logger_view == "detector"
    with pytest.raises(CatalogError, match="view 'detectr' is unknown; did you mean"):
        load(tmp_path, '[logger]\nview = "detectr"\n' + BASE)


def test_defaults_without_run_section(tmp_path: Path) -> None:
    text = BASE.split("[bus.P]")[1]
    sc = load(tmp_path, "[bus.P]" + text.split("[[fault]]")[0])
    assert sc.run.name == "scenario" and sc.run.seed == 0


BABBLE = '\n[[fault]]\nnode = "vcu"\nkind = "babble"\nrate = 500\nid = "{id}"\n'


@pytest.mark.parametrize(("old", "new", "expected"), [
    ('node = "inv"\nkind = "rx-noise"', 'node = "invx"\nkind = "rx-noise"',
     "[fault 1] node 'invx' is not a declared node; did you mean 'inv'?"),
    ('kind = "rx-noise"', 'kind = "rx-nosie"',
     "[fault 1] unknown fault kind 'rx-nosie'; did you mean 'rx-noise'?"),
    ('kind = "rx-noise"', 'kind = "meltdown"', "[fault 1] unknown fault kind 'meltdown'; expected"),
    ('id = "101"', 'id = "0C0"', "[message 2] id 0C0 is already used on bus 'P' by message 1"),
    ('period = "10ms"', 'period = "50us"', "[message 1] period 50us is shorter than the frame"),
    ('rate = 0.02', 'rate = 2', "[fault 1] rate = 2 must lie in 0..1"),
    ('end = "7s"', 'end = "3s"', "[fault 1] end must come after start"),
    ('rate = 0.02', 'ppm = 3', "[fault 1] unknown key 'ppm'"),
    ('rate = 0.02', 'every = 0', "[fault 1] every must be a positive integer"),
    ('rate = 0.02', 'ber = 0.5', "[fault 1] ber = 0.5 must lie in 0..0.01"),
    ('rate = 0.02', 'rate = 0.02\nber = 0.001', "[fault 1] rx-noise needs one of rate"),
    ('rate = 0.02', 'ber_end = 0.001', "[fault 1] rx-noise needs one of rate"),
    ('rate = 0.02', 'every = 3\nber_end = 0.001', "[fault 1] ber_end needs ber"),
    ('node = "inv"\nkind = "rx-noise"', 'nodes = ["inv", "tmx"]\nkind = "local-noise"',
     "[fault 1] node 'tmx' is not a declared node"),
    ('node = "inv"\nkind = "rx-noise"', 'nodes = []\nkind = "local-noise"',
     "[fault 1] local-noise needs nodes = "),
    ('node = "inv"\nkind = "rx-noise"', 'nodes = ["inv", "inv"]\nkind = "local-noise"',
     "[fault 1] nodes lists a node twice"),
    ('node = "inv"\nkind = "rx-noise"', 'node = "inv"\nkind = "local-noise"',
     "[fault 1] unknown key 'node'"),
    ('rate = 0.02', '', "[fault 1] rx-noise needs one of rate"),
    ('constant:0102030405060708', 'constant:0102', "[message 1] payload constant has 2 bytes, DLC 8 needs 8"),
    ('payload = "constant', 'payload = "counterr', "[message 1] payload 'counterr"),
    ('jitter = "150us"', 'jitter = "20ms"', "[message 1] jitter must be shorter than the period"),
    ('event_every = "2s"', 'event_every = "2s"\nperiod = "1s"', "[message 2] event_every is for messages without period"),
    ('drift_ppm = 35', 'drift_ppm = 35000', "[node.inv] drift_ppm 35000 is beyond"),
    ('drift_ppm = 35', 'drift_pm = 35', "[node.inv] unknown key 'drift_pm'; did you mean 'drift_ppm'?"),
    ('seed = 4', 'seed = -4', "[run] seed must be a non-negative integer"),
    ('status_every = "1s"', 'status_every = "often"', "[run] status_every: duration 'often'"),
    ('name = "night-3"', 'name = "night 3"', "[run] name must be one word"),
    ('text = "step 1"', 'text = "a\\tb"', "[mark 1] text must be one line without tabs"),
    ('text = "step 1"', 'text = "x"\nbus = "Q"', "[mark 1] bus 'Q' is not declared"),
    ('duration = "90s"', 'duraton = "90s"', "[run] unknown key 'duraton'; did you mean 'duration'?"),
    ('[[mark]]', BABBLE.format(id="0C0") + '[[mark]]',
     "[fault 2] babble id 0C0 is already used on bus 'P' by message 1"),
    ('[[mark]]', BABBLE.format(id="000") + BABBLE.format(id="000") + '[[mark]]',
     "[fault 3] babble id 000 on bus 'P' is already used by fault 2"),
    ('[[mark]]', '[[fault]]\nkind = "bus-noise"\nbus = "X"\nrate = 0.1\n[[mark]]',
     "[fault 2] bus 'X' is not declared"),
    ('[[mark]]', '[[fault]]\nkind = "drift"\nnode = "inv"\n[[mark]]', "[fault 2] drift needs ppm"),
])
def test_bad_scenario_one_line_error(tmp_path: Path, old: str, new: str, expected: str) -> None:
    assert old in BASE
    with pytest.raises(CatalogError) as info:
        load(tmp_path, BASE.replace(old, new, 1))
    message = str(info.value)
    assert expected in message
    assert message.startswith(str(tmp_path / "scenario.toml") + ": ")
    assert "\n" not in message
