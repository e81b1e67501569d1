"""Scenario = catalog + run settings + node behaviour + schedule extras + faults + marks.

A scenario file is a catalog TOML with extra keys (docs/simulator.md); loading validates
everything up front so a simulation never fails half-way on bad input.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from tracelab.errors import CatalogError, did_you_mean
from tracelab.format.grammar import (
    ALL_BUSES,
    HEX_ID_RE,
    MAX_BASE_ID,
    MAX_EXTENDED_ID,
    META_KEY_RE,
    ORIGIN_RE,
    id_text,
    parse_form,
)
from tracelab.format.grammar import payload_bytes as grammar_payload_bytes
from tracelab.network.catalog import (
    Catalog,
    catalog_from_toml,
    check_keys,
    duration_field,
    read_toml,
)
from tracelab.simulate.payloads import signal_plan

FAULT_KINDS = ("rx-noise", "tx-noise", "local-noise", "isolated", "bus-noise", "silent",
               "babble", "drift", "logger-loss")
#: Fault kinds that corrupt bits: a per-frame ``rate``, every N-th frame or a per-bit ``ber``.
NOISE_KINDS = ("rx-noise", "tx-noise", "local-noise", "bus-noise")
LOGGER_VIEWS = ("own", "detector")
RUN_KEYS = ("name", "duration", "seed", "origin", "status_every", "attribute_errors", "meta")
LOGGER_KEYS = ("ack", "view")
MARK_KEYS = ("at", "text", "bus")
#: Keys each fault kind accepts besides kind, start, end.
FAULT_KEYS: dict[str, tuple[str, ...]] = {
    "rx-noise": ("node", "bus", "rate", "rate_end", "every", "ber", "ber_end"),
    "tx-noise": ("node", "bus", "rate", "rate_end", "every", "ber", "ber_end"),
    "local-noise": ("nodes", "bus", "rate", "rate_end", "every", "ber", "ber_end"),
    "bus-noise": ("bus", "rate", "rate_end", "every", "ber", "ber_end"),
    "isolated": ("node", "bus"),
    "silent": ("node", "bus"),
    "babble": ("node", "bus", "rate", "id", "form", "dlc"),
    "drift": ("node", "ppm"),
    "logger-loss": ("bus", "rate"),
}
PAYLOAD_KINDS = ("counter", "random", "constant", "signal")
DEFAULT_DURATION_NS = 60_000_000_000
MAX_DRIFT_PPM = 10_000.0
#: Largest accepted bit error probability (beyond it almost every frame fails anyway).
MAX_BER = 0.01
#: %meta keys the simulator writes itself.
RESERVED_META = ("run", "seed", "source", "version")


@dataclass(frozen=True)
class RunSpec:
    name: str
    duration_ns: int
    seed: int
    origin: str | None
    status_every_ns: int | None
    attribute_errors: bool
    logger_ack: bool
    #: Extra ``%meta`` of the log (vehicle, site, ...), in written order.
    meta: tuple[tuple[str, str], ...] = ()
    #: "own": error records as the logger's own controller classifies them; "detector": the
    #: first detector's classification (docs/simulator.md).
    logger_view: str = "own"


@dataclass(frozen=True)
class NodeBehaviour:
    name: str
    drift_ppm: float = 0.0
    recovery: str = "auto"
    recovery_delay_ns: int = 0


@dataclass(frozen=True)
class ScheduleSpec:
    """Per-message schedule extras; offset None means a seeded random offset in [0, period)."""

    jitter_ns: int = 0
    offset_ns: int | None = None
    payload: str = "counter"
    constant: bytes = b""
    event_every_ns: int | None = None
    #: payload "signal": the signals and their value profiles (simulate/payloads.py)
    signal_plan: Any = None


@dataclass(frozen=True)
class FaultSpec:
    """One ``[[fault]]``; ``end_ns`` None means until the end of the run."""

    index: int
    kind: str
    node: str | None
    buses: tuple[str, ...]
    start_ns: int
    end_ns: int | None
    rate: float | None = None
    rate_end: float | None = None
    every: int | None = None
    ppm: float | None = None
    babble_id: int | None = None
    babble_form: str = "s"
    babble_dlc: int = 8
    #: Bit error probability (noise kinds), ramping to ber_end.
    ber: float | None = None
    ber_end: float | None = None
    #: The nodes that see the disturbance (rx-noise, tx-noise: the node; local-noise: nodes).
    nodes: tuple[str, ...] = ()

    def as_json(self) -> dict[str, Any]:
        out: dict[str, Any] = {"kind": self.kind}
        if self.node is not None:
            out["node"] = self.node
        out["bus"] = self.buses[0] if len(self.buses) == 1 else list(self.buses)
        if self.kind == "local-noise":
            out["nodes"] = list(self.nodes)
        out["start_ns"] = self.start_ns
        out["end_ns"] = self.end_ns
        for key in ("rate", "rate_end", "every", "ber", "ber_end", "ppm"):
            value = getattr(self, key)
            if value is not None:
                out[key] = value
        if self.kind == "babble":
            assert self.babble_id is not None
            ext = self.babble_form.startswith("x")
            out["id"] = id_text(self.babble_id, ext)
            out["form"] = self.babble_form
            out["dlc"] = self.babble_dlc
        return out


@dataclass(frozen=True)
class MarkSpec:
    t_ns: int
    bus: str
    text: str


@dataclass(frozen=True)
class Scenario:
    path: Path
    catalog: Catalog
    run: RunSpec
    behaviour: dict[str, NodeBehaviour]
    schedules: tuple[ScheduleSpec, ...]  # aligned with catalog.messages
    faults: tuple[FaultSpec, ...]
    marks: tuple[MarkSpec, ...]


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario TOML; every problem is a one-line CatalogError."""
    data = read_toml(path)
    catalog = catalog_from_toml(path, data)
    spath = str(path)
    run = _load_run(spath, data.get("run", {}), Path(path), data.get("logger", {}))
    behaviour = _load_behaviour(spath, data.get("node", {}), catalog)
    schedules = _load_schedules(spath, data.get("message", []), catalog)
    faults = _load_faults(spath, data.get("fault", []), catalog, run)
    marks = _load_marks(spath, data.get("mark", []), catalog)
    return Scenario(Path(path), catalog, run, behaviour, schedules, faults, marks)


