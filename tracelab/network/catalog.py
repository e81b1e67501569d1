"""Network catalog: which buses exist, which node sends which identifier and how often.

Every analysis that needs to know "who sends 0C0 every 10 ms" reads the same TOML file
(docs/network-catalog.md). A scenario file (tracelab.simulate) is a catalog with extra keys;
``load_catalog`` accepts those keys so a scenario can be passed wherever a catalog is wanted.
Validation is strict and names the place: ``FILE: [message 3] sender 'vcx' ...``.
"""

from __future__ import annotations

import re
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path
from typing import Any

import numpy as np
import polars as pl

from tracelab.errors import CatalogError, did_you_mean
from tracelab.format.grammar import (
    BUS_ALIAS_RE,
    FORM_RE,
    HEX_ID_RE,
    MAX_BASE_ID,
    MAX_EXTENDED_ID,
    STAMPS,
    id_text,
    parse_form,
    payload_bytes,
)
from tracelab.physics.bitlength import frame_bits_reference, frame_durations_ns

#: Duration units and their length in nanoseconds.
DURATION_UNITS_NS: dict[str, int] = {
    "ns": 1,
    "us": 1_000,
    "ms": 1_000_000,
    "s": 1_000_000_000,
    "m": 60_000_000_000,
    "h": 3_600_000_000_000,
}
_DURATION_PART = r"(\d+(?:\.\d+)?|\.\d+)\s*([a-z]+)"
_DURATION_RE = re.compile(rf"^\s*(?:{_DURATION_PART}\s*)+$")
_DURATION_PART_RE = re.compile(_DURATION_PART)

#: ISO 11898-1 allows at most 1 Mbit/s in the arbitration phase. The data-phase limit is
#: set by transceivers; 16 Mbit/s is above every one we know of. # common practice, no source
MAX_NOMINAL_BPS = 1_000_000
MAX_DATA_BPS = 16_000_000
NODE_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_.-]{0,31}$")

#: Keys a catalog section may hold; scenario keys (tracelab.simulate) are accepted too so
#: that a scenario file is also a valid catalog.
TOP_KEYS = ("bus", "node", "message")
SCENARIO_TOP_KEYS = ("run", "fault", "mark", "logger")
BUS_KEYS = ("nominal", "data", "stamp", "name")
NODE_KEYS = ("buses",)
SCENARIO_NODE_KEYS = ("drift_ppm", "recovery", "recovery_delay")
MESSAGE_KEYS = ("bus", "id", "form", "dlc", "sender", "period", "name", "signal")
SCENARIO_MESSAGE_KEYS = ("jitter", "offset", "payload", "event_every")
#: Keys of a ``[[message.signal]]`` table (docs/network-catalog.md, "Signals").
SIGNAL_KEYS = ("name", "lsb", "length", "order", "signed", "scale", "offset", "unit", "min",
               "max", "values", "role", "mux", "mux_value", "crc", "over", "step", "plot")
SCENARIO_SIGNAL_KEYS = ("profile",)
CRC_KEYS = ("width", "poly", "init", "xorout", "refin", "refout")
SIGNAL_ORDERS = ("little", "big")
SIGNAL_ROLES = ("counter", "checksum")
SIGNAL_NAME_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")
MAX_SIGNAL_BITS = 64
MAX_CRC_WIDTH = 32


def parse_duration_ns(text: str | int) -> int:
    """``"10ms"`` -> 10_000_000. Units ns, us, ms, s, m, h; decimals ("1.5s") and sums
    ("6m40s") allowed.

    An int is taken as nanoseconds. Raises ValueError with a message fit for the user.
    """
    if isinstance(text, bool) or not isinstance(text, int | str):
        raise ValueError(f"duration {text!r} must be a string such as \"10ms\"")
    if isinstance(text, int):
        if text < 0:
            raise ValueError(f"duration {text} must not be negative")
        return text
    match = _DURATION_RE.match(text)
    if not match:
        raise ValueError(f"duration {text!r} is not a number with a unit "
                         f"({', '.join(DURATION_UNITS_NS)}), e.g. \"10ms\"")
    value = Fraction(0)
    for number, unit in _DURATION_PART_RE.findall(text):
        if unit not in DURATION_UNITS_NS:
            raise ValueError(f"duration {text!r} has unknown unit '{unit}'"
                             + (did_you_mean(unit, DURATION_UNITS_NS)
                                or f"; use one of {', '.join(DURATION_UNITS_NS)}"))
        value += Fraction(number) * DURATION_UNITS_NS[unit]
    if value.denominator != 1:
        raise ValueError(f"duration {text!r} is not a whole number of nanoseconds")
    return int(value)


