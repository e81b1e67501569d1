"""Verdicts on synthetic buses where the cause is known, without first-detector attribution."""

from __future__ import annotations

import json

import numpy as np
import pytest

from tests.forensics import synth
from tracelab.forensics import replay_faults, wall_time

FRAME_NS = synth.FRAME_BITS * synth.BIT_NS


def _first_truth(s: synth.Synth) -> tuple[int, str, str]:
    return min((tr[0]["t_ns"], n, tr[0]["to"]) for n, tr in s.transitions.items() if tr)


def _verdict(s: synth.Synth) -> dict:
    return replay_faults(s.connect(), synth.catalog()).as_json()["results"][0]


@pytest.mark.parametrize("seed", [11, 12, 13])
@pytest.mark.parametrize("fault,kind,p", [("tx", "transmit-fault", 0.3),
                                          ("rx", "receive-fault", 0.25),
                                          ("ack", "isolation", 1.0)])
def test_culprit_and_first_transition_without_attribution(fault: str, kind: str, p: float,
                                                          seed: int) -> None:
    s = synth.generate(5000, fault=fault, culprit="charlie", p=p, attribute=False, seed=seed,
                       fault_from_slot=400)
    v = _verdict(s)
    t_true, node_true, state_true = _first_truth(s)
    assert v["cause"] == {"kind": kind, "node": "charlie"}
    assert node_true == "charlie" and v["first_degraded"]["node"] == "charlie"
    assert v["first_degraded"]["state"] == state_true
    assert abs(v["first_degraded"]["t_ns"] - t_true) <= 3 * FRAME_NS
    assert v["first_degraded"]["confidence"] > 0.9
    assert v["hypotheses"][0]["name"] == f"{kind}:charlie"


@pytest.mark.parametrize("seed", [21, 22, 23])
def test_bus_noise_is_the_whole_bus_not_a_node(seed: int) -> None:
    s = synth.generate(5000, fault="bus", p=0.35, attribute=False, seed=seed,
                       fault_from_slot=400)
    v = _verdict(s)
    assert v["cause"] == {"kind": "bus-disturbance", "node": None}
    assert v["hypotheses"][0]["name"] == "bus-disturbance"


def test_clean_bus() -> None:
    v = _verdict(synth.generate(800, seed=1))
    assert v["first_degraded"] is None
    assert v["cause"] == {"kind": "none", "node": None}
    assert all(n["transitions"] == [] for n in v["nodes"])


def test_thin_evidence_says_unknown() -> None:
    s = synth.generate(800, seed=1)
    s.errors = [dict(e) for e in synth.generate(800, fault="tx", culprit="alpha", p=0.01,
                                                attribute=False, seed=4).errors[:2]]
    v = _verdict(s)
    assert v["cause"]["kind"] == "unknown"
    assert "too thin" in v["verdict"]


def _silence_delta(fd: bool, back: bool, esi_on_return: bool = False) -> tuple[dict, int]:
    s = synth.generate(3000, seed=2, fd=fd)
    cut, back_t = s.frames[1200]["t_ns"], s.frames[2000]["t_ns"]
    delta = synth.IDS["delta"]
    s.frames = [f for f in s.frames if not (f["id"] == delta and f["t_ns"] > cut
                                            and (not back or f["t_ns"] < back_t))]
    if back:
        first_back = next(f for f in s.frames if f["id"] == delta and f["t_ns"] >= back_t)
        first_back["esi"] = esi_on_return
    v = replay_faults(s.connect(), synth.catalog(fd=fd)).as_json()["results"][0]
    return v, cut


def test_node_that_stops_without_errors_is_named_cut_off_or_silent() -> None:
    v, cut = _silence_delta(fd=False, back=False)
    top = {h["name"]: h["score"] for h in v["hypotheses"][:2]}
    assert set(top) == {"isolation:delta", "silence:delta"}
    assert top["isolation:delta"] == pytest.approx(top["silence:delta"])  # cannot tell
    assert v["cause"]["node"] == "delta" and v["first_degraded"]["node"] == "delta"
    # cut off: its next frame is retransmitted into the void; warning at the 12th ACK error
    # (12 x 8 = 96), error-passive at the 16th (ISO 11898-1 rule c)
    delta = next(n for n in v["nodes"] if n["node"] == "delta")
    assert [tr["to"] for tr in delta["transitions"]] == ["warning", "error-passive"]
    # the two readings disagree on whether it degraded: the verdict reports what it saw
    fd = v["first_degraded"]
    assert fd["state"] == "silent" and cut - 8 * FRAME_NS <= fd["t_ns"] <= cut
    readings = {a["kind"]: a for a in v["alternatives"]}
    assert set(readings) == {"isolation", "silence"} and readings["silence"]["transitions"] == []
    warn = readings["isolation"]["transitions"][0]
    assert warn["to"] == "warning"
    assert cut < warn["t_ns"] < cut + 16 * 2 * FRAME_NS + 8 * FRAME_NS
    assert "if cut off" in v["verdict"] and "if stopped sending" in v["verdict"]


