"""The ``signal`` payload mode: payloads built from the catalog's ``[[message.signal]]`` tables.

Each signal gets a value profile over logger time (``profile`` in the scenario, physical
units), counters count the sender's releases (so a release that is never sent, or suppressed,
shows as a counter jump of the receiver) and checksums are computed last over their bytes.
Everything is vectorised over the releases of one message (tracelab.network.payload).

    profile = { kind = "constant", value = 3 }
    profile = { kind = "ramp", from = 20.0, to = 90.0, start = "0s", end = "10m" }
    profile = { kind = "steps", at = ["0s", "2m"], values = [0, 60] }
    profile = { kind = "curve", at = ["0s", "3m", "6m"], values = [40, 45, 98] }  # linear
    profile = { kind = "sine", mean = 50.0, amplitude = 10.0, period = "60s" }
    profile = { kind = "counter", skip_every = 500 }   # counters: the sender skips a value
    noise = 0.5                                       # any kind but counter: Gaussian sigma
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from tracelab.errors import CatalogError, did_you_mean
from tracelab.network.catalog import MessageSpec, SignalSpec, check_keys, duration_field
from tracelab.network.payload import crc_rows, insert_raw

PROFILE_KEYS: dict[str, tuple[str, ...]] = {
    "constant": ("value", "noise"),
    "ramp": ("from", "to", "start", "end", "noise"),
    "steps": ("at", "values", "noise"),
    "curve": ("at", "values", "noise"),
    "sine": ("mean", "amplitude", "period", "noise"),
    "counter": ("skip_every",),
}


@dataclass(frozen=True)
class Profile:
    """A value profile in physical units; times in ns of logger time."""

    kind: str = "constant"
    value: float = 0.0
    start: float = 0.0
    end: float = 0.0
    start_ns: int = 0
    end_ns: int | None = None
    at_ns: tuple[int, ...] = ()
    values: tuple[float, ...] = ()
    period_ns: int = 1
    noise: float = 0.0
    skip_every: int | None = None


@dataclass(frozen=True)
class SignalPlan:
    """How to write the payload of one message: its signals and their profiles."""

    message: MessageSpec
    profiles: tuple[Profile, ...]  # aligned with message.signals

    @property
    def nbytes(self) -> int:
        return self.message.signals[0].nbytes if self.message.signals else 0


def _num(path: str, where: str, table: Mapping[str, Any], key: str, default: float | None
         ) -> float:
    value = table.get(key, default)
    if value is None:
        raise CatalogError(path, where, f"profile needs '{key}'")
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise CatalogError(path, where, f"profile {key} must be a number, got {value!r}")
    return float(value)


def load_profile(path: str, where: str, spec: SignalSpec) -> Profile:
    """Validate one signal's ``profile`` (None: constant 0, or a plain counter)."""
    raw = spec.profile
    if raw is None:
        return Profile("counter") if spec.role == "counter" else Profile()
    if not isinstance(raw, dict):
        raise CatalogError(path, where, "profile must be a table such as "
                           "{ kind = \"ramp\", from = 20.0, to = 90.0 }")
    kind = raw.get("kind", "constant")
    if kind not in PROFILE_KEYS:
        raise CatalogError(path, where, f"profile kind {kind!r} is unknown"
                           + (did_you_mean(str(kind), PROFILE_KEYS)
                              or f"; use one of {', '.join(PROFILE_KEYS)}"))
    if (kind == "counter") != (spec.role == "counter"):
        raise CatalogError(path, where, "profile kind \"counter\" is for role = \"counter\" "
                           "signals (and they take no other kind)")
    check_keys(path, f"{where} profile", raw, ("kind", *PROFILE_KEYS[kind]))
    noise = _num(path, where, raw, "noise", 0.0)
    if noise < 0:
        raise CatalogError(path, where, "profile noise must not be negative")
    if kind == "constant":
        return Profile(kind, value=_num(path, where, raw, "value", 0.0), noise=noise)
    if kind == "ramp":
        return Profile(kind, start=_num(path, where, raw, "from", None),
                       end=_num(path, where, raw, "to", None),
                       start_ns=duration_field(path, where, raw, "start") or 0,
                       end_ns=duration_field(path, where, raw, "end"), noise=noise)
    if kind in ("steps", "curve"):
        at, values = raw.get("at"), raw.get("values")
        if not isinstance(at, list) or not isinstance(values, list) or not at \
                or len(at) != len(values):
            raise CatalogError(path, where, f"{kind} needs at = [times] and values = [numbers] "
                               "of the same length")
        times = [duration_field(path, where, {"at": a}, "at") or 0 for a in at]
        if times != sorted(times):
            raise CatalogError(path, where, f"{kind}: times in at must increase")
        numbers = [_num(path, where, {"v": v}, "v", None) for v in values]
        return Profile(kind, at_ns=tuple(times), values=tuple(numbers), noise=noise)
    if kind == "sine":
        period = duration_field(path, where, raw, "period", positive=True)
        return Profile(kind, value=_num(path, where, raw, "mean", 0.0),
                       start=_num(path, where, raw, "amplitude", None),
                       period_ns=period or 60_000_000_000, noise=noise)
    skip = raw.get("skip_every")
    if skip is not None and (isinstance(skip, bool) or not isinstance(skip, int) or skip < 2):
        raise CatalogError(path, where, "skip_every must be an integer of at least 2")
    return Profile(kind, skip_every=skip)


