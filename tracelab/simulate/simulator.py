"""``simulate()``: schedules -> per-bus event loops -> logger -> frame log + truth JSON.

Buses are simulated independently (a node on two buses has one controller, with its own
counters, on each). The logger then sees every bus: its records are merged in time order,
a ``logger-loss`` fault removes some of them (and writes ``loss`` records), and the log is
written through tracelab.format.writer. Line formatting is vectorised with polars.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from tracelab import __version__ as tracelab_version
from tracelab.format.writer import BusDecl, LogHeader, LogWriter, loss_line, mark_line
from tracelab.progress import progress
from tracelab.simulate.engine import BusEngine, BusResult
from tracelab.simulate.scenario import FaultSpec, Scenario
from tracelab.simulate.schedule import build_schedule

#: The logger loses whole 10 ms slots of records (buffer overflows come in bursts).
LOSS_SLOT_NS = 10_000_000
HEX = np.frombuffer(b"0123456789ABCDEF", dtype=np.uint8)
WRITE_CHUNK = 1 << 18
INTERMISSION_BITS = 3


@dataclass
class BusSummary:
    bus: str
    frames: int
    error_frames: int
    busy_ns: int
    duration_ns: int

    @property
    def load_ratio(self) -> float:
        return self.busy_ns / self.duration_ns if self.duration_ns else 0.0


@dataclass
class SimulationSummary:
    """What simulate() wrote; ``describe()`` is the CLI's output."""

    scenario: Path
    log: Path
    truth: Path
    run: str
    seed: int
    duration_ns: int
    records: int
    buses: list[BusSummary] = field(default_factory=list)
    elapsed_s: float = 0.0
    first_degraded: list[dict[str, Any]] = field(default_factory=list)

    @property
    def frames(self) -> int:
        return sum(b.frames for b in self.buses)

    def describe(self) -> str:
        rate = self.frames / self.elapsed_s if self.elapsed_s else 0.0
        lines = [f"simulated run '{self.run}' (seed {self.seed}): {self.duration_ns / 1e9:g} s "
                 f"of bus time, {self.frames} frames, {self.records} records in "
                 f"{self.elapsed_s:.1f} s ({rate:,.0f} frames/s)"]
        for b in self.buses:
            lines.append(f"  bus {b.bus}: {b.frames} frames, {b.error_frames} error frames, "
                         f"load {100 * b.load_ratio:.1f} %")
        for entry in self.first_degraded:
            first, worst = entry.get("first_transition"), entry.get("worst") or {}
            if first:  # same definition as `tracelab faults`: first transition out of error-active
                lines.append(f"  bus {entry['bus']}: {first['node']} degraded first: "
                             f"{first['state']} at {first['t_ns'] / 1e9:.3f} s; worst state "
                             f"{worst.get('state', first['state'])} at "
                             f"{worst.get('t_ns', first['t_ns']) / 1e9:.3f} s")
        lines.append(f"log: {self.log}")
        lines.append(f"truth: {self.truth}")
        return "\n".join(lines)

    def as_json(self) -> dict[str, Any]:
        return {"scenario": str(self.scenario), "log": str(self.log), "truth": str(self.truth),
                "run": self.run, "seed": self.seed, "duration_ns": self.duration_ns,
                "records": self.records, "frames": self.frames, "elapsed_s": self.elapsed_s,
                "buses": [{"bus": b.bus, "frames": b.frames, "error_frames": b.error_frames,
                           "load_ratio": b.load_ratio} for b in self.buses]}


#: Severity of the fault-confinement states, for "worst state reached".
_SEVERITY = {"error-active": 0, "warning": 1, "error-passive": 2, "bus-off": 3}


def _worst_state(nodes: list[Any], first: dict[str, Any] | None) -> dict[str, Any] | None:
    """The most severe state the first-degraded node reached, and when it first reached it."""
    if first is None:
        return None
    worst = dict(first)
    for nt in nodes:
        if nt.node != first["node"]:
            continue
        for tr in nt.transitions:
            if _SEVERITY.get(tr["to"], 0) > _SEVERITY.get(worst["state"], 0):
                worst = {"bus": first["bus"], "node": nt.node, "state": tr["to"],
                         "t_ns": tr["t_ns"]}
    return worst


def truth_path(log: str | Path) -> Path:
    """LOG + ".truth.json" (e.g. run.frames.zst.truth.json)."""
    return Path(str(log) + ".truth.json")


