"""Bus-level effects of the fault kinds not covered by the confinement sequences."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from tests.simulate.test_engine import message, node, run, scenario
from tracelab.simulate import load_scenario, simulate, truth_path
from tracelab.simulate.simulator import run_buses


def sent_by(res, sender: str) -> np.ndarray:  # type: ignore[no-untyped-def]
    s = res.schedule
    ranks = s.rank[res.release]
    mine = np.array([s.messages[r].sender == sender for r in ranks], dtype=bool)
    return res.start_ns[mine]


def test_bus_noise_every_receiver_detects_together(tmp_path: Path) -> None:
    body = message("100", "a", "5ms") + (
        '[[fault]]\nkind = "bus-noise"\nbus = "P"\nevery = 1\nend = "20ms"\n')
    res = run(scenario(tmp_path, body, duration="100ms", nodes="a b c",
                       extra_run="attribute_errors = true"))
    # rule a for every receiver (+1, nobody is first: no rule b), rule c for the sender
    assert [p[2] for p in node(res, "b").trajectory[:4]] == [0, 1, 2, 3]
    assert [p[2] for p in node(res, "c").trajectory[:4]] == [0, 1, 2, 3]
    assert [p[1] for p in node(res, "a").trajectory[:4]] == [0, 8, 16, 24]
    errors = [line.split("\t") for _, _, line in res.records if "\terror\t" in line]
    assert errors and all(e[7] == "-" for e in errors)  # no single first detector


def test_silent_node_sends_nothing_and_reports_nothing(tmp_path: Path) -> None:
    body = message("100", "a", "10ms") + message("200", "b", "10ms") + (
        '[[fault]]\nnode = "a"\nkind = "silent"\nstart = "1s"\nend = "2s"\n')
    res = run(scenario(tmp_path, body, duration="3s", nodes="a b c",
                       extra_run='status_every = "500ms"'))
    t = sent_by(res, "a")
    assert not np.any((t >= 1e9) & (t < 2e9 - 1e7))
    assert np.any(t >= 2e9) and np.any(t < 1e9)
    assert res.schedule.suppressed[0] == 100  # 1 s of a 10 ms message
    assert res.error_frames == 0
    status = [line.split("\t") for _, _, line in res.records if "\tstatus\t" in line]
    assert ("1500000000", "a") not in [(s[0], s[3]) for s in status]
    assert ("1500000000", "b") in [(s[0], s[3]) for s in status]


def test_babble_floods_the_bus(tmp_path: Path) -> None:
    body = message("100", "a", "10ms") + message("7F0", "b", "10ms") + (
        '[[fault]]\nnode = "c"\nkind = "babble"\nid = "000"\nrate = 5000\n'
        'start = "1s"\nend = "2s"\n')
    res = run(scenario(tmp_path, body, duration="3s", nodes="a b c"))
    s = res.schedule
    babble = [m for m in s.messages if m.babble]
    assert babble and babble[0].rank == 0 and babble[0].sender == "c"
    t = sent_by(res, "c")
    # 5000 frames/s of >= 222 us each ask for more than the whole bus: the babbler sends
    # back to back and nobody else gets through until it stops
    busy = (res.end_ns - res.start_ns)[np.isin(res.start_ns, t)].sum()
    assert busy / 1e9 > 0.99
    for sender in "ab":
        mine = sent_by(res, sender)
        assert not np.any((mine > 1.001e9) & (mine < 2e9))
        assert np.any(mine > 2e9)
    assert res.dropped[1] >= 99 and res.dropped[2] >= 99


def test_drift_scales_periods(tmp_path: Path) -> None:
    body = message("100", "a", "10ms") + message("200", "b", "10ms") + (
        '[[fault]]\nnode = "b"\nkind = "drift"\nppm = 2000\nstart = "1s"\n')
    sc = scenario(tmp_path, body.replace('sender = "a"', 'sender = "a"'), duration="3s")
    res = run_buses(sc, sc.run.duration_ns, 1)[0]
    s = res.schedule
    rel_b = s.t_ns[s.rank == 1]
    before = np.diff(rel_b[rel_b < 1e9])
    after = np.diff(rel_b[rel_b > 1.1e9])
    # the node's periods scale by (1 + ppm / 1e6) of the logger time base
    assert before.mean() == pytest.approx(10_000_000, abs=1_000)
    assert after.mean() == pytest.approx(10_000_000 * 1.002, abs=1_000)
    rel_a = s.t_ns[s.rank == 0]
    assert np.diff(rel_a).mean() == pytest.approx(10_000_000, abs=1_000)


def test_node_drift_ppm(tmp_path: Path) -> None:
    body = message("100", "a", "10ms")
    sc = scenario(tmp_path, body.replace("\n\n", "\n", 1), duration="2s")
    text = (tmp_path / "t.toml").read_text().replace('[node.a]\nbuses = ["P"]',
                                                     '[node.a]\nbuses = ["P"]\ndrift_ppm = -500')
    (tmp_path / "t.toml").write_text(text)
    sc = load_scenario(tmp_path / "t.toml")
    s = run_buses(sc, sc.run.duration_ns, 1)[0].schedule
    assert np.diff(s.t_ns).mean() == pytest.approx(10_000_000 * (1 - 500e-6), abs=1_000)


def test_error_passive_fd_sender_sets_esi(tmp_path: Path) -> None:
    text = (
        '[run]\nname = "fd"\nduration = "1s"\nseed = 2\n[bus.C]\nnominal = 500000\n'
        'data = 2000000\n[node.a]\nbuses = ["C"]\n[node.b]\nbuses = ["C"]\n'
        '[[message]]\nbus = "C"\nid = "100"\nform = "sfb"\ndlc = 12\nsender = "a"\n'
        'period = "5ms"\n'
        '[[fault]]\nnode = "a"\nkind = "tx-noise"\nevery = 2\nend = "150ms"\n')
    (tmp_path / "fd.toml").write_text(text)
    sc = load_scenario(tmp_path / "fd.toml")
    out = tmp_path / "fd.frames"
    simulate(sc, out, quiet=True)
    lines = [line.split("\t") for line in out.read_text().splitlines() if "\tframe\t" in line]
    truth = json.loads(truth_path(out).read_text())
    a = next(n for n in truth["nodes"] if n["node"] == "a")
    passive = [(p[0], q[0]) for p, q in zip(a["trajectory"], a["trajectory"][1:], strict=False)
               if p[3] == "error-passive"]
    # ISO 11898-1: an error-passive CAN FD transmitter sends ESI recessive ('e')
    esi = [int(x[0]) for x in lines if x[4] == "sfbe"]
    assert len(esi) >= 10 and lines[-1][4] == "sfb"
    assert all(any(a0 <= t <= b0 + 1_000_000 for a0, b0 in passive) for t in esi)
    plain = [int(x[0]) for x in lines if x[4] == "sfb"]
    assert not any(a0 + 1_000_000 < t < b0 for t in plain for a0, b0 in passive)


def test_stamp_start_and_logger_loss_records(tmp_path: Path) -> None:
    text = (
        '[run]\nname = "ls"\nduration = "2s"\nseed = 2\n[bus.P]\nnominal = 500000\n'
        'stamp = "start"\n[node.a]\nbuses = ["P"]\n[node.b]\nbuses = ["P"]\n'
        '[[message]]\nbus = "P"\nid = "100"\ndlc = 8\nsender = "a"\nperiod = "1ms"\n'
        'offset = "0ms"\n'
        '[[fault]]\nkind = "logger-loss"\nstart = "1s"\nend = "1.5s"\nrate = 0.5\n')
    (tmp_path / "ls.toml").write_text(text)
    sc = load_scenario(tmp_path / "ls.toml")
    out = tmp_path / "ls.frames"
    simulate(sc, out, quiet=True)
    records = [line.split("\t") for line in out.read_text().splitlines()
               if not line.startswith("%")]
    frames = [int(r[0]) for r in records if r[2] == "frame"]
    assert frames[:3] == [0, 1_000_000, 2_000_000]  # stamp=start: the SOF instant
    losses = [r for r in records if r[2] == "loss"]
    lost = sum(int(r[3]) for r in losses)
    assert len(frames) + lost == 2000
    assert 150 < lost < 350  # about half of the 500 frames of the window, in 10 ms slots
    truth = json.loads(truth_path(out).read_text())
    assert sum(x["dropped"] for x in truth["logger_loss"]) == lost
    assert truth["messages"][0]["logger_dropped"] == lost
    for r in losses:
        assert 1_000_000_000 <= int(r[0]) <= int(r[4]) < 1_500_000_000
