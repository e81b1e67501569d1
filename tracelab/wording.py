"""Small wording rules shared by every command's output, so the words agree everywhere."""

from __future__ import annotations

#: Nouns whose plural is not the noun + "s".
_IRREGULAR = {"status": "status", "loss": "losses", "backward time step": "backward time steps", "entry": "entries", "backward step": "backward steps"}


def counted(n: int, noun: str) -> str:
    """``counted(1, "mark")`` -> "1 mark", ``counted(1200, "frame")`` -> "1,200 frames"."""
    if n == 1:
        return f"1 {noun}"
    return f"{n:,} {_IRREGULAR.get(noun, noun + 's')}"