def run_buses(scenario: Scenario, duration_ns: int, seed: int, quiet: bool = True,
              trace: bool = False) -> list[BusResult]:
    """Simulate every bus of the scenario (no file output); used by simulate() and tests.

    ``trace=True`` keeps every counter event per node in ``BusResult.trace`` (tests feed it to
    the independent reference in tests/oracles/counters_reference.py)."""
    seeds = np.random.SeedSequence(seed).spawn(2 * len(scenario.catalog.buses))
    results = []
    with progress("simulating", total=100 * len(scenario.catalog.buses), quiet=quiet) as advance:
        for i, bus in enumerate(scenario.catalog.buses):
            schedule = build_schedule(scenario, bus, duration_ns,
                                      np.random.default_rng(seeds[2 * i]))
            step = duration_ns // 100 or 1

            def tick(amount: float, step: int = step) -> None:
                advance(amount / step)

            engine = BusEngine(scenario, schedule, duration_ns,
                               np.random.default_rng(seeds[2 * i + 1]),
                               progress=None if quiet else tick, trace=trace)
            results.append(engine.run())
    return results


def frame_stamps(res: BusResult) -> np.ndarray:
    """Time stamp of every transmitted frame: end of EOF (stamp=end) or SOF (stamp=start)."""
    if res.schedule.bus.stamp == "end":
        return res.end_ns - int(round(INTERMISSION_BITS * 1e9 / res.schedule.bus.nominal_bps))
    return res.start_ns


def frame_lines(res: BusResult, which: np.ndarray) -> list[str]:
    """Frame records ``which`` (positions in the transmitted frames) as log lines, formatted
    without a Python loop over frames."""
    s = res.schedule
    g = res.release[which]
    ranks = s.rank[g]
    ks = s.k[g]
    width = max([m.nbytes for m in s.messages] + [1])
    chars = np.zeros((len(g), 2 * width), dtype=np.uint8)
    for m in s.messages:  # a loop over messages (tens), each vectorised over its frames
        sel = np.flatnonzero(ranks == m.rank)
        if not len(sel) or not m.nbytes:
            continue
        rows = s.payloads[m.rank][ks[sel]]
        chars[sel, 0:2 * m.nbytes:2] = HEX[rows >> 4]
        chars[sel, 1:2 * m.nbytes:2] = HEX[rows & 15]
    payload = pl.Series(chars.view(f"S{2 * width}").ravel()).cast(pl.Utf8)
    prefix = np.array([f"\t{s.bus.alias}\tframe\t{m.id_hex}\t{m.form}" for m in s.messages]
                      or [""], dtype=object)
    dlcs = np.array([f"\t{m.dlc}\t" for m in s.messages] or [""], dtype=object)
    frame = pl.DataFrame({
        "t_ns": frame_stamps(res)[which].astype(np.int64),
        "prefix": pl.Series(prefix[ranks], dtype=pl.Utf8),
        "esi": res.esi[which],
        "dlc": pl.Series(dlcs[ranks], dtype=pl.Utf8),
        "payload": payload,
    })
    line = pl.concat_str([
        pl.col("t_ns").cast(pl.Utf8), pl.col("prefix"),
        pl.when(pl.col("esi")).then(pl.lit("e")).otherwise(pl.lit("")),
        pl.col("dlc"),
        pl.when(pl.col("payload") == "").then(pl.lit("-")).otherwise(pl.col("payload")),
    ])
    return frame.select(line.alias("line"))["line"].to_list()


@dataclass
class _BusLog:
    """One bus's records in time order as (time, source) arrays: source >= 0 is a position
    in the transmitted frames, source < 0 is -1 - index into ``other``."""

    res: BusResult
    t_ns: np.ndarray
    source: np.ndarray
    other: list[str]


def _bus_log(res: BusResult) -> _BusLog:
    stamps = frame_stamps(res)
    records = sorted(res.records, key=lambda r: r[0])  # errors and status (rare)
    t_other = np.array([r[0] for r in records], dtype=np.int64)
    t = np.concatenate([stamps, t_other])
    source = np.concatenate([np.arange(len(stamps), dtype=np.int64),
                             -1 - np.arange(len(records), dtype=np.int64)])
    order = np.argsort(t, kind="stable")  # frames before other records at equal times
    return _BusLog(res, t[order], source[order], [r[2] for r in records])


