"""Option values shared by ``capture`` and ``convert``: ``--bus``, ``--meta``, sizes."""

from __future__ import annotations

import re
from dataclasses import dataclass

from tracelab.errors import UsageError
from tracelab.format.grammar import BUS_ALIAS_RE, META_KEY_RE

_SIZE_RE = re.compile(r"^(\d+(?:\.\d+)?)\s*([KMGT]?i?B)$", re.IGNORECASE)
#: Decimal units are powers of 1000, binary ones (KiB ...) powers of 1024.
_SIZE_UNITS = {"b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
               "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}


@dataclass(frozen=True)
class BusOption:
    """One ``--bus [KEY=]ALIAS[,nominal=N][,data=N]``; KEY is an interface (capture) or a value
    of the table's bus column (convert)."""

    key: str | None
    alias: str
    nominal_bps: int | None = None
    data_bps: int | None = None


def parse_bus_option(text: str) -> BusOption:
    head, *options = [part.strip() for part in text.split(",")]
    key, sep, alias = head.partition("=")
    if not sep:
        key, alias = "", head
    if not BUS_ALIAS_RE.match(alias):
        raise UsageError(f"--bus {text}: alias {alias!r} must be 1-16 letters, digits, '_' or '-'")
    rates: dict[str, int] = {}
    for option in options:
        name, sep, value = option.partition("=")
        if name not in ("nominal", "data") or not sep:
            raise UsageError(f"--bus {text}: {option!r} is not nominal=BITS_PER_S or "
                             "data=BITS_PER_S")
        if name in rates:
            raise UsageError(f"--bus {text}: {name}= given twice")
        if not value.isdigit() or int(value) <= 0:
            raise UsageError(f"--bus {text}: {name}={value!r} is not a positive integer bit "
                             "rate (bit/s)")
        rates[name] = int(value)
    if "data" in rates and "nominal" not in rates:
        raise UsageError(f"--bus {text}: data= needs nominal= too")
    return BusOption(key or None, alias, rates.get("nominal"), rates.get("data"))


def parse_meta(items: list[str]) -> dict[str, str]:
    """``["vehicle=utv-07", "site=north"]`` -> dict, checked against the format's ``%meta``."""
    meta: dict[str, str] = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not META_KEY_RE.match(key):
            raise UsageError(f"--meta {item}: write key=value with a key of a-z, 0-9 and '_'")
        if not value or any(c.isspace() for c in value) or value.startswith("="):
            raise UsageError(f"--meta {item}: the value must be one word (no spaces)")
        if key in meta:
            raise UsageError(f"--meta {item}: key {key!r} given twice")
        meta[key] = value
    return meta


def parse_size_bytes(text: str) -> int | None:
    """``"512MB"`` -> 512_000_000, ``"1GiB"`` -> 2**30; None when ``text`` is not a size."""
    match = _SIZE_RE.match(text.strip())
    if not match:
        return None
    return int(float(match.group(1)) * _SIZE_UNITS[match.group(2).lower()])
