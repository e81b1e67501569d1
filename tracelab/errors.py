"""The one exception tree of tracelab; every message is written for the user.

    TracelabError                 exit 4 unless a subclass says otherwise
     +-- UsageError               exit 2  bad option values, missing paths
     +-- InputError               exit 3  the user's data is wrong
     |    +-- LogFormatError      FILE:LINE: reason (frame-log format v1)
     |    +-- CatalogError        FILE: [where] reason (network catalog / scenario)
     |    +-- QueryError          a SQL statement DuckDB refused
     +-- StoreError               exit 4  the dataset on disk cannot be read or written
          +-- StorageError        exit 5  the machine refused: no space left, read-only file
                                          system, permission denied, a damaged file on disk

The CLI catches TracelabError once, prints ``str(error)`` on one line and exits with
``error.exit_code``. Anything else is a bug (exit 4, traceback only with TRACELAB_DEBUG=1).
``str()`` of every error is ``printable()``: control characters from a log or a file name
(CR, LF, ESC, BEL, ...) are shown escaped, so a message stays one line and cannot drive
the terminal.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable

EXIT_OK = 0
EXIT_USAGE = 2
EXIT_INPUT = 3
EXIT_INTERNAL = 4
EXIT_STORAGE = 5


#: C0 and C1 control characters, DEL, line and paragraph separators, the bidirectional
#: controls (they reorder what a terminal shows) and the zero-width marks (they hide text):
#: never printed raw, on a terminal or on a page (report/figures.esc uses the same rule).
_UNPRINTABLE = re.compile("[\x00-\x1f\x7f-\x9f\u061c\u200b-\u200f\u2028\u2029"
                          "\u202a-\u202e\u2066-\u2069\ufeff]")
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _escape(match: re.Match[str]) -> str:
    char = match.group()
    if char in _NAMED:
        return _NAMED[char]
    code = ord(char)
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def printable(text: str) -> str:
    """``text`` with control characters escaped (``\\r``, ``\\n``, ``\\t``, ``\\x1b``,
    ``\\u202e``): one line, safe to print on a terminal."""
    return _UNPRINTABLE.sub(_escape, text)


def printable_lines(text: str) -> str:
    """Multi-line output (a summary, a table) made safe for a terminal: each line as
    printable(), but TABs kept."""
    return "\n".join(_UNPRINTABLE.sub(lambda m: "\t" if m.group() == "\t" else _escape(m), line)
                     for line in text.split("\n"))


class TracelabError(Exception):
    exit_code = EXIT_INTERNAL

    def __str__(self) -> str:
        return printable(super().__str__())


class UsageError(TracelabError):
    exit_code = EXIT_USAGE


class InputError(TracelabError):
    exit_code = EXIT_INPUT


class LogFormatError(InputError):
    """A line of a frame log breaks the format; ``str()`` is ``FILE:LINE: reason``."""

    def __init__(self, path: str, line: int | None, reason: str) -> None:
        self.path, self.line, self.reason = str(path), line, reason
        where = f"{self.path}:{line}" if line is not None else self.path
        super().__init__(f"{where}: {reason}")


class CatalogError(InputError):
    """A network catalog or scenario is invalid; ``str()`` is ``FILE: [where] reason``."""

    def __init__(self, path: str, where: str | None, reason: str) -> None:
        self.path, self.where, self.reason = str(path), where, reason
        loc = f" [{where}]" if where else ""
        super().__init__(f"{self.path}:{loc} {reason}")


class QueryError(InputError):
    pass


class StoreError(TracelabError):
    pass


class StorageError(StoreError):
    """The environment, not tracelab nor the input: ``PATH: cannot write (OS reason)``."""

    exit_code = EXIT_STORAGE


def did_you_mean(word: str, choices: Iterable[str]) -> str:
    """Return "; did you mean 'x'?" for the closest choice, or "" when nothing is close."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f"; did you mean '{close[0]}'?" if close else ""
