"""Fault-confinement rule boundaries: the independent reference (counters_reference.py)
against tracelab.physics.confinement.NodeCounters and the forensic replay, at 125 k, 250 k,
500 k and 1 M.

Each scenario is a short slot sequence on a four-node bus (every slot: one frame that
succeeds, or an error with a named first detector). The expected counters come from the
reference only; the rule boundaries are REC 95/96 (warning, never above), 127/128, TEC
95/96/127/128/255/256 and several receptions after error-passive (rule h). The rules are
quoted from memory (docs/forensics.md, ISO 11898-1 rules a..l).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import duckdb
import polars as pl
import pytest

from tests.oracles.counters_reference import Event, replay_events, transitions
from tracelab.network.catalog import BusSpec, Catalog, MessageSpec, NodeSpec
from tracelab.physics.confinement import NodeCounters
from tracelab.store import schema

NODES = ("alpha", "bravo", "charlie", "delta")
IDS = {"alpha": 0x100, "bravo": 0x200, "charlie": 0x300, "delta": 0x400}
FRAME_BITS = 125
ERROR_AT_BITS = 62
ERROR_BITS = ERROR_AT_BITS + 12 + 8 + 3
RATES = [125_000, 250_000, 500_000, 1_000_000]

Slot = tuple[str, str, str | None]  # ("ok" | "err", sender, first detector)


def ok(sender: str) -> Slot:
    return ("ok", sender, None)


def err(sender: str, by: str) -> Slot:
    return ("err", sender, by)


def _receiver_faults(n_first: int, n_plain: int, then: list[Slot] | None = None) -> list[Slot]:
    """charlie detects first on alpha's / delta's frames (n_first), bravo detects first on
    them (n_plain; charlie +1), alternating senders so no transmitter gets near 128."""
    senders = ["alpha", "delta"]
    slots = [err(senders[i % 2], "charlie") for i in range(n_first)]
    slots += [err(senders[i % 2], "bravo") for i in range(n_plain)]
    return slots + (then or [])


def _transmit_faults(pattern: str) -> list[Slot]:
    """charlie's own frames: E = an error it detects itself (bit error), S = a good frame;
    alpha's good frame after each (others' REC goes back down)."""
    out: list[Slot] = []
    for c in pattern:
        out.append(err("charlie", "charlie") if c == "E" else ok("charlie"))
        out.append(ok("alpha"))
    return out


# name -> (slots, charlie's expected (max TEC, max REC, worst state)); derived arithmetic
SCENARIOS: dict[str, tuple[list[Slot], tuple[int, int, str]]] = {
    # rule a + b: 9 per first detection, rule a: 1 otherwise
    "rec95_never_warning": (_receiver_faults(10, 5), (0, 95, "error-active")),
    "rec96_warning": (_receiver_faults(10, 6), (0, 96, "warning")),
    "rec127_warning": (_receiver_faults(14, 1), (0, 127, "warning")),
    "rec128_passive": (_receiver_faults(14, 2), (0, 128, "error-passive")),
    # rule h: above 127 one good reception sets REC to 119 (our configured value), then -1
    "rec_receptions_after_passive": (
        _receiver_faults(15, 0, [ok("bravo")] * 5), (0, 135, "error-passive")),
    # rule c: +8, rule g: -1
    "tec95_never_warning": (_transmit_faults("E" * 11 + "S" + "E"), (95, 0, "error-active")),
    "tec96_warning": (_transmit_faults("E" * 12), (96, 0, "warning")),
    "tec127_warning": (_transmit_faults("E" * 15 + "S" + "E"), (127, 0, "warning")),
    "tec128_passive": (_transmit_faults("E" * 16), (128, 0, "error-passive")),
    "tec255_passive": (_transmit_faults("E" * 31 + "S" + "E"), (255, 0, "error-passive")),
    "tec256_bus_off": (_transmit_faults("E" * 32), (256, 0, "bus-off")),
}
WORST = {"error-active": 0, "warning": 1, "error-passive": 2, "bus-off": 3}


def _events(slots: list[Slot], bit_ns: int) -> tuple[list[Event], list[dict[str, Any]],
                                                      list[dict[str, Any]]]:
    """Reference events per node, plus the frames and errors tables of the same slots."""
    events: list[Event] = []
    frames: list[dict[str, Any]] = []
    errors: list[dict[str, Any]] = []
    t = 1_000_000
    for line, (kind, sender, by) in enumerate(slots, start=1):
        if kind == "ok":
            end = t + FRAME_BITS * bit_ns
            t_ns = end - 3 * bit_ns
            frames.append({"run": "r1", "bus": "can0", "t_ns": t_ns, "start_ns": t,
                           "end_ns": end, "id": IDS[sender], "ext": False, "rtr": False,
                           "fd": False, "brs": False, "esi": False, "dlc": 8,
                           "data": bytes(8), "bits": FRAME_BITS, "duration_ns": end - t,
                           "file": "x.frames", "line": line})
            events += [Event(t_ns, n, "tx_success" if n == sender else "rx_success")
                       for n in NODES]
            t = end
        else:
            t_err = t + ERROR_AT_BITS * bit_ns
            errors.append({"run": "r1", "bus": "can0", "t_ns": t_err, "type": "bit",
                           "field": "data", "id": IDS[sender], "ext": False, "form": "s",
                           "by": by, "file": "x.frames", "line": line})
            for n in NODES:
                if n == sender:
                    events.append(Event(t_err, n, "tx_error"))
                else:
                    events.append(Event(t_err, n, "rx_error_first" if n == by else "rx_error"))
            t += ERROR_BITS * bit_ns
    return events, frames, errors


def _catalog(bps: int) -> Catalog:
    messages = tuple(MessageSpec("can0", IDS[n], False, False, False, False, 8, n, 10_000_000,
                                 f"m_{n}", "s") for n in NODES)
    return Catalog(Path("boundaries.toml"), {"can0": BusSpec("can0", bps)},
                   {n: NodeSpec(n, ("can0",)) for n in NODES}, messages)


def _connect(frames: list[dict[str, Any]], errors: list[dict[str, Any]]
             ) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect(":memory:")
    for name, rows in (("frames", frames), ("errors", errors), ("status", []),
                       ("losses", []), ("marks", [])):
        table = (pl.DataFrame(rows, schema=schema.TABLES[name], orient="row") if rows
                 else schema.empty(name))
        con.register(f"_{name}", table.to_arrow())
        con.execute(f"CREATE VIEW {name} AS SELECT * FROM _{name}")
    manifest = schema.empty("manifest").vstack(pl.DataFrame(
        {"run": ["r1"], "origin": [None], "first_t_ns": [0]}).select(
        [pl.col(c) if c in ("run", "first_t_ns") else pl.lit(None, dtype).alias(c)
         for c, dtype in schema.MANIFEST.items()]))
    con.register("_manifest", manifest.to_arrow())
    con.execute("CREATE VIEW manifest AS SELECT * FROM _manifest")
    return con


def _node_counters(events: list[Event]) -> dict[str, list[tuple[int, int, int]]]:
    """The same events through NodeCounters: (t, tec, rec) after each."""
    nodes = {n: NodeCounters() for n in NODES}
    out: dict[str, list[tuple[int, int, int]]] = {n: [] for n in NODES}
    for ev in events:  # test reference: a loop over events on purpose
        c = nodes[ev.node]
        if ev.kind == "tx_error":
            c.transmit_error()
        elif ev.kind == "rx_error":
            c.receive_error()
        elif ev.kind == "rx_error_first":
            c.receive_error(first_detector=True)
        elif ev.kind == "tx_success":
            c.transmit_success()
        elif ev.kind == "rx_success":
            c.receive_success()
        out[ev.node].append((ev.t_ns, c.tec, c.rec))
    return out


def _reference_rows(traj: list[list[object]]) -> list[tuple[int, int, int]]:
    return [(int(r[0]), int(r[1]), int(r[2])) for r in traj]  # type: ignore[call-overload]


@pytest.mark.parametrize("name", list(SCENARIOS))
def test_reference_at_the_boundary(name: str) -> None:
    slots, (max_tec, max_rec, worst) = SCENARIOS[name]
    events, _, _ = _events(slots, 2_000)
    traj = replay_events(events, nodes=NODES)["charlie"]
    assert max(int(r[1]) for r in traj) == max_tec  # type: ignore[call-overload]
    assert max(int(r[2]) for r in traj) == max_rec  # type: ignore[call-overload]
    assert max(WORST[str(r[3])] for r in traj) == WORST[worst]
    if name == "rec_receptions_after_passive":
        assert [int(r[2]) for r in traj[-5:]] == [119, 118, 117, 116, 115]  # type: ignore[call-overload]


@pytest.mark.parametrize("name", list(SCENARIOS))
def test_node_counters_equal_the_reference(name: str) -> None:
    events, _, _ = _events(SCENARIOS[name][0], 2_000)
    ref = replay_events(events, nodes=NODES)
    mine = _node_counters(events)
    for n in NODES:
        # the reference notes a row when a counter or the state changes; compare the value
        # after every event with the reference row in force then
        rows = _reference_rows(ref[n])
        for t, tec, rec in mine[n]:
            at = [r for r in rows if r[0] <= t][-1]
            assert (tec, rec) == at[1:], (n, t)


def _until_bus_off(traj: list[list[object]]) -> list[list[object]]:
    out = []
    for row in traj:
        out.append(row)
        if row[3] == "bus-off":
            break
    return out


@pytest.mark.parametrize("bps", RATES)
@pytest.mark.parametrize("name", list(SCENARIOS))
def test_forensic_replay_equals_the_reference(name: str, bps: int) -> None:
    from tracelab.forensics import replay_faults

    bit_ns = 10**9 // bps
    slots, (max_tec, max_rec, worst) = SCENARIOS[name]
    events, frames, errors = _events(slots, bit_ns)
    ref = replay_events(events, nodes=NODES)
    result = replay_faults(_connect(frames, errors), _catalog(bps))
    (bus,) = result.as_json()["results"]
    nodes = {n["node"]: n for n in bus["nodes"]}
    charlie = nodes["charlie"]
    assert (charlie["max_tec"], charlie["max_rec"]) == (max_tec, max_rec)
    for n in NODES:
        want = transitions(_until_bus_off(ref[n]))
        got = nodes[n]["transitions"][:len(want)]
        assert [(tr["t_ns"], tr["from"], tr["to"]) for tr in got] == \
            [(tr["t_ns"], tr["from"], tr["to"]) for tr in want], n
    rows = result.counters.filter(pl.col("node") == "charlie")
    want_rows = _reference_rows(_until_bus_off(ref["charlie"]))
    end = want_rows[-1][0] if worst == "bus-off" else None
    last: dict[int, tuple[int, int]] = {}  # the replay may write several rows per instant
    for t, tec, rec in zip(rows["t_ns"].to_list(), rows["tec"].to_list(),
                           rows["rec"].to_list(), strict=True):
        last[t] = (tec, rec)
    checked = 0
    for t, (tec, rec) in last.items():
        if end is not None and t > end:
            continue
        at = [r for r in want_rows if r[0] <= t][-1]
        assert (tec, rec) == at[1:], ("charlie", t)
        checked += 1
    assert checked >= 3