def _table(path: str, where: str, value: Any) -> Mapping[str, Any]:
    if not isinstance(value, dict):
        raise CatalogError(path, where, "must be a table")
    return value


def _array(path: str, where: str, value: Any) -> list[Any]:
    if not isinstance(value, list):
        raise CatalogError(path, where, f"must be an array of tables [[{where}]]")
    return value


def _load_run(path: str, raw: Any, file: Path, logger: Any) -> RunSpec:
    table = _table(path, "run", raw)
    check_keys(path, "run", table, RUN_KEYS)
    name = table.get("name", file.name.split(".")[0])
    if not isinstance(name, str) or not name or any(c.isspace() for c in name):
        raise CatalogError(path, "run", "name must be one word without spaces")
    duration = duration_field(path, "run", table, "duration", positive=True)
    seed = table.get("seed", 0)
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise CatalogError(path, "run", f"seed must be a non-negative integer, got {seed!r}")
    origin = table.get("origin")
    if origin is not None and (not isinstance(origin, str) or not ORIGIN_RE.match(origin)):
        raise CatalogError(path, "run", f"origin {origin!r} is not a UTC time such as "
                           "\"2026-11-30T21:00:00Z\"")
    status_every = duration_field(path, "run", table, "status_every", positive=True)
    attribute = table.get("attribute_errors", False)
    if not isinstance(attribute, bool):
        raise CatalogError(path, "run", "attribute_errors must be true or false")
    ack, view = _load_logger(path, logger)
    return RunSpec(name, duration or DEFAULT_DURATION_NS, seed, origin, status_every, attribute,
                   ack, _load_meta(path, table.get("meta", {})), view)


def _load_meta(path: str, raw: Any) -> tuple[tuple[str, str], ...]:
    """``[run] meta = { vehicle = "utv-03" }``: words for the log's ``%meta`` line."""
    if not isinstance(raw, dict):
        raise CatalogError(path, "run", "meta must be a table such as { vehicle = \"utv-03\" }")
    out = []
    for key, value in raw.items():
        if not META_KEY_RE.match(key) or key in RESERVED_META:
            raise CatalogError(path, "run", f"meta key {key!r} must match [a-z0-9_]+ and not be "
                               f"one of {', '.join(RESERVED_META)}")
        if not isinstance(value, str | int | float) or isinstance(value, bool) or not str(value) \
                or any(c.isspace() for c in str(value)):
            raise CatalogError(path, "run", f"meta {key} must be one word without spaces")
        out.append((key, str(value)))
    return tuple(out)