def signal_plan(path: str, where: str, message: MessageSpec) -> SignalPlan:
    """The plan of a ``payload = "signal"`` message; errors name the signal."""
    if not message.signals:
        raise CatalogError(path, where, "payload \"signal\" needs [[message.signal]] tables")
    return SignalPlan(message, tuple(
        load_profile(path, f"{where} signal '{s.name}'", s) for s in message.signals))


def profile_values(profile: Profile, t_ns: np.ndarray, rng: np.random.Generator
                   ) -> np.ndarray:
    """Physical values of a profile at the release instants ``t_ns``."""
    t = t_ns.astype(np.float64)
    if profile.kind == "ramp":
        end = profile.end_ns if profile.end_ns is not None else float(t.max(initial=1.0))
        span = max(1.0, end - profile.start_ns)
        share = np.clip((t - profile.start_ns) / span, 0.0, 1.0)
        values = profile.start + share * (profile.end - profile.start)
    elif profile.kind == "curve":  # piecewise linear, flat before the first / after the last
        values = np.interp(t, np.asarray(profile.at_ns, dtype=np.float64),
                           np.asarray(profile.values, dtype=np.float64))
    elif profile.kind == "steps":
        where = np.searchsorted(np.asarray(profile.at_ns), t_ns, side="right") - 1
        values = np.asarray(profile.values)[np.clip(where, 0, None)]
    elif profile.kind == "sine":
        values = profile.value + profile.start * np.sin(2 * np.pi * t / profile.period_ns)
    else:
        values = np.full(len(t), profile.value)
    if profile.noise:
        values = values + rng.normal(0.0, profile.noise, len(t))
    return values


def to_raw(values: np.ndarray, spec: SignalSpec) -> np.ndarray:
    """Physical values to raw integers (rounded, clipped to the signal's raw range)."""
    raw = np.rint((values - spec.offset) / spec.scale)
    low, high = ((-(2.0 ** (spec.length - 1)), 2.0 ** (spec.length - 1) - 1) if spec.signed
                 else (0.0, 2.0 ** spec.length - 1))
    clipped = np.clip(raw, low, high)
    if spec.length == 64 and not spec.signed:
        return clipped.astype(np.uint64).view(np.int64)
    return clipped.astype(np.int64)


def counter_values(profile: Profile, spec: SignalSpec, release: np.ndarray) -> np.ndarray:
    """The counter of each release number: step per release, plus one extra step at every
    ``skip_every``-th release (the sender skipping a value), modulo 2**length."""
    count = release.astype(np.int64)
    if profile.skip_every:
        count = count + (release // profile.skip_every)
    out = count * spec.step
    return out & np.int64(spec.mask) if spec.length < 64 else out


def sender_skips(profile: Profile, release: np.ndarray) -> int:
    """Values the sender skipped up to the last release in ``release`` (for the truth)."""
    if not profile.skip_every or not len(release):
        return 0
    return int(release.max() // profile.skip_every)


def signal_payloads(plan: SignalPlan, t_ns: np.ndarray, release: np.ndarray,
                    rng: np.random.Generator) -> np.ndarray:
    """(releases, nbytes) payload bytes: every signal written, checksums last.

    ``release`` is each release's number among all the message's releases (suppressed
    ones included), so counters advance across releases that are never sent."""
    # Draw from the scenario's stream exactly what the default counter payload draws (one
    # byte per payload byte) and seed the noise from it: the other messages' releases stay
    # those of the same scenario without signals.
    seed = rng.integers(0, 256, plan.nbytes, dtype=np.uint8)
    rng = np.random.default_rng(int.from_bytes(seed.tobytes(), "little"))
    rows = np.zeros((len(t_ns), plan.nbytes), dtype=np.uint8)
    signals = plan.message.signals
    order = sorted(range(len(signals)), key=lambda i: (
        signals[i].role == "checksum", signals[i].mux is not None))
    written: dict[str, np.ndarray] = {}
    for i in order:  # signals of one message: a handful, each vectorised over releases
        spec, profile = signals[i], plan.profiles[i]
        if spec.role == "checksum" and spec.crc is not None:
            insert_raw(rows, crc_rows(rows, spec.crc, spec.over).view(np.int64), spec)
            continue
        if spec.role == "counter":
            raw = counter_values(profile, spec, release)
        else:
            raw = to_raw(profile_values(profile, t_ns, rng), spec)
        if spec.mux is not None:
            keep = written.get(spec.mux, np.zeros(len(t_ns), np.int64)) == (spec.mux_value or 0)
            subset = rows[keep]
            insert_raw(subset, raw[keep], spec)
            rows[keep] = subset
        else:
            insert_raw(rows, raw, spec)
        written[spec.name] = raw & spec.mask if spec.length < 64 else raw
    return rows
