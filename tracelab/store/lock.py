"""One writer at a time per dataset: an exclusive advisory lock (``fcntl.flock``) on
``DATASET/.tracelab.lock``.

Every writer (ingest, an analysis writing ``analyses/``, a report computing what is missing)
holds it while it writes; readers never take it (they see the last commit, thanks to the
atomic renames). The lock file holds who took it (pid, host, command, since) so a second
writer that waits in vain can say who is in the way. The kernel drops the lock when its
holder dies (kill -9 included), so a stale lock file never blocks anybody.

The lock is re-entrant within one process: ``report`` holds it and calls ``timing``, which
takes it again without waiting for itself.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import fcntl
import json
import os
import socket
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path

from tracelab.errors import UsageError

LOCK_FILE = ".tracelab.lock"
TIMEOUT_ENV = "TRACELAB_LOCK_TIMEOUT"
#: Seconds a second writer waits for the lock before it gives up (exit 2).
DEFAULT_TIMEOUT_S = 30.0
POLL_S = 0.05

_held: dict[str, int] = {}  # resolved folder -> nesting depth, for this process
_held_guard = threading.Lock()


class LockedError(UsageError):
    """Another writer holds the folder's lock (exit 2); ``str()`` names the holder."""


def timeout_s() -> float:
    """The wait of a second writer: ``TRACELAB_LOCK_TIMEOUT`` seconds, else 30."""
    text = os.environ.get(TIMEOUT_ENV)
    if not text:
        return DEFAULT_TIMEOUT_S
    try:
        value = float(text)
    except ValueError:
        raise UsageError(f"{TIMEOUT_ENV}={text!r} is not a number of seconds") from None
    return max(0.0, value)


def holder_record(what: str) -> dict[str, object]:
    """Who is writing: this process."""
    command = " ".join([Path(sys.argv[0]).name, *sys.argv[1:]]) if sys.argv else "python"
    return {"pid": os.getpid(), "host": socket.gethostname(), "command": command[:200],
            "what": what, "since": dt.datetime.now(dt.UTC).isoformat(timespec="seconds")}


def describe_holder(path: Path) -> str:
    """The holder named in a lock file, on one line (the file may be empty for a moment
    between the holder's flock and its write)."""
    try:
        info = json.loads(path.read_text(encoding="utf-8") or "{}")
    except (OSError, ValueError):
        info = {}
    if not isinstance(info, dict) or "pid" not in info:
        return "another process (it has not written its name yet)"
    command = str(info.get("command", "?")).encode("unicode_escape").decode("ascii")
    return (f"pid {info.get('pid')} on {info.get('host', '?')} ({info.get('what', 'writing')}: "
            f"{command}) since {info.get('since', '?')}")


def _same_file(fd: int, path: Path) -> bool:
    """Whether ``fd`` is still the file at ``path`` (a writer that removed the folder it had
    just created, e.g. a failed first ingest, leaves its waiters holding a dead inode)."""
    try:
        return os.fstat(fd).st_ino == os.stat(path).st_ino
    except OSError:
        return False


@contextlib.contextmanager
def write_lock(folder: Path, what: str, timeout: float | None = None) -> Iterator[None]:
    """Hold the exclusive lock of ``folder`` (which must exist) while the block runs.

    A second writer polls for up to ``timeout`` seconds (default ``timeout_s()``), then
    raises LockedError naming the holder.
    """
    from tracelab.store.dataset import storage_error

    key = str(Path(folder).resolve())
    with _held_guard:
        if key in _held:
            _held[key] += 1
            nested = True
        else:
            nested = False
    if nested:
        try:
            yield
        finally:
            with _held_guard:
                _held[key] -= 1
        return
    path = Path(folder) / LOCK_FILE
    wait_s = timeout_s() if timeout is None else timeout
    deadline = time.monotonic() + wait_s
    told = False
    while True:
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        except FileNotFoundError:  # its creator removed the folder (a failed first ingest)
            Path(folder).mkdir(parents=True, exist_ok=True)
            continue
        except OSError as error:
            raise storage_error(path, error, "cannot take the write lock") from error
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            if time.monotonic() >= deadline:
                raise LockedError(f"{folder}: another writer holds the lock: "
                                  f"{describe_holder(path)}; gave up after {wait_s:g} s "
                                  f"(set {TIMEOUT_ENV} to wait longer)") from None
            if not told and sys.stderr.isatty():  # a person waits: say for whom, once
                sys.stderr.write(f"tracelab: waiting up to {wait_s:g} s for {folder}: "
                                 f"{describe_holder(path)}\n")
                told = True
            time.sleep(POLL_S)
            continue
        if _same_file(fd, path):
            break
        os.close(fd)  # the folder was removed and made again under us: lock the new file
    try:
        record = json.dumps(holder_record(what)).encode()
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, record, 0)
        except OSError as error:
            raise storage_error(path, error, "cannot take the write lock") from error
        with _held_guard:
            _held[key] = 1
        try:
            yield
        finally:
            with _held_guard:
                del _held[key]
            with contextlib.suppress(OSError):
                os.ftruncate(fd, 0)
    finally:
        os.close(fd)  # closing drops the flock


def held(folder: Path) -> bool:
    """Whether this process holds the lock of ``folder``."""
    with _held_guard:
        return str(Path(folder).resolve()) in _held
