"""Tiny slot-based bus generator for replay tests, with a frame-by-frame reference.

The reference applies the confinement rules to every node at every frame (the slow, obvious
way); the replay under test applies them event by event with vectorised success counts. Test
helper only: loops over frames are fine here.
"""

from __future__ import annotations

import random
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from tracelab.network.catalog import BusSpec, Catalog, MessageSpec, NodeSpec
from tracelab.physics.confinement import NodeCounters
from tracelab.store import schema

BITRATE_BPS = 500_000
BIT_NS = 1e9 / BITRATE_BPS
FRAME_BITS = 125
ERROR_AT_BITS = 62  # in the data field
ERROR_BITS = ERROR_AT_BITS + 12 + 8 + 3  # superposed flag, delimiter, intermission
NODES = ("alpha", "bravo", "charlie", "delta")
#: one slot each in turn; alpha sends twice as often (more bus time)
PATTERN = ("alpha", "bravo", "alpha", "charlie", "alpha", "delta", "bravo", "charlie")
IDS = {"alpha": 0x100, "bravo": 0x200, "charlie": 0x300, "delta": 0x400}


def catalog(fd: bool = False) -> Catalog:
    messages = tuple(
        MessageSpec("can0", IDS[n], False, False, fd, False, 8, n, 10_000_000, f"m_{n}",
                    "sf" if fd else "s") for n in NODES)
    return Catalog(Path("synthetic.toml"), {"can0": BusSpec("can0", BITRATE_BPS)},
                   {n: NodeSpec(n, ("can0",)) for n in NODES}, messages)


@dataclass
class Synth:
    frames: list[dict[str, Any]] = field(default_factory=list)
    errors: list[dict[str, Any]] = field(default_factory=list)
    status: list[dict[str, Any]] = field(default_factory=list)
    losses: list[dict[str, Any]] = field(default_factory=list)
    transitions: dict[str, list[dict[str, Any]]] = field(default_factory=dict)
    max_tec: dict[str, int] = field(default_factory=dict)
    counters: dict[str, NodeCounters] = field(default_factory=dict)

    def connect(self, origin: str | None = "2026-03-04T05:06:07.000000001Z"
                ) -> duckdb.DuckDBPyConnection:
        con = duckdb.connect(":memory:")
        tables = {"frames": self.frames, "errors": self.errors, "status": self.status,
                  "losses": self.losses}
        for name, rows in tables.items():
            frame = (pl.DataFrame(rows, schema=schema.TABLES[name], orient="row") if rows
                     else schema.empty(name))
            con.register(f"_{name}", frame.to_arrow())
            con.execute(f"CREATE VIEW {name} AS SELECT * FROM _{name}")
        manifest = schema.empty("manifest").vstack(pl.DataFrame(
            {"run": ["r1"], "origin": [origin], "first_t_ns": [0]}).select(
            [pl.col(c) if c in ("run", "origin", "first_t_ns") else
             pl.lit(None, dtype).alias(c) for c, dtype in schema.MANIFEST.items()]))
        con.register("_manifest", manifest.to_arrow())
        con.execute("CREATE VIEW manifest AS SELECT * FROM _manifest")
        return con


def frame_row(node: str, start: int, line: int) -> dict[str, Any]:
    """One classic 8-byte frame of ``node`` starting at ``start`` (ns), FRAME_BITS long."""
    end = start + int(FRAME_BITS * BIT_NS)
    return {"run": "r1", "bus": "can0", "t_ns": end - int(3 * BIT_NS), "start_ns": start,
            "end_ns": end, "id": IDS[node], "ext": False, "rtr": False, "fd": False,
            "brs": False, "esi": False, "dlc": 8, "data": bytes(8), "bits": FRAME_BITS,
            "duration_ns": end - start, "file": "synthetic.frames", "line": line}


@dataclass
class Timeline:
    """A hand-written log: frames and error frames laid end to end on the bus, in order."""

    log: Synth = field(default_factory=Synth)
    t: int = 0
    line: int = 0

    def frame(self, node: str) -> None:
        self.line += 1
        self.log.frames.append(frame_row(node, self.t, self.line))
        self.t = self.log.frames[-1]["end_ns"]

    def error(self, node: str | None, at_bits: int, field: str = "data", by: str | None = None,
              etype: str = "stuff", bits: int | None = None) -> None:
        """An error ``at_bits`` into a frame of ``node`` (None: not identified, id and form
        ``- -``), the error frame ending ``bits`` after the frame's start (default: the
        superposed flag, delimiter and intermission after the error)."""
        self.line += 1
        self.log.errors.append({
            "run": "r1", "bus": "can0", "t_ns": self.t + int(at_bits * BIT_NS), "type": etype,
            "field": field, "id": None if node is None else IDS[node],
            "ext": None if node is None else False, "form": None if node is None else "s",
            "by": by, "file": "synthetic.frames", "line": self.line})
        self.t += int((at_bits + 12 + 8 + 3 if bits is None else bits) * BIT_NS)