def _load_logger(path: str, raw: Any) -> tuple[bool, str]:
    table = _table(path, "logger", raw)
    check_keys(path, "logger", table, LOGGER_KEYS)
    ack = table.get("ack", False)
    if not isinstance(ack, bool):
        raise CatalogError(path, "logger", "ack must be true or false")
    view = table.get("view", "own")
    if view not in LOGGER_VIEWS:
        raise CatalogError(path, "logger", f"view {view!r} is unknown"
                           + (did_you_mean(str(view), LOGGER_VIEWS)
                              or "; use \"own\" or \"detector\""))
    return ack, view


def _number(path: str, where: str, table: Mapping[str, Any], key: str) -> float | None:
    if key not in table:
        return None
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise CatalogError(path, where, f"{key} must be a number, got {value!r}")
    return float(value)


def _load_behaviour(path: str, raw: Mapping[str, Any], catalog: Catalog
                    ) -> dict[str, NodeBehaviour]:
    out: dict[str, NodeBehaviour] = {}
    for name in catalog.nodes:
        table = raw.get(name, {})
        where = f"node.{name}"
        drift = _number(path, where, table, "drift_ppm") or 0.0
        if abs(drift) > MAX_DRIFT_PPM:
            raise CatalogError(path, where, f"drift_ppm {drift:g} is beyond +-{MAX_DRIFT_PPM:g}")
        recovery = table.get("recovery", "auto")
        if recovery not in ("auto", "software"):
            raise CatalogError(path, where, f"recovery must be 'auto' or 'software', got "
                               f"{recovery!r}")
        delay = duration_field(path, where, table, "recovery_delay") or 0
        if delay and recovery != "software":
            raise CatalogError(path, where, "recovery_delay needs recovery = \"software\"")
        out[name] = NodeBehaviour(name, drift, recovery, delay)
    return out


def _load_schedules(path: str, raw: list[Any], catalog: Catalog) -> tuple[ScheduleSpec, ...]:
    out = []
    for index, (table, spec) in enumerate(zip(raw, catalog.messages, strict=True), start=1):
        where = f"message {index}"
        jitter = duration_field(path, where, table, "jitter") or 0
        offset = duration_field(path, where, table, "offset")
        event_every = duration_field(path, where, table, "event_every", positive=True)
        if spec.period_ns is not None:
            if event_every is not None:
                raise CatalogError(path, where, "event_every is for messages without period")
            if jitter >= spec.period_ns:
                raise CatalogError(path, where, "jitter must be shorter than the period")
        # a message with signals writes them unless the scenario says otherwise
        payload = table.get("payload", "signal" if spec.signals else "counter")
        constant = b""
        if not isinstance(payload, str):
            raise CatalogError(path, where, "payload must be a string")
        kind = payload.split(":", 1)[0]
        if kind not in PAYLOAD_KINDS:
            raise CatalogError(path, where, f"payload '{payload}' is unknown"
                               + (did_you_mean(kind, PAYLOAD_KINDS)
                                  or "; use counter, random, constant:HEX or signal"))
        nbytes = grammar_payload_bytes(spec.dlc, spec.fd, spec.rtr)
        if kind == "constant":
            hex_text = payload.split(":", 1)[1] if ":" in payload else ""
            try:
                constant = bytes.fromhex(hex_text)
            except ValueError:
                raise CatalogError(path, where, f"payload constant '{hex_text}' is not "
                                   "hexadecimal") from None
            if len(constant) != nbytes:
                raise CatalogError(path, where, f"payload constant has {len(constant)} bytes, "
                                   f"DLC {spec.dlc} needs {nbytes}")
        elif ":" in payload:
            raise CatalogError(path, where, f"payload '{payload}': only constant takes a value")
        plan = signal_plan(path, where, spec) if kind == "signal" else None
        out.append(ScheduleSpec(jitter, offset, kind, constant, event_every, plan))
    return tuple(out)


def _fault_node_buses(path: str, where: str, table: Mapping[str, Any], catalog: Catalog,
                      needs_node: bool, one_bus: bool) -> tuple[str | None, tuple[str, ...]]:
    node = table.get("node")
    bus = table.get("bus")
    if needs_node:
        if node is None:
            raise CatalogError(path, where, "missing key 'node'")
        if node not in catalog.nodes:
            raise CatalogError(path, where, f"node '{node}' is not a declared node"
                               + did_you_mean(str(node), catalog.nodes))
        on = catalog.nodes[node].buses
        if bus is None:
            if one_bus and len(on) > 1:
                raise CatalogError(path, where, f"node '{node}' is on buses {', '.join(on)}; "
                                   "say which with bus = \"...\"")
            return node, on
        if bus not in on:
            raise CatalogError(path, where, f"node '{node}' is not on bus '{bus}'"
                               + did_you_mean(str(bus), on))
        return node, (bus,)
    if bus is None:
        return None, tuple(catalog.buses)
    if bus not in catalog.buses:
        raise CatalogError(path, where, f"bus '{bus}' is not declared"
                           + did_you_mean(str(bus), catalog.buses))
    return None, (bus,)


