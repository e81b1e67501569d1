"""Small wording rules shared by every command's output, so the words agree everywhere."""

from __future__ import annotations

#: Nouns whose plural is not the noun + "s".
_IRREGULAR = {"status": "status", "loss": "losses", "backward time step": "backward time steps", "entry": "entries", "backward step": "backward steps"}


def counted(n: int, noun: str) -> str:
    """``counted(1, "mark")`` -> "1 mark", ``counted(1200, "frame")`` -> "1,200 frames"."""
    if n == 1:
        return f"1 {noun}"
    return f"{n:,} {_IRREGULAR.get(noun, noun + 's')}"


def percent(fraction: object, digits: int = 1, missing: str = "-") -> str:
    """``percent(0.1234)`` -> "12.3 %"; anything that is not a number -> ``missing``."""
    if isinstance(fraction, bool) or not isinstance(fraction, int | float):
        return missing
    return f"{100 * float(fraction):.{digits}f} %"


def file_stem(name: str) -> str:
    """A file name for ``name`` that is safe on every file system and collision-free: kept as
    it is when it uses only ``A-Z a-z 0-9 . _ -``, else sanitised plus a short hash of the
    original (runs ``a<b`` and ``a>b`` become ``a_b-4a826aac`` and ``a_b-998a5be8``)."""
    import hashlib
    import re

    safe = re.sub(r"[^A-Za-z0-9._-]", "_", name).lstrip(".") or "_"
    if safe == name:
        return safe
    return f"{safe[:80]}-{hashlib.sha256(name.encode('utf-8')).hexdigest()[:8]}"