def test_return_with_esi_clear_means_it_just_stopped() -> None:
    # from memory: ISO 11898-1 ESI bit: an error-passive transmitter sends ESI recessive (set)
    v, cut = _silence_delta(fd=True, back=True, esi_on_return=False)
    assert v["cause"] == {"kind": "silence", "node": "delta"}
    assert v["first_degraded"]["state"] == "silent"
    assert cut - 10 * FRAME_NS <= v["first_degraded"]["t_ns"] <= cut


def test_return_with_esi_set_means_it_was_cut_off() -> None:
    v, _ = _silence_delta(fd=True, back=True, esi_on_return=True)
    assert v["cause"] == {"kind": "isolation", "node": "delta"}
    assert v["first_degraded"]["confidence"] > 0.8


def test_json_shape_is_the_spec() -> None:
    s = synth.generate(3000, fault="tx", culprit="alpha", p=0.4, attribute=False, seed=3,
                       fault_from_slot=300, status_every=200)
    out = replay_faults(s.connect(), synth.catalog()).as_json()
    json.dumps(out)  # plain JSON types only
    (r,) = out["results"]
    assert {"run", "bus", "first_degraded", "cause", "hypotheses", "nodes", "status_agreement",
            "assumptions"} <= set(r)
    assert {"node", "state", "t_ns", "wall_time", "confidence"} <= set(r["first_degraded"])
    assert set(r["cause"]) == {"kind", "node"}
    assert all(set(h) == {"name", "score", "why"} for h in r["hypotheses"])
    assert sum(h["score"] for h in r["hypotheses"]) == pytest.approx(1.0, abs=1e-3)
    for n in r["nodes"]:
        assert {"node", "max_tec", "max_rec", "transitions", "bus_off"} <= set(n)
        assert all(set(tr) == {"t_ns", "from", "to"} for tr in n["transitions"])
        assert all(set(b) == {"from_ns", "to_ns"} for b in n["bus_off"])
    assert r["status_agreement"]["records"] == len(s.status)


def test_wall_time_matches_numpy_datetime64() -> None:
    # reference: numpy datetime64 nanosecond arithmetic (general-purpose library)
    origin = "2026-03-04T23:59:59.999999999Z"
    t_ns = 1_234_567_890_123
    expected = np.datetime64(origin[:-1], "ns") + np.timedelta64(t_ns, "ns")
    assert wall_time(origin, t_ns) == np.datetime_as_string(expected, unit="ns") + "Z"
    assert wall_time("2026-03-04T05:06:07Z", 5) == "2026-03-04T05:06:07.000000005Z"
    assert wall_time(None, 5) is None


def test_describe_reads_like_an_incident_note() -> None:
    s = synth.generate(3000, fault="tx", culprit="alpha", p=0.4, attribute=False, seed=3,
                       fault_from_slot=300)
    text = replay_faults(s.connect(), synth.catalog()).describe()
    assert "alpha degraded first" in text and "transmit-side fault in alpha" in text
    assert "2026-03-04T05:06:07" in text


def test_catalog_that_does_not_know_the_bus_says_so() -> None:
    from pathlib import Path

    from tracelab.network.catalog import BusSpec, Catalog

    s = synth.generate(2000, fault="tx", culprit="alpha", p=0.4, attribute=False, seed=1,
                       fault_from_slot=200)
    other = Catalog(Path("other.toml"), {"other": BusSpec("other", 250_000)}, {}, ())
    v = replay_faults(s.connect(), other).as_json()["results"][0]
    assert (v["cause"]["kind"], v["cause"]["node"]) == ("unknown", None)
    assert "check --catalog" in v["verdict"]
    assert v["catalog_match"]["logged_known"] == 0.0 and not v["catalog_match"]["ok"]
    assert "does not match" in v["cause"]["reason"]
    warning = replay_faults(s.connect(), other).catalog_warning()
    assert warning is not None and "0% of the logged identifiers" in warning
    assert replay_faults(s.connect(), synth.catalog()).catalog_warning() is None


def test_silences_from_the_timing_gaps() -> None:
    import polars as pl

    s = synth.generate(3000, seed=2)
    delta = synth.IDS["delta"]
    cut, back = s.frames[1200]["t_ns"], s.frames[2000]["t_ns"]
    s.frames = [f for f in s.frames if not (f["id"] == delta and cut < f["t_ns"] < back)]
    times = [f["t_ns"] for f in s.frames if f["id"] == delta]
    last = max(t for t in times if t <= cut)
    nxt = min(t for t in times if t >= back)
    gaps = pl.DataFrame({"run": ["r1"], "bus": ["can0"], "id": [delta], "ext": [False],
                         "from_ns": [last], "to_ns": [nxt], "missing": [20], "in_loss": [False]},
                        schema_overrides={"id": pl.UInt32})
    v = replay_faults(s.connect(), synth.catalog(), gaps=gaps).as_json()["results"][0]
    assert v["evidence"]["silences"] == [{"node": "delta", "from_ns": last, "to_ns": nxt}]
    assert v["cause"]["node"] == "delta"