def _rate(path: str, where: str, table: Mapping[str, Any], key: str, high: float | None
          ) -> float | None:
    value = _number(path, where, table, key)
    if value is None:
        return None
    if value < 0 or (high is not None and value > high) or (key == "rate" and value == 0):
        limit = f"0..{high:g}" if high is not None else "> 0"
        raise CatalogError(path, where, f"{key} = {value:g} must lie in {limit}")
    return value


def _load_faults(path: str, raw: Any, catalog: Catalog, run: RunSpec) -> tuple[FaultSpec, ...]:
    out: list[FaultSpec] = []
    for index, table in enumerate(_array(path, "fault", raw), start=1):
        where = f"fault {index}"
        table = _table(path, where, table)
        kind = table.get("kind")
        if kind is None:
            raise CatalogError(path, where, "missing key 'kind'")
        if kind not in FAULT_KINDS:
            raise CatalogError(path, where, f"unknown fault kind '{kind}'"
                               + (did_you_mean(str(kind), FAULT_KINDS)
                                  or f"; expected one of {', '.join(FAULT_KINDS)}"))
        check_keys(path, where, table, ("kind", "start", "end") + FAULT_KEYS[kind])
        start = duration_field(path, where, table, "start") or 0
        end = duration_field(path, where, table, "end")
        if end is not None and end <= start:
            raise CatalogError(path, where, "end must come after start")
        needs_node = kind not in ("bus-noise", "logger-loss", "local-noise")
        if kind == "local-noise":
            node, nodes, buses = None, *_local_nodes(path, where, table, catalog)
        else:
            node, buses = _fault_node_buses(path, where, table, catalog, needs_node,
                                            one_bus=kind == "babble")
            nodes = (node,) if node is not None else ()
        fault = FaultSpec(index, kind, node, buses, start, end)
        if kind in NOISE_KINDS:
            fault = _noise(path, where, table, FaultSpec(index, kind, node, buses, start, end,
                                                         nodes=nodes))
        elif kind == "logger-loss":
            rate = _rate(path, where, table, "rate", 1.0)
            fault = FaultSpec(index, kind, None, buses, start, end, rate=1.0 if rate is None
                              else rate)
        elif kind == "drift":
            ppm = _number(path, where, table, "ppm")
            if ppm is None:
                raise CatalogError(path, where, "drift needs ppm = ...")
            if abs(ppm) > MAX_DRIFT_PPM:
                raise CatalogError(path, where, f"ppm {ppm:g} is beyond +-{MAX_DRIFT_PPM:g}")
            fault = FaultSpec(index, kind, node, buses, start, end, ppm=ppm)
        elif kind == "babble":
            fault = _babble(path, where, table, catalog, fault, out)
        out.append(fault)
    return tuple(out)


def _noise(path: str, where: str, table: Mapping[str, Any], fault: FaultSpec) -> FaultSpec:
    """rate (per frame), every = N, or ber (per bit): exactly one of them."""
    every = table.get("every")
    if every is not None and (isinstance(every, bool) or not isinstance(every, int)
                              or every < 1):
        raise CatalogError(path, where, "every must be a positive integer")
    rate = _rate(path, where, table, "rate", 1.0)
    rate_end = _rate(path, where, table, "rate_end", 1.0)
    ber = _rate(path, where, table, "ber", MAX_BER)
    ber_end = _rate(path, where, table, "ber_end", MAX_BER)
    if ber == 0:
        raise CatalogError(path, where, f"ber = 0 must lie in (0, {MAX_BER:g}]")
    if sum(v is not None for v in (rate, every, ber)) != 1:
        raise CatalogError(path, where, f"{fault.kind} needs one of rate (0..1, per frame), "
                           "ber (per bit) or every = N")
    if rate_end is not None and rate is None:
        raise CatalogError(path, where, "rate_end needs rate")
    if ber_end is not None and ber is None:
        raise CatalogError(path, where, "ber_end needs ber")
    return FaultSpec(fault.index, fault.kind, fault.node, fault.buses, fault.start_ns,
                     fault.end_ns, rate=rate, rate_end=rate_end, every=every, ber=ber,
                     ber_end=ber_end, nodes=fault.nodes)