def _logger_loss(log: _BusLog, faults: list[FaultSpec], duration_ns: int,
                 rng: np.random.Generator) -> tuple[list[dict[str, Any]], np.ndarray]:
    """Drop whole 10 ms slots of records with probability ``rate`` inside each window; one
    ``loss`` record per run of consecutive dropped records takes the place of the first.

    Changes ``log`` in place; returns the loss runs (truth) and the ranks of lost frames."""
    t = log.t_ns
    drop = np.zeros(len(t), dtype=bool)
    for f in faults:  # a loop over logger-loss faults (a handful)
        end = duration_ns if f.end_ns is None else min(f.end_ns, duration_ns)
        n_slots = max(1, -(-(end - f.start_ns) // LOSS_SLOT_NS))
        lost = rng.random(n_slots) < (f.rate or 1.0)
        inside = (t >= f.start_ns) & (t < end)
        slot = np.clip((t - f.start_ns) // LOSS_SLOT_NS, 0, n_slots - 1)
        drop |= inside & lost[slot]
    if not drop.any():
        return [], np.zeros(0, np.int64)
    bus = log.res.schedule.bus.alias
    edges = np.diff(np.concatenate([[0], drop.astype(np.int8), [0]]))
    starts = np.flatnonzero(edges == 1)
    stops = np.flatnonzero(edges == -1)  # exclusive
    lost_frames = log.source[drop & (log.source >= 0)]
    lost_ranks = log.res.schedule.rank[log.res.release[lost_frames]]
    losses: list[dict[str, Any]] = []
    keep = ~drop
    for a, b in zip(starts, stops, strict=True):  # one per loss run (rare)
        losses.append({"bus": bus, "from_ns": int(t[a]), "to_ns": int(t[b - 1]),
                       "dropped": int(b - a)})
        log.other.append(loss_line(int(t[a]), bus, int(b - a), int(t[b - 1])))
        log.source[a] = -len(log.other)
        keep[a] = True
    log.t_ns, log.source = log.t_ns[keep], log.source[keep]
    return losses, lost_ranks


def simulate(scenario: Scenario, out_path: str | Path, duration_ns: int | None = None,
             seed: int | None = None, quiet: bool = False) -> SimulationSummary:
    """Simulate the scenario; write the frame log and LOG.truth.json beside it."""
    started = time.perf_counter()
    out_path = Path(out_path)
    duration_ns = duration_ns or scenario.run.duration_ns
    seed = scenario.run.seed if seed is None else seed
    results = run_buses(scenario, duration_ns, seed, quiet=quiet)
    loss_rng = np.random.default_rng(np.random.SeedSequence([seed, 0x1055]))
    logs: list[_BusLog] = []
    loss_truth: list[dict[str, Any]] = []
    logger_dropped: dict[tuple[str, int], int] = {}
    for res in results:
        bus = res.schedule.bus.alias
        log = _bus_log(res)
        faults = [f for f in scenario.faults if f.kind == "logger-loss" and bus in f.buses]
        if faults:
            losses, lost_ranks = _logger_loss(log, faults, duration_ns, loss_rng)
            for rank, count in enumerate(np.bincount(lost_ranks)):
                logger_dropped[(bus, rank)] = int(count)
            loss_truth.extend(losses)
        logs.append(log)
    marks = [m for m in scenario.marks if m.t_ns < duration_ns]
    mark_lines = [mark_line(m.t_ns, m.bus, m.text) for m in marks]
    # Global order: time, then marks before bus records, then bus declaration order.
    t_all = np.concatenate([np.array([m.t_ns for m in marks], dtype=np.int64)]
                           + [log.t_ns for log in logs])
    bus_all = np.concatenate([np.full(len(marks), -1, dtype=np.int64)]
                             + [np.full(len(log.t_ns), i, dtype=np.int64)
                                for i, log in enumerate(logs)])
    pos_all = np.concatenate([np.arange(len(marks), dtype=np.int64)]
                             + [np.arange(len(log.t_ns), dtype=np.int64) for log in logs])
    order = np.lexsort((pos_all, bus_all, t_all))
    header = LogHeader(
        buses=[BusDecl(b.alias, b.nominal_bps, b.data_bps, b.stamp, b.name)
               for b in scenario.catalog.buses.values()],
        origin=scenario.run.origin,
        meta={"run": scenario.run.name, **dict(scenario.run.meta), "seed": str(seed),
              "source": "tracelab-simulate", "version": tracelab_version},
    )
    with LogWriter(out_path, header) as writer:
        for offset in range(0, len(order), WRITE_CHUNK):
            writer.lines(_chunk_lines(order[offset:offset + WRITE_CHUNK], bus_all, pos_all,
                                      logs, mark_lines))
        n_records = writer.records
    truth = build_truth(scenario, results, duration_ns, seed, loss_truth, logger_dropped)
    tpath = truth_path(out_path)
    tpath.write_text(json.dumps(truth, separators=(",", ":")) + "\n", encoding="utf-8")
    summary = SimulationSummary(
        scenario.path, out_path, tpath, scenario.run.name, seed, duration_ns, n_records,
        [BusSummary(r.schedule.bus.alias, len(r.release), r.error_frames,
                    int((r.end_ns - r.start_ns).sum()) + r.busy_error_ns, duration_ns)
         for r in results],
        first_degraded=truth["first_degraded"],
    )
    summary.elapsed_s = time.perf_counter() - started
    return summary


def _chunk_lines(chunk: np.ndarray, bus_all: np.ndarray, pos_all: np.ndarray,
                 logs: list[_BusLog], mark_lines: list[str]) -> list[str]:
    """The log lines of one chunk of the global record order (frames formatted per bus)."""
    out = np.empty(len(chunk), dtype=object)
    buses = bus_all[chunk]
    positions = pos_all[chunk]
    is_mark = buses < 0
    for i in np.flatnonzero(is_mark):  # marks: a handful per run
        out[i] = mark_lines[positions[i]]
    for b, log in enumerate(logs):  # a loop over buses
        mine = np.flatnonzero(buses == b)
        if not len(mine):
            continue
        source = log.source[positions[mine]]
        frames = source >= 0
        if frames.any():
            out[mine[frames]] = frame_lines(log.res, source[frames])
        for i, src in zip(mine[~frames], source[~frames], strict=True):  # errors, status, loss
            out[i] = log.other[-1 - src]
    return out.tolist()


def build_truth(scenario: Scenario, results: list[BusResult], duration_ns: int, seed: int,
                loss_truth: list[dict[str, Any]], logger_dropped: dict[tuple[str, int], int]
                ) -> dict[str, Any]:
    """The ground truth JSON (docs/simulator.md, contract D)."""
    faults = []
    for f in scenario.faults:
        entry = f.as_json()
        entry["end_ns"] = duration_ns if f.end_ns is None else min(f.end_ns, duration_ns)
        faults.append(entry)
    nodes, messages, first = [], [], []
    errors: list[dict[str, Any]] = []
    for res in results:
        s = res.schedule
        bus = s.bus.alias
        for nt in res.nodes:
            nodes.append({"node": nt.node, "bus": nt.bus, "trajectory": nt.trajectory,
                          "transitions": nt.transitions, "bus_off": nt.bus_off})
        queued = np.bincount(s.rank, minlength=len(s.messages))
        sent = np.bincount(s.rank[res.release], minlength=len(s.messages))
        if res.unacked:  # logged complete, but nobody acknowledged: retransmitted
            unacked = np.asarray(res.unacked, dtype=np.int64)
            sent -= np.bincount(s.rank[res.release[unacked]], minlength=len(s.messages))
        for m in s.messages:
            messages.append({
                "bus": bus, "id": m.id, "id_hex": m.id_hex, "ext": m.ext, "name": m.name,
                "sender": m.sender, "period_ns": m.period_ns, "queued": int(queued[m.rank]),
                "sent": int(sent[m.rank]), "dropped": int(res.dropped[m.rank]),
                "pending_at_end": int(queued[m.rank] - sent[m.rank] - res.dropped[m.rank]),
                "suppressed": int(s.suppressed[m.rank]),
                "logger_dropped": logger_dropped.get((bus, m.rank), 0),
                "babble": m.babble,
            })
        first.append({"bus": bus, "first": res.first_degraded,
                      "first_warning": res.first_warning,
                      "first_transition": res.first_warning,
                      "worst": _worst_state(res.nodes, res.first_warning)})
        errors.extend({"bus": bus, **e} for e in res.errors)
    return {
        "run": scenario.run.name, "seed": seed, "duration_ns": duration_ns,
        "origin": scenario.run.origin, "scenario": str(scenario.path),
        "faults": faults, "nodes": nodes, "messages": messages, "first_degraded": first,
        "logger_loss": loss_truth,
        "buses": [{"bus": r.schedule.bus.alias, "frames": len(r.release),
                   "error_frames": r.error_frames, "unacknowledged": len(r.unacked)}
                  for r in results],
        "logger": {"view": scenario.run.logger_view, "ack": scenario.run.logger_ack},
        "errors": errors,
    }