def generate(slots: int, fault: str = "none", culprit: str = "alpha", p: float = 0.3,
             attribute: bool = True, seed: int = 1, fault_from_slot: int = 0,
             fd: bool = False, status_every: int = 0) -> Synth:
    """Frames back to back; a fault decides per slot whether the attempt fails and who saw it.

    fault: none | tx (culprit's frames fail, it detects) | rx (culprit detects errors on any
    frame while it can flag them) | ack (culprit's frames get no ACK) | bus (any frame, a random
    node detects first).
    """
    rng = random.Random(seed)
    out = Synth()
    c = {n: NodeCounters() for n in NODES}
    out.counters = c
    state = {n: "error-active" for n in NODES}
    out.transitions = {n: [] for n in NODES}
    recovery_left: dict[str, int] = {}
    t = 0.0
    line = 0

    def note(t_ns: int) -> None:
        for n in NODES:
            s = c[n].state
            if s != state[n]:
                out.transitions[n].append({"t_ns": t_ns, "from": state[n], "to": s})
                state[n] = s
            out.max_tec[n] = max(out.max_tec.get(n, 0), c[n].tec)

    for slot in range(slots):  # test reference: a loop over frames on purpose
        sender = PATTERN[slot % len(PATTERN)]
        line += 1
        if c[sender].bus_off:
            t += FRAME_BITS * BIT_NS  # the slot stays idle
            idle_seq = int(FRAME_BITS // 11)
            for n in list(recovery_left):
                recovery_left[n] -= idle_seq
            _recover(c, recovery_left, int(t))
            note(int(t))
            continue
        fails, by, kind = False, None, "bit"
        if slot >= fault_from_slot:
            if fault == "tx" and sender == culprit:
                fails, by = rng.random() < p, culprit
            elif fault == "ack" and sender == culprit:
                fails, by, kind = True, None, "ack"
            elif fault == "rx" and state[culprit] in ("error-active", "warning") \
                    and not c[culprit].bus_off:
                fails, by = rng.random() < p, culprit
                kind = "bit" if sender == culprit else "stuff"
            elif fault == "bus":
                fails = rng.random() < p
                alive = [n for n in NODES if not c[n].bus_off]
                by = rng.choice(alive)
                kind = "bit" if by == sender else "stuff"
        start = int(t)
        if fails:
            t_err = int(t + ERROR_AT_BITS * BIT_NS)
            out.errors.append({"run": "r1", "bus": "can0", "t_ns": t_err, "type": kind,
                               "field": "data", "id": IDS[sender], "ext": False,
                               "form": "s", "by": by if attribute else None,
                               "file": "synthetic.frames", "line": line})
            for n in NODES:
                if n == sender:
                    c[n].transmit_error(ack_error=kind == "ack")
                elif kind != "ack":
                    c[n].receive_error(first_detector=(n == by))
            t += ERROR_BITS * BIT_NS
            for n in list(recovery_left):
                recovery_left[n] -= 1  # an error frame ends with 11 recessive bits too
            for n in NODES:
                if c[n].bus_off and n not in recovery_left:
                    recovery_left[n] = 127  # its own error frame's tail is the first
            _recover(c, recovery_left, int(t))
            note(t_err)
        else:
            end = t + FRAME_BITS * BIT_NS
            t_ns = int(end - 3 * BIT_NS)
            esi = fd and c[sender].error_passive
            out.frames.append({"run": "r1", "bus": "can0", "t_ns": t_ns, "start_ns": start,
                               "end_ns": int(end), "id": IDS[sender], "ext": False,
                               "rtr": False, "fd": fd, "brs": False, "esi": esi, "dlc": 8,
                               "data": bytes(8), "bits": FRAME_BITS,
                               "duration_ns": int(end) - start, "file": "synthetic.frames",
                               "line": line})
            for n in NODES:
                if n == sender:
                    c[n].transmit_success()
                else:
                    c[n].receive_success()
            for n in list(recovery_left):
                recovery_left[n] -= 1
            t = end
            _recover(c, recovery_left, t_ns)
            note(t_ns)
        if status_every and slot % status_every == status_every - 1:
            for n in NODES:
                line += 1
                out.status.append({"run": "r1", "bus": "can0", "t_ns": int(t), "node": n,
                                   "tec": c[n].tec, "rec": c[n].rec,
                                   "file": "synthetic.frames", "line": line})
    return out


def _recover(c: dict[str, NodeCounters], left: dict[str, int], t_ns: int) -> None:
    for n in [n for n, k in left.items() if k <= 0]:
        c[n].recover()
        del left[n]