def _local_nodes(path: str, where: str, table: Mapping[str, Any], catalog: Catalog
                 ) -> tuple[tuple[str, ...], tuple[str, ...]]:
    """``nodes = ["a", "b"]`` of a local-noise fault, and the buses they share."""
    nodes = table.get("nodes")
    if not isinstance(nodes, list) or not nodes or not all(isinstance(n, str) for n in nodes):
        raise CatalogError(path, where, "local-noise needs nodes = [\"name\", ...]")
    for n in nodes:
        if n not in catalog.nodes:
            raise CatalogError(path, where, f"node '{n}' is not a declared node"
                               + did_you_mean(n, catalog.nodes))
    if len(set(nodes)) != len(nodes):
        raise CatalogError(path, where, "nodes lists a node twice")
    shared = [b for b in catalog.nodes[nodes[0]].buses
              if all(b in catalog.nodes[n].buses for n in nodes)]
    bus = table.get("bus")
    if bus is not None:
        if bus not in shared:
            raise CatalogError(path, where, f"not every node of {nodes} is on bus '{bus}'")
        return tuple(nodes), (bus,)
    if not shared:
        raise CatalogError(path, where, f"the nodes {nodes} share no bus")
    return tuple(nodes), tuple(shared)


def _babble(path: str, where: str, table: Mapping[str, Any], catalog: Catalog,
            fault: FaultSpec, earlier: list[FaultSpec]) -> FaultSpec:
    rate = _rate(path, where, table, "rate", None)
    if rate is None:
        raise CatalogError(path, where, "babble needs rate = frames per second")
    form = table.get("form", "s")
    flags = parse_form(form) if isinstance(form, str) else None
    if flags is None or flags[4]:
        raise CatalogError(path, where, f"form {form!r} is not a frame form (s, x, sf, ...)")
    ext, rtr, fd, brs, _ = flags
    bus = fault.buses[0]
    if brs and catalog.buses[bus].data_bps is None:
        raise CatalogError(path, where, f"bus '{bus}' declares no data rate for form '{form}'")
    ident = table.get("id", "000")
    if not isinstance(ident, str) or not HEX_ID_RE.match(ident):
        raise CatalogError(path, where, f"id {ident!r} is not hexadecimal (e.g. \"000\")")
    frame_id = int(ident, 16)
    if frame_id > (MAX_EXTENDED_ID if ext else MAX_BASE_ID):
        raise CatalogError(path, where, f"id {ident} does not fit the form '{form}'")
    dlc = table.get("dlc", 8)
    if isinstance(dlc, bool) or not isinstance(dlc, int) or not 0 <= dlc <= 15:
        raise CatalogError(path, where, f"dlc must be an integer 0..15, got {dlc!r}")
    for number, msg in enumerate(catalog.messages, start=1):
        if (msg.bus, msg.id, msg.ext) == (bus, frame_id, ext):
            raise CatalogError(path, where, f"babble id {ident} is already used on bus "
                               f"'{bus}' by message {number}"
                               + (f" ({msg.name})" if msg.name else ""))
    for other in earlier:
        if (other.kind == "babble" and other.buses == fault.buses
                and other.babble_id == frame_id and other.babble_form[0] == form[0]):
            raise CatalogError(path, where, f"babble id {ident} on bus '{bus}' is already "
                               f"used by fault {other.index}")
    return FaultSpec(fault.index, "babble", fault.node, fault.buses, fault.start_ns,
                     fault.end_ns, rate=rate, babble_id=frame_id, babble_form=form,
                     babble_dlc=dlc)


def _load_marks(path: str, raw: Any, catalog: Catalog) -> tuple[MarkSpec, ...]:
    out = []
    for index, table in enumerate(_array(path, "mark", raw), start=1):
        where = f"mark {index}"
        table = _table(path, where, table)
        check_keys(path, where, table, MARK_KEYS)
        at = duration_field(path, where, table, "at")
        if at is None:
            raise CatalogError(path, where, "missing key 'at' (e.g. at = \"90s\")")
        text = table.get("text")
        if not isinstance(text, str) or not text.strip():
            raise CatalogError(path, where, "text must be a non-empty string")
        if any(c in text for c in "\t\r\n"):
            raise CatalogError(path, where, "text must be one line without tabs")
        bus = table.get("bus", ALL_BUSES)
        if bus != ALL_BUSES and bus not in catalog.buses:
            raise CatalogError(path, where, f"bus '{bus}' is not declared"
                               + did_you_mean(str(bus), catalog.buses))
        out.append(MarkSpec(at, bus, text))
    return tuple(out)