@dataclass(frozen=True)
class BusSpec:
    alias: str
    nominal_bps: int
    data_bps: int | None = None
    stamp: str = "end"
    name: str | None = None


@dataclass(frozen=True)
class NodeSpec:
    name: str
    buses: tuple[str, ...]


@dataclass(frozen=True)
class CrcSpec:
    """A CRC in the parameter model of the public CRC catalogue (width, poly, init, refin,
    refout, xorout); ``poly`` is written without its top bit, MSB-first."""

    width: int
    poly: int
    init: int = 0
    xorout: int = 0
    refin: bool = False
    refout: bool = False


@dataclass(frozen=True)
class SignalSpec:
    """One ``[[message.signal]]``: where its bits lie in an ``nbytes`` payload and how a raw
    value becomes a physical one (physical = raw * scale + offset).

    ``lsb`` = byte * 8 + bit of the least significant bit (bit 0 = the byte's least
    significant bit). ``little``: raw = (int.from_bytes(data, "little") >> lsb) & mask;
    ``big``: raw = (int.from_bytes(data, "big") >> (8 * (n - 1 - byte) + bit)) & mask.
    """

    name: str
    lsb: int
    length: int
    nbytes: int
    order: str = "little"
    signed: bool = False
    scale: float = 1.0
    offset: float = 0.0
    unit: str = ""
    min: float | None = None
    max: float | None = None
    values: tuple[tuple[int, str], ...] = ()
    role: str | None = None
    mux: str | None = None
    mux_value: int | None = None
    crc: CrcSpec | None = None
    over: tuple[int, ...] = ()
    step: int = 1
    plot: bool = False
    #: The scenario's value profile (tracelab.simulate.payloads reads it), as written.
    profile: Any = field(default=None, compare=False, hash=False)

    @property
    def mask(self) -> int:
        return (1 << self.length) - 1

    @property
    def shift(self) -> int:
        """Right shift of the signal in int.from_bytes(data, order) (the formula above)."""
        if self.order == "little":
            return self.lsb
        byte, bit = divmod(self.lsb, 8)
        return 8 * (self.nbytes - 1 - byte) + bit

    def bit_positions(self) -> list[int]:
        """Payload bits the signal occupies, each as byte * 8 + bit."""
        shifted = range(self.shift, self.shift + self.length)
        if self.order == "little":
            return list(shifted)
        return [8 * (self.nbytes - 1 - p // 8) + p % 8 for p in shifted]

    def byte_indices(self) -> list[int]:
        return sorted({p // 8 for p in self.bit_positions()})


@dataclass(frozen=True)
class MessageSpec:
    """One catalogued message; ``period_ns`` None means event-driven."""

    bus: str
    id: int
    ext: bool
    rtr: bool
    fd: bool
    brs: bool
    dlc: int
    sender: str
    period_ns: int | None
    name: str | None
    form: str
    signals: tuple[SignalSpec, ...] = ()

    @property
    def id_hex(self) -> str:
        return id_text(self.id, self.ext)

    @property
    def label(self) -> str:
        """The name, or the hex identifier when the catalog gives none."""
        return self.name or self.id_hex


@dataclass(frozen=True)
class Catalog:
    path: Path
    buses: dict[str, BusSpec]
    nodes: dict[str, NodeSpec]
    messages: tuple[MessageSpec, ...]
    _by_key: dict[tuple[str, int, bool], MessageSpec] = field(
        default_factory=dict, repr=False, compare=False)

    def __post_init__(self) -> None:
        if not self._by_key:
            self._by_key.update({(m.bus, m.id, m.ext): m for m in self.messages})

    def messages_frame(self) -> pl.DataFrame:
        """One row per message; ``name`` falls back to the hex identifier."""
        ms = self.messages
        return pl.DataFrame(
            {
                "bus": [m.bus for m in ms],
                "id": [m.id for m in ms],
                "ext": [m.ext for m in ms],
                "name": [m.label for m in ms],
                "sender": [m.sender for m in ms],
                "period_ns": [m.period_ns for m in ms],
                "dlc": [m.dlc for m in ms],
                "fd": [m.fd for m in ms],
                "brs": [m.brs for m in ms],
            },
            schema={"bus": pl.Utf8, "id": pl.UInt32, "ext": pl.Boolean, "name": pl.Utf8,
                    "sender": pl.Utf8, "period_ns": pl.Int64, "dlc": pl.UInt8,
                    "fd": pl.Boolean, "brs": pl.Boolean},
        )

    def message(self, bus: str, frame_id: int, ext: bool) -> MessageSpec | None:
        return self._by_key.get((bus, frame_id, ext))

    def sender_of(self, bus: str, frame_id: int, ext: bool) -> str | None:
        spec = self._by_key.get((bus, frame_id, ext))
        return spec.sender if spec else None

    def nodes_on(self, bus: str) -> list[str]:
        """Nodes attached to this bus, in declaration order."""
        return [n.name for n in self.nodes.values() if bus in n.buses]


# --- loading ------------------------------------------------------------------------------


def read_toml(path: str | Path) -> dict[str, Any]:
    """Parse a TOML file; syntax errors become a one-line CatalogError with the position."""
    path = Path(path)
    try:
        with open(path, "rb") as handle:
            return tomllib.load(handle)
    except FileNotFoundError:
        raise CatalogError(str(path), None, "file not found") from None
    except IsADirectoryError:
        raise CatalogError(str(path), None, "is a directory, expected a TOML file") from None
    except tomllib.TOMLDecodeError as error:
        raise CatalogError(str(path), "toml", str(error)) from None
    except UnicodeDecodeError:
        raise CatalogError(str(path), "toml", "not UTF-8 text") from None


def load_catalog(path: str | Path) -> Catalog:
    """Read and validate a catalog (or scenario) TOML file."""
    return catalog_from_toml(path, read_toml(path))


def check_keys(path: str, where: str, table: Mapping[str, Any], allowed: Iterable[str]) -> None:
    """Reject keys outside ``allowed`` with a did-you-mean hint."""
    allowed = tuple(allowed)
    for key in table:
        if key not in allowed:
            raise CatalogError(path, where, f"unknown key '{key}'" + (
                did_you_mean(key, allowed) or f"; expected one of {', '.join(allowed)}"))


def duration_field(path: str, where: str, table: Mapping[str, Any], key: str,
                   positive: bool = False) -> int | None:
    """``table[key]`` as nanoseconds (None when absent); errors name the place."""
    if key not in table:
        return None
    try:
        value = parse_duration_ns(table[key])
    except ValueError as error:
        raise CatalogError(path, where, f"{key}: {error}") from None
    if positive and value <= 0:
        raise CatalogError(path, where, f"{key} must be longer than 0")
    return value


def _int_field(path: str, where: str, table: Mapping[str, Any], key: str,
               low: int, high: int, required: bool = True) -> int | None:
    if key not in table:
        if required:
            raise CatalogError(path, where, f"missing key '{key}'")
        return None
    value = table[key]
    if isinstance(value, bool) or not isinstance(value, int):
        raise CatalogError(path, where, f"{key} must be an integer, got {value!r}")
    if not low <= value <= high:
        raise CatalogError(path, where, f"{key} = {value} is outside {low}..{high}")
    return value


def _section(path: str, data: Mapping[str, Any], key: str) -> dict[str, Any]:
    value = data.get(key, {})
    if not isinstance(value, dict):
        raise CatalogError(path, key, f"'{key}' must be a table such as [{key}.NAME]")
    return value


def catalog_from_toml(path: str | Path, data: Mapping[str, Any]) -> Catalog:
    """Validate parsed TOML into a Catalog; the first problem raises CatalogError."""
    spath = str(path)
    check_keys(spath, "top level", data, TOP_KEYS + SCENARIO_TOP_KEYS)
    buses = _load_buses(spath, _section(spath, data, "bus"))
    nodes = _load_nodes(spath, _section(spath, data, "node"), buses)
    raw_messages = data.get("message", [])
    if not isinstance(raw_messages, list):
        raise CatalogError(spath, "message", "messages must be an array of tables [[message]]")
    messages = _load_messages(spath, raw_messages, buses, nodes)
    return Catalog(Path(path), buses, nodes, messages)


def _load_buses(path: str, section: dict[str, Any]) -> dict[str, BusSpec]:
    if not section:
        raise CatalogError(path, "bus", "no bus declared; add e.g. [bus.P] nominal = 500000")
    buses: dict[str, BusSpec] = {}
    for alias, table in section.items():
        where = f"bus.{alias}"
        if not BUS_ALIAS_RE.match(alias):
            raise CatalogError(path, where, "bus alias must be 1-16 letters, digits, '_' or '-'")
        if not isinstance(table, dict):
            raise CatalogError(path, where, "must be a table")
        check_keys(path, where, table, BUS_KEYS)
        nominal = _int_field(path, where, table, "nominal", 1_000, MAX_NOMINAL_BPS)
        data_bps = _int_field(path, where, table, "data", 1_000, MAX_DATA_BPS, required=False)
        assert nominal is not None
        if data_bps is not None and data_bps < nominal:
            raise CatalogError(path, where, f"data rate {data_bps} is below the nominal "
                               f"rate {nominal}")
        stamp = table.get("stamp", "end")
        if stamp not in STAMPS:
            raise CatalogError(path, where, f"stamp must be one of {', '.join(STAMPS)}, "
                               f"got {stamp!r}")
        name = table.get("name")
        if name is not None and (not isinstance(name, str) or not re.match(r"^\S+$", name)):
            raise CatalogError(path, where, "name must be one word without spaces")
        buses[alias] = BusSpec(alias, nominal, data_bps, stamp, name)
    return buses


def _load_nodes(path: str, section: dict[str, Any], buses: dict[str, BusSpec]
                ) -> dict[str, NodeSpec]:
    nodes: dict[str, NodeSpec] = {}
    for name, table in section.items():
        where = f"node.{name}"
        if not NODE_NAME_RE.match(name):
            raise CatalogError(path, where, "node name must start with a letter and hold at "
                               "most 32 letters, digits, '_', '.' or '-'")
        if not isinstance(table, dict):
            raise CatalogError(path, where, "must be a table")
        check_keys(path, where, table, NODE_KEYS + SCENARIO_NODE_KEYS)
        on = table.get("buses")
        if on is None:
            raise CatalogError(path, where, "missing key 'buses' (e.g. buses = [\"P\"])")
        if not isinstance(on, list) or not on or not all(isinstance(b, str) for b in on):
            raise CatalogError(path, where, "buses must be a non-empty list of bus aliases")
        for bus in on:
            if bus not in buses:
                raise CatalogError(path, where, f"bus '{bus}' is not declared"
                                   + did_you_mean(bus, buses))
        if len(set(on)) != len(on):
            raise CatalogError(path, where, "a bus is listed twice")
        nodes[name] = NodeSpec(name, tuple(on))
    return nodes


def _parse_id(path: str, where: str, value: Any) -> int:
    if isinstance(value, bool):
        raise CatalogError(path, where, "id must be a hex string such as \"0C0\"")
    if isinstance(value, int):
        return value
    if not isinstance(value, str) or not HEX_ID_RE.match(value):
        raise CatalogError(path, where, f"id {value!r} is not hexadecimal (e.g. \"0C0\")")
    return int(value, 16)


def _load_messages(path: str, raw: list[Any], buses: dict[str, BusSpec],
                   nodes: dict[str, NodeSpec]) -> tuple[MessageSpec, ...]:
    # Loops over catalogue entries (tens to hundreds), not over frames.
    seen: dict[tuple[str, int, bool], int] = {}
    out: list[MessageSpec] = []
    for index, table in enumerate(raw, start=1):
        where = f"message {index}"
        if not isinstance(table, dict):
            raise CatalogError(path, where, "must be a table")
        check_keys(path, where, table, MESSAGE_KEYS + SCENARIO_MESSAGE_KEYS)
        for key in ("bus", "id", "dlc", "sender"):
            if key not in table:
                raise CatalogError(path, where, f"missing key '{key}'")
        bus = table["bus"]
        if bus not in buses:
            raise CatalogError(path, where, f"bus '{bus}' is not declared"
                               + did_you_mean(str(bus), buses))
        form = table.get("form", "s")
        flags = parse_form(form) if isinstance(form, str) else None
        if flags is None or not FORM_RE.match(form):
            raise CatalogError(path, where, f"form {form!r} is not a frame form "
                               "(s, x, sr, xr, sf, sfb, xf, xfb)")
        ext, rtr, fd, brs, esi = flags
        if esi:
            raise CatalogError(path, where, "form letter 'e' (ESI) is set by the "
                               "transmitter's error state, not by the catalog")
        if brs and buses[bus].data_bps is None:
            raise CatalogError(path, where, f"form '{form}' switches the bit rate but bus "
                               f"'{bus}' declares no data rate")
        frame_id = _parse_id(path, where, table["id"])
        limit = MAX_EXTENDED_ID if ext else MAX_BASE_ID
        if not 0 <= frame_id <= limit:
            raise CatalogError(path, where, f"id {frame_id:X} does not fit a "
                               f"{'29' if ext else '11'}-bit identifier (max {limit:X})")
        dlc = _int_field(path, where, table, "dlc", 0, 15)
        assert dlc is not None
        sender = table["sender"]
        if sender not in nodes:
            raise CatalogError(path, where, f"sender '{sender}' is not a declared node"
                               + did_you_mean(str(sender), nodes))
        if bus not in nodes[sender].buses:
            raise CatalogError(path, where, f"sender '{sender}' is not on bus '{bus}' "
                               f"(it is on {', '.join(nodes[sender].buses)})")
        name = table.get("name")
        if name is not None and (not isinstance(name, str) or not name.strip()):
            raise CatalogError(path, where, "name must be a non-empty string")
        period_ns = duration_field(path, where, table, "period", positive=True)
        ident = (bus, frame_id, ext)
        if ident in seen:
            first = raw[seen[ident] - 1].get("name")
            raise CatalogError(path, where, f"id {table['id']} is already used on bus "
                               f"'{bus}' by message {seen[ident]}"
                               + (f" ({first})" if first else ""))
        seen[ident] = index
        duration_ns = _heavy_duration_ns(buses[bus], frame_id, ext, rtr, fd, brs, dlc)
        if period_ns is not None and period_ns < duration_ns:
            raise CatalogError(path, where, f"period {table['period']} is shorter than "
                               f"the frame itself ({duration_ns} ns on the bus)")
        signals = _load_signals(path, where, table.get("signal", []),
                                payload_bytes(dlc, fd, rtr))
        out.append(MessageSpec(bus, frame_id, ext, rtr, fd, brs, dlc, sender, period_ns,
                               name, form, signals))
    return tuple(out)


# --- signals ------------------------------------------------------------------------------


def _number(path: str, where: str, table: Mapping[str, Any], key: str,
            default: float | None) -> float | None:
    value = table.get(key, default)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise CatalogError(path, where, f"{key} must be a number, got {value!r}")
    if value != value or value in (float("inf"), float("-inf")):
        raise CatalogError(path, where, f"{key} must be a finite number")
    return value


def _bool(path: str, where: str, table: Mapping[str, Any], key: str) -> bool:
    value = table.get(key, False)
    if not isinstance(value, bool):
        raise CatalogError(path, where, f"{key} must be true or false, got {value!r}")
    return value


def _load_crc(path: str, where: str, raw: Any, length: int) -> CrcSpec:
    if not isinstance(raw, dict):
        raise CatalogError(path, where, "crc must be a table such as { width = 8, poly = 0x1D, "
                           "init = 0xFF, xorout = 0xFF }")
    check_keys(path, f"{where} crc", raw, CRC_KEYS)
    width = _int_field(path, f"{where} crc", raw, "width", 1, MAX_CRC_WIDTH)
    assert width is not None
    if width != length:
        raise CatalogError(path, where, f"crc width {width} differs from the signal's length "
                           f"{length}")
    top = (1 << width) - 1
    poly = _int_field(path, f"{where} crc", raw, "poly", 1, top)
    init = _int_field(path, f"{where} crc", raw, "init", 0, top, required=False) or 0
    xorout = _int_field(path, f"{where} crc", raw, "xorout", 0, top, required=False) or 0
    assert poly is not None
    return CrcSpec(width, poly, init, xorout, _bool(path, f"{where} crc", raw, "refin"),
                   _bool(path, f"{where} crc", raw, "refout"))


def _load_signals(path: str, message: str, raw: Any, nbytes: int) -> tuple[SignalSpec, ...]:
    """Validate the ``[[message.signal]]`` tables of one message (a payload of ``nbytes``)."""
    if not isinstance(raw, list):
        raise CatalogError(path, message, "signals must be an array of tables "
                           "[[message.signal]]")
    out: list[SignalSpec] = []
    for index, table in enumerate(raw, start=1):  # signals of one message: a handful
        where = f"{message} signal {index}"
        if not isinstance(table, dict):
            raise CatalogError(path, where, "must be a table")
        check_keys(path, where, table, SIGNAL_KEYS + SCENARIO_SIGNAL_KEYS)
        name = table.get("name")
        if not isinstance(name, str) or not SIGNAL_NAME_RE.match(name):
            raise CatalogError(path, where, "name must be 1-64 letters, digits or '_', "
                               f"starting with a letter or '_' (got {name!r})")
        where = f"{message} signal '{name}'"
        if any(s.name == name for s in out):
            raise CatalogError(path, where, "name is used twice in this message")
        if nbytes == 0:
            raise CatalogError(path, where, "the message carries no payload bytes")
        lsb = _int_field(path, where, table, "lsb", 0, 8 * nbytes - 1)
        length = _int_field(path, where, table, "length", 1, MAX_SIGNAL_BITS)
        assert lsb is not None and length is not None
        order = table.get("order", "little")
        if order not in SIGNAL_ORDERS:
            raise CatalogError(path, where, f"order must be \"little\" or \"big\", got "
                               f"{order!r}" + did_you_mean(str(order), SIGNAL_ORDERS))
        signed = _bool(path, where, table, "signed")
        scale = _number(path, where, table, "scale", 1.0)
        offset = _number(path, where, table, "offset", 0.0)
        assert scale is not None and offset is not None
        if scale == 0:
            raise CatalogError(path, where, "scale must not be 0")
        low = _number(path, where, table, "min", None)
        high = _number(path, where, table, "max", None)
        if low is not None and high is not None and low > high:
            raise CatalogError(path, where, f"min {low} is above max {high}")
        unit = table.get("unit", "")
        if not isinstance(unit, str):
            raise CatalogError(path, where, "unit must be a string such as \"degC\"")
        role = table.get("role")
        if role is not None and role not in SIGNAL_ROLES:
            raise CatalogError(path, where, f"role must be \"counter\" or \"checksum\", got "
                               f"{role!r}" + did_you_mean(str(role), SIGNAL_ROLES))
        if role is not None and signed:
            raise CatalogError(path, where, f"a {role} is unsigned; drop 'signed = true'")
        spec = SignalSpec(name, lsb, length, nbytes, order, signed, float(scale), float(offset),
                          unit, low, high, plot=_bool(path, where, table, "plot"),
                          profile=table.get("profile"))
        _check_fits(path, where, spec)
        values = _load_values(path, where, table.get("values", {}), spec)
        step, crc, over = _load_role(path, where, table, spec, role)
        mux, mux_value = _load_mux(path, where, table, name)
        spec = SignalSpec(name, lsb, length, nbytes, order, signed, float(scale), float(offset),
                          unit, low, high, values, role, mux, mux_value, crc, over, step,
                          spec.plot, spec.profile)
        _check_overlaps(path, where, spec, out)
        out.append(spec)
    for spec in out:  # a selector must be an ordinary, unmultiplexed signal of this message
        if spec.mux is None:
            continue
        selector = next((s for s in out if s.name == spec.mux), None)
        where = f"{message} signal '{spec.name}'"
        if selector is None:
            raise CatalogError(path, where, f"mux selector '{spec.mux}' is not a signal of this "
                               "message" + did_you_mean(spec.mux, [s.name for s in out]))
        if selector.mux is not None:
            raise CatalogError(path, where, f"mux selector '{spec.mux}' is itself multiplexed "
                               "(nested multiplexing is not supported)")
        assert spec.mux_value is not None
        if spec.mux_value > selector.mask:
            raise CatalogError(path, where, f"mux_value {spec.mux_value} does not fit the "
                               f"{selector.length}-bit selector '{selector.name}'")
    return tuple(out)


def _check_fits(path: str, where: str, spec: SignalSpec) -> None:
    n = spec.nbytes
    if spec.shift + spec.length > 8 * n:
        byte, bit = divmod(spec.lsb, 8)
        how = (f"bits {spec.lsb}..{spec.lsb + spec.length - 1}" if spec.order == "little" else
               f"{spec.length} bits from byte {byte} bit {bit} towards byte 0")
        raise CatalogError(path, where, f"{how} do not fit the {n}-byte payload "
                           f"({8 * n} bits)")


def _load_values(path: str, where: str, raw: Any, spec: SignalSpec
                 ) -> tuple[tuple[int, str], ...]:
    if not isinstance(raw, dict):
        raise CatalogError(path, where, "values must be a table such as { 0 = \"off\" }")
    out = []
    for key, text in raw.items():
        try:
            number = int(key, 0)
        except ValueError:
            raise CatalogError(path, where, f"values key {key!r} is not an integer") from None
        low, high = (-(1 << (spec.length - 1)), spec.mask >> 1) if spec.signed else \
            (0, spec.mask)
        if not low <= number <= high:
            raise CatalogError(path, where, f"values key {number} does not fit the "
                               f"{spec.length}-bit raw value ({low}..{high})")
        if not isinstance(text, str):
            raise CatalogError(path, where, f"values {key} must name the value as a string")
        out.append((number, text))
    return tuple(sorted(out))


def _load_role(path: str, where: str, table: Mapping[str, Any], spec: SignalSpec,
               role: str | None) -> tuple[int, CrcSpec | None, tuple[int, ...]]:
    if role != "counter" and "step" in table:
        raise CatalogError(path, where, "step is only for role = \"counter\"")
    if role != "checksum":
        for key in ("crc", "over"):
            if key in table:
                raise CatalogError(path, where, f"{key} is only for role = \"checksum\"")
    step = 1
    if role == "counter":
        step = _int_field(path, where, table, "step", 1, spec.mask, required=False) or 1
    if role != "checksum":
        return step, None, ()
    if "crc" not in table:
        raise CatalogError(path, where, "a checksum needs crc = { width = ..., poly = ... }")
    crc = _load_crc(path, where, table["crc"], spec.length)
    own = spec.byte_indices()
    if "over" not in table:
        return step, crc, tuple(b for b in range(spec.nbytes) if b not in own)
    over = table["over"]
    if (not isinstance(over, list) or not over
            or not all(isinstance(b, int) and not isinstance(b, bool) for b in over)):
        raise CatalogError(path, where, "over must be a non-empty list of byte indices")
    for byte in over:
        if not 0 <= byte < spec.nbytes:
            raise CatalogError(path, where, f"over: byte {byte} is outside the "
                               f"{spec.nbytes}-byte payload (0..{spec.nbytes - 1})")
        if byte in own:
            raise CatalogError(path, where, f"over: byte {byte} holds the checksum itself")
    if len(set(over)) != len(over):
        raise CatalogError(path, where, "over: a byte is listed twice")
    return step, crc, tuple(over)


def _load_mux(path: str, where: str, table: Mapping[str, Any], name: str
              ) -> tuple[str | None, int | None]:
    mux = table.get("mux")
    if mux is None:
        if "mux_value" in table:
            raise CatalogError(path, where, "mux_value needs mux = \"selector_name\"")
        return None, None
    if not isinstance(mux, str) or mux == name:
        raise CatalogError(path, where, "mux must name another signal of this message")
    value = _int_field(path, where, table, "mux_value", 0, (1 << MAX_SIGNAL_BITS) - 1)
    return mux, value


def _check_overlaps(path: str, where: str, spec: SignalSpec, earlier: list[SignalSpec]) -> None:
    """Two signals may share bits only when both are multiplexed and never present together
    (different selector values, or different selectors)."""
    mine = set(spec.bit_positions())
    for other in earlier:
        shared = mine & set(other.bit_positions())
        if not shared:
            continue
        both_mux = spec.mux is not None and other.mux is not None
        if both_mux and (spec.mux, spec.mux_value) != (other.mux, other.mux_value):
            continue
        first = min(shared)
        raise CatalogError(path, where, f"overlaps signal '{other.name}' at byte {first // 8} "
                           f"bit {first % 8} (only signals in different mux groups may "
                           "share bits)")


def _heavy_duration_ns(bus: BusSpec, frame_id: int, ext: bool, rtr: bool, fd: bool, brs: bool,
                       dlc: int) -> int:
    """Bus time of this frame with an all-zero payload (close to the most stuff bits)."""
    bits, data_bits = frame_bits_reference(frame_id, ext, rtr, fd, brs, False, dlc,
                                           bytes(payload_bytes(dlc, fd, rtr)))
    durations = frame_durations_ns(np.array([bits]), np.array([data_bits]), bus.nominal_bps,
                                   bus.data_bps if brs else None)
    return int(durations[0])
