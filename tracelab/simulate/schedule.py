"""Release schedules, payloads and exact bit lengths of every frame instance, vectorised.

Everything the event loop needs per frame instance is computed here up front with numpy and
tracelab.physics, so the loop itself only arbitrates and counts.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl
import pyarrow as pa

from tracelab.format.grammar import form_letters, id_text, parse_form, payload_bytes
from tracelab.network.catalog import BusSpec, MessageSpec
from tracelab.physics.bitlength import frame_bits, frame_durations_ns
from tracelab.simulate.payloads import signal_payloads
from tracelab.simulate.scenario import FaultSpec, Scenario, ScheduleSpec

#: Event-driven messages without ``event_every`` are never released (documented).
NS_PER_S = 1_000_000_000
TIMER_TICK_NS = 1_000


def arbitration_key(frame_id: int, ext: bool, rtr: bool) -> int:
    """One integer per frame whose order is the bitwise arbitration order (lower wins).

    ISO 11898-1 arbitration compares the identifier bits MSB first, dominant (0) winning.
    A base frame sends ID[10:0], RTR, IDE=0; an extended frame sends ID[28:18], SRR=1, IDE=1,
    ID[17:0], RTR. So: the 11-bit prefix decides first; with an equal prefix a base data frame
    (RTR 0) beats a base remote frame (RTR 1), which beats any extended frame (IDE 1); two
    extended frames with an equal prefix are decided by ID[17:0], then RTR. CAN FD frames
    send a dominant RRS where classic frames send RTR, so they rank as data frames.
    """
    if ext:
        prefix = (frame_id >> 18) & 0x7FF
        return (prefix << 21) | (1 << 20) | (1 << 19) | ((frame_id & 0x3FFFF) << 1) | int(rtr)
    return ((frame_id & 0x7FF) << 21) | (int(rtr) << 20)


@dataclass(frozen=True)
class SimMessage:
    """A message as the simulator sees it: catalog entry or babble flood, with its rank."""

    rank: int  # 0 = highest priority on its bus
    id: int
    ext: bool
    rtr: bool
    fd: bool
    brs: bool
    dlc: int
    sender: str
    name: str
    period_ns: int | None
    babble: bool = False

    @property
    def form(self) -> str:
        return form_letters(self.ext, self.rtr, self.fd, self.brs)

    @property
    def id_hex(self) -> str:
        return id_text(self.id, self.ext)

    @property
    def nbytes(self) -> int:
        return payload_bytes(self.dlc, self.fd, self.rtr)


@dataclass
class BusSchedule:
    """All releases of one bus, sorted by time; arrays are aligned (one entry per release)."""

    bus: BusSpec
    messages: list[SimMessage]  # index = rank
    t_ns: np.ndarray  # int64 release instants
    rank: np.ndarray  # int64 message rank
    k: np.ndarray  # int64 instance number within its message
    bits: np.ndarray  # int64
    data_phase_bits: np.ndarray  # int64
    duration_ns: np.ndarray  # int64
    payloads: list[np.ndarray]  # per rank: (instances, nbytes) uint8
    suppressed: np.ndarray  # per rank: releases suppressed by a `silent` fault


def node_clock(base_ppm: float, faults: list[FaultSpec], horizon_ns: int
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Piecewise-linear map of a node's local time to logger time.

    Returns (global breakpoints, local breakpoints, ppm per segment); `drift` faults set the
    ppm inside their window (a later fault wins where windows overlap).
    """
    cuts = {0}
    for f in faults:
        cuts.add(min(f.start_ns, horizon_ns))
        if f.end_ns is not None:
            cuts.add(min(f.end_ns, horizon_ns))
    g = np.array(sorted(cuts), dtype=np.float64)
    ppm = np.full(len(g), base_ppm, dtype=np.float64)
    for f in faults:  # a loop over drift faults (a handful)
        inside = (g >= f.start_ns) & ((f.end_ns is None) | (g < (f.end_ns or 0)))
        ppm[inside] = f.ppm if f.ppm is not None else base_ppm
    scale = 1.0 + ppm / 1e6
    local = np.concatenate([[0.0], np.cumsum(np.diff(g) / scale[:-1])])
    return g, local, scale


def local_to_global(tau: np.ndarray, clock: tuple[np.ndarray, np.ndarray, np.ndarray]
                    ) -> np.ndarray:
    g, local, scale = clock
    seg = np.searchsorted(local, tau, side="right") - 1
    seg = np.clip(seg, 0, len(g) - 1)
    return g[seg] + (tau - local[seg]) * scale[seg]


