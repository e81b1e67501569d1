"""The stored counters are the step function the rules define: every decrement appears at
the frame that made it, not lumped at the next error or status record.

Reference: tests/oracles/counters_reference.py, a per-event replay written from the rule
text that imports nothing from tracelab, fed every frame and error of a synthetic log.
"""

from __future__ import annotations

import pytest

from tests.forensics import synth
from tests.oracles.counters_reference import replay_events
from tests.oracles.test_counters_reference import _events_from_log, _until_bus_off
from tracelab.forensics import replay_faults


@pytest.mark.parametrize("fault,p,seed", [("rx", 0.3, 1), ("tx", 0.4, 3), ("bus", 0.25, 4)])
def test_every_counter_change_is_stored(fault: str, p: float, seed: int) -> None:
    s = synth.generate(3000, fault=fault, culprit="charlie", p=p, seed=seed,
                       fault_from_slot=200)
    ref = replay_events(_events_from_log(s), nodes=synth.NODES)
    result = replay_faults(s.connect(), synth.catalog())
    checked = 0
    for node in synth.NODES:
        want = _until_bus_off(ref[node])
        end = want[-1][0] if want[-1][3] == "bus-off" else None
        mine = result.counters.filter(result.counters["node"] == node)
        got: dict[int, tuple[int, int]] = {}  # the last row at each instant
        for t, tec, rec in zip(mine["t_ns"].to_list(), mine["tec"].to_list(),
                               mine["rec"].to_list(), strict=True):
            got[t] = (tec, rec)
        # every change of the reference (the value after each instant) is a stored row
        after: dict[int, tuple[int, int]] = {}
        for t, tec, rec, _ in want:
            after[t] = (tec, rec)
        prev = (0, 0)
        for t, value in sorted(after.items()):
            if value != prev and t > 0 and (end is None or t <= end):
                assert got.get(t) == value, (node, t, value, got.get(t))
                checked += 1
            prev = value
    assert checked >= 50