def global_to_local(t: float, clock: tuple[np.ndarray, np.ndarray, np.ndarray]) -> float:
    g, local, scale = clock
    seg = max(0, int(np.searchsorted(g, t, side="right")) - 1)
    return float(local[seg] + (t - g[seg]) / scale[seg])


def _releases(spec_period: int | None, sched: ScheduleSpec, clock: tuple[np.ndarray, ...],
              duration_ns: int, rng: np.random.Generator) -> np.ndarray:
    """Release instants (int64, logger time, sorted, < duration) of one message."""
    clk = (clock[0], clock[1], clock[2])
    horizon = global_to_local(float(duration_ns), clk)
    if spec_period is not None:
        offset = sched.offset_ns if sched.offset_ns is not None else int(
            rng.integers(0, spec_period))
        count = int(max(0.0, horizon - offset) // spec_period) + 1
        tau = offset + np.arange(count, dtype=np.float64) * spec_period
    elif sched.event_every_ns is not None:
        mean = sched.event_every_ns
        n = int(horizon / mean * 1.2) + 16
        tau = np.cumsum(rng.exponential(mean, n))
        while tau[-1] < horizon:  # rare: extend the Poisson stream
            tau = np.concatenate([tau, tau[-1] + np.cumsum(rng.exponential(mean, n))])
    else:
        return np.zeros(0, dtype=np.int64)
    t = local_to_global(tau, clk)
    if sched.jitter_ns:
        t = t + rng.integers(0, sched.jitter_ns + 1, len(t))
    # Node timers tick in whole microseconds (a documented simplification).
    t = (np.rint(t / TIMER_TICK_NS) * TIMER_TICK_NS).astype(np.int64)
    t = t[t < duration_ns]
    return np.sort(t)


def _payloads(msg: SimMessage, sched: ScheduleSpec, n: int, rng: np.random.Generator
              ) -> np.ndarray:
    nb = msg.nbytes
    if sched.payload == "constant":
        return np.tile(np.frombuffer(sched.constant, dtype=np.uint8), (n, 1)).reshape(n, nb)
    if sched.payload == "random":
        return rng.integers(0, 256, (n, nb), dtype=np.uint8)
    # counter: byte 0 rolls 0..255, the other bytes are fixed per message (seeded)
    rows = np.tile(rng.integers(0, 256, nb, dtype=np.uint8), (n, 1))
    if nb:
        rows[:, 0] = np.arange(n, dtype=np.int64) & 0xFF
    return rows


def _binary_column(rows: np.ndarray) -> pa.Array:
    """A (n, nbytes) uint8 matrix as an Arrow binary array, without a Python loop."""
    n, nb = rows.shape
    offsets = (np.arange(n + 1, dtype=np.int32) * nb).tobytes()
    values = np.ascontiguousarray(rows).tobytes()
    return pa.Array.from_buffers(pa.binary(), n, [None, pa.py_buffer(offsets),
                                                  pa.py_buffer(values)])


def bus_messages(scenario: Scenario, bus: str) -> tuple[list[SimMessage], list[ScheduleSpec]]:
    """Catalog messages of this bus plus babble floods, sorted into arbitration order."""
    entries: list[tuple[int, MessageSpec | FaultSpec, ScheduleSpec]] = []
    for spec, sched in zip(scenario.catalog.messages, scenario.schedules, strict=True):
        if spec.bus == bus:
            entries.append((arbitration_key(spec.id, spec.ext, spec.rtr), spec, sched))
    for f in scenario.faults:
        if f.kind == "babble" and f.buses[0] == bus:
            ext, rtr, _, _, _ = parse_form(f.babble_form) or (False, False, False, False, False)
            assert f.babble_id is not None
            entries.append((arbitration_key(f.babble_id, ext, rtr), f,
                            ScheduleSpec(payload="random")))
    entries.sort(key=lambda e: e[0])
    messages: list[SimMessage] = []
    schedules: list[ScheduleSpec] = []
    for rank, (_, item, sched) in enumerate(entries):
        if isinstance(item, MessageSpec):
            messages.append(SimMessage(rank, item.id, item.ext, item.rtr, item.fd, item.brs,
                                       item.dlc, item.sender, item.label, item.period_ns))
        else:
            ext, rtr, fd, brs, _ = parse_form(item.babble_form) or (False,) * 5
            assert item.babble_id is not None and item.node is not None
            period = max(1, round(NS_PER_S / (item.rate or 1.0)))
            messages.append(SimMessage(rank, item.babble_id, ext, rtr, fd, brs,
                                       item.babble_dlc, item.node, "babble", period, True))
        schedules.append(sched)
    return messages, schedules


def build_schedule(scenario: Scenario, bus: str, duration_ns: int, rng: np.random.Generator
                   ) -> BusSchedule:
    """Every release of every message on one bus, with payloads and exact bit lengths."""
    spec = scenario.catalog.buses[bus]
    messages, schedules = bus_messages(scenario, bus)
    drift_faults: dict[str, list[FaultSpec]] = {}
    silent: dict[str, list[FaultSpec]] = {}
    babble: dict[int, FaultSpec] = {}
    for f in scenario.faults:
        if f.kind == "drift" and f.node is not None:
            drift_faults.setdefault(f.node, []).append(f)
        if f.kind == "silent" and bus in f.buses and f.node is not None:
            silent.setdefault(f.node, []).append(f)
    for msg in messages:
        if msg.babble:
            babble[msg.rank] = next(f for f in scenario.faults if f.kind == "babble"
                                    and f.buses[0] == bus and f.babble_id == msg.id)
    t_parts, r_parts, k_parts, payloads = [], [], [], []
    suppressed = np.zeros(len(messages), dtype=np.int64)
    # One pass per message (tens): each is vectorised over its instances.
    for msg, sched in zip(messages, schedules, strict=True):
        if msg.babble:
            f = babble[msg.rank]
            end = duration_ns if f.end_ns is None else min(f.end_ns, duration_ns)
            assert msg.period_ns is not None
            t = np.arange(f.start_ns, max(f.start_ns, end), msg.period_ns, dtype=np.int64)
        else:
            behaviour = scenario.behaviour[msg.sender]
            clock = node_clock(behaviour.drift_ppm, drift_faults.get(msg.sender, []), duration_ns)
            t = _releases(msg.period_ns, sched, clock, duration_ns, rng)
        release = np.arange(len(t), dtype=np.int64)  # numbers before suppression (counters)
        for f in silent.get(msg.sender, []):
            end = duration_ns if f.end_ns is None else f.end_ns
            quiet = (t >= f.start_ns) & (t < end)
            suppressed[msg.rank] += int(quiet.sum())
            t = t[~quiet]
            release = release[~quiet]
        t_parts.append(t)
        r_parts.append(np.full(len(t), msg.rank, dtype=np.int64))
        k_parts.append(np.arange(len(t), dtype=np.int64))
        payloads.append(_payloads(msg, sched, len(t), rng) if sched.signal_plan is None
                        else signal_payloads(sched.signal_plan, t, release, rng))
    t_all = np.concatenate(t_parts) if t_parts else np.zeros(0, np.int64)
    r_all = np.concatenate(r_parts) if r_parts else np.zeros(0, np.int64)
    k_all = np.concatenate(k_parts) if k_parts else np.zeros(0, np.int64)
    bits, dpb = _instance_bits(messages, payloads, r_all)
    order = np.lexsort((r_all, t_all))
    t_all, r_all, k_all = t_all[order], r_all[order], k_all[order]
    bits, dpb = bits[order], dpb[order]
    durations = frame_durations_ns(bits, dpb, spec.nominal_bps, spec.data_bps)
    return BusSchedule(spec, messages, t_all, r_all, k_all, bits, dpb, durations, payloads,
                       suppressed)


def _instance_bits(messages: list[SimMessage], payloads: list[np.ndarray], ranks: np.ndarray
                   ) -> tuple[np.ndarray, np.ndarray]:
    """frame_bits over all instances, in the concatenated (per message) order."""
    if len(ranks) == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    ident = np.array([m.id for m in messages], dtype=np.uint32)[ranks]
    flags = {name: np.array([getattr(m, name) for m in messages], dtype=bool)[ranks]
             for name in ("ext", "rtr", "fd", "brs")}
    dlc = np.array([m.dlc for m in messages], dtype=np.uint8)[ranks]
    data = pa.chunked_array([_binary_column(p) for p in payloads], type=pa.binary())
    frame = pl.DataFrame({
        "id": ident, **flags, "esi": np.zeros(len(ranks), dtype=bool), "dlc": dlc,
        "data": pl.from_arrow(data),
    })
    out = frame_bits(frame)
    return (out["bits"].to_numpy().astype(np.int64),
            out["data_phase_bits"].to_numpy().astype(np.int64))
