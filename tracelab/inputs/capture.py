"""``tracelab capture``: record SocketCAN interfaces into frame-log format v1.

One receive thread per interface calls ``recvmsg`` on its socket (one frame and its
ancillary data per call: the kernel API offers nothing batched to Python, so this loops per
frame by necessity) and queues decoded records. One writer thread keeps them in a heap for a
small reorder window, releases them in time order across interfaces, formats them with
tracelab.format's line writers and hands whole lines to the part log, which flushes every
second and rotates. SIGINT / SIGTERM / ``--duration`` stop the receivers; the writer then
drains everything and closes the current part, so each part is complete.
"""

from __future__ import annotations

import heapq
import itertools
import queue
import re
import signal
import socket
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from types import FrameType
from typing import Any, Protocol

from tracelab.errors import StorageError, UsageError, did_you_mean
from tracelab.format.grammar import wall_time
from tracelab.format.writer import (
    BusDecl,
    error_line,
    frame_line,
    loss_line,
    mark_line,
    status_line,
)
from tracelab.inputs.options import BusOption
from tracelab.inputs.rotation import PartLog, Rotation, split_log_name
from tracelab.inputs.socketcan import (
    ANCILLARY_BYTES,
    CANFD_MTU,
    ErrorReport,
    decode_frame,
    interpret_error,
    parse_ancillary,
)
from tracelab.progress import progress_enabled

EPOCH = "1970-01-01T00:00:00Z"
RECEIVE_TIMEOUT_S = 0.2
DROPS_MODULO = 2**32  # SO_RXQ_OVFL is a u32 that wraps


class Receiver(Protocol):
    """What the loop needs of a socket: a CAN raw socket, or a socket pair in tests."""

    def recvmsg(self, bufsize: int, ancbufsize: int = ..., /) -> tuple[bytes, list[Any], int,
                                                                       Any]: ...

    def settimeout(self, value: float | None, /) -> None: ...

    def close(self) -> None: ...


@dataclass
class Source:
    iface: str
    alias: str
    sock: Receiver
    hardware: bool = False  # use raw hardware timestamps when the driver gives them


@dataclass
class CaptureSummary:
    parts: list[Path] = field(default_factory=list)
    frames: dict[str, int] = field(default_factory=dict)
    errors: int = 0
    status: int = 0
    marks: int = 0
    losses: int = 0
    dropped: int = 0  # frames the kernel reported dropped (SO_RXQ_OVFL)
    lost_arbitration: int = 0
    undecodable: int = 0
    clamped: int = 0  # records stamped before the origin (beyond the reorder window)
    hardware_stamped: int = 0
    origin: str | None = None
    notes: list[str] = field(default_factory=list)
    stopped_by: str = "end"
    timestamps: str = "kernel"

    def describe(self) -> str:
        frames = ", ".join(f"{bus} {n:,}" for bus, n in self.frames.items()) or "none"
        out = [f"captured {sum(self.frames.values()):,} frame(s) ({frames}), {self.errors:,} "
               f"error(s), {self.status:,} status, {self.marks:,} mark(s), {self.losses:,} "
               f"loss record(s) ({self.dropped:,} frames dropped by the kernel) into "
               f"{len(self.parts)} part(s); stopped by {self.stopped_by}"]
        out += [f"part: {p}" for p in self.parts]
        if self.lost_arbitration:
            out.append(f"{self.lost_arbitration:,} lost-arbitration report(s) (not bus errors; "
                       "not logged)")
        if self.undecodable:
            out.append(f"{self.undecodable:,} datagram(s) of an unexpected size were skipped")
        if self.clamped:
            out.append(f"{self.clamped:,} record(s) stamped before the origin were written at "
                       "t=0 (raise --reorder)")
        if self.timestamps == "hardware":
            out.append(f"{self.hardware_stamped:,} of {sum(self.frames.values()):,} frame(s) "
                       "carried a hardware timestamp (the others: the kernel's)")
        out += self.notes
        return "\n".join(out)


#: A queued record: (t_abs_ns, kind, alias, fields). Loss fields carry until_abs_ns.
Record = tuple[int, str, str, tuple[Any, ...]]


class _Stats:
    """Counters shared by the threads (ints under the GIL) for the live line and summary."""

    def __init__(self, aliases: list[str]) -> None:
        self.frames = dict.fromkeys(aliases, 0)
        self.errors = self.losses = self.dropped = 0
        self.lost_arbitration = self.undecodable = self.hardware = 0


def _receive(source: Source, node: str, out: queue.SimpleQueue[Record | None],
             stop: threading.Event, stats: _Stats) -> None:
    """Receive loop of one interface (one frame per recvmsg, see the module docstring)."""
    alias = source.alias
    last_drops = 0  # the kernel sends SO_RXQ_OVFL only once the count is above 0 (from memory)
    last_t: int | None = None
    source.sock.settimeout(RECEIVE_TIMEOUT_S)
    draining = False
    try:
        while True:
            if stop.is_set() and not draining:
                # stopping: take what the kernel already holds, without waiting for more
                draining = True
                source.sock.settimeout(0.0)
            try:
                data, ancdata, _flags, _addr = source.sock.recvmsg(CANFD_MTU, ANCILLARY_BYTES)
            except (TimeoutError, BlockingIOError, InterruptedError):
                if draining:
                    break
                continue
            except OSError:
                break  # socket closed
            if not data:
                break  # the peer of a socket pair went away
            anc = parse_ancillary(ancdata)
            if source.hardware and anc.hardware_ns is not None:
                t = anc.hardware_ns
                stats.hardware += 1
            else:
                t = anc.software_ns if anc.software_ns is not None else time.time_ns()
            if anc.drops is not None and anc.drops != last_drops:
                # dropped since the previous datagram (or since the socket opened)
                count = (anc.drops - last_drops) % DROPS_MODULO
                out.put((last_t if last_t is not None else t, "loss", alias, (count, t)))
                stats.losses += 1
                stats.dropped += count
                last_drops = anc.drops
            try:
                frame = decode_frame(data)
            except ValueError:
                stats.undecodable += 1
                continue
            last_t = t
            if not frame.err:
                out.put((t, "frame", alias, (frame.can_id, frame.ext, frame.rtr, frame.fd,
                                             frame.brs, frame.esi, frame.dlc, frame.data)))
                stats.frames[alias] += 1
                continue
            _queue_error(t, alias, node, interpret_error(frame), out, stats)
    finally:
        out.put(None)  # this receiver is done


def _queue_error(t: int, alias: str, node: str, report: ErrorReport,
                 out: queue.SimpleQueue[Record | None], stats: _Stats) -> None:
    """Records for one kernel error frame (rare: error frames only)."""
    for error_type, error_field in report.errors:
        out.put((t, "error", alias, (error_type, error_field)))
        stats.errors += 1
    if report.rx_overflow:
        out.put((t, "loss", alias, (None, t)))
        stats.losses += 1
    if report.state is not None:
        side = f" ({report.state_side})" if report.state_side else ""
        out.put((t, "mark", alias, (f"{node}: controller {report.state}{side}",)))
    counters = report.counters
    if counters is None and report.state == "restarted":
        counters = (0, 0)  # a restarted controller starts with both counters at 0
    if counters is not None:
        out.put((t, "status", alias, (node, counters[0], counters[1])))
    if report.notes:
        out.put((t, "mark", alias, (f"{node}: " + "; ".join(report.notes),)))
    if report.lost_arbitration:
        stats.lost_arbitration += 1


def _line(t: int, kind: str, alias: str, values: tuple[Any, ...], origin: int) -> str:
    if kind == "frame":
        return frame_line(t, alias, *values)
    if kind == "error":
        return error_line(t, alias, values[0], values[1], None, None, None, None)
    if kind == "status":
        return status_line(t, alias, *values)
    if kind == "mark":
        return mark_line(t, alias, values[0])
    return loss_line(t, alias, values[0], max(values[1] - origin, t))


class _LiveLine:
    """One stderr line redrawn each second: frames/s per interface, errors, losses, part."""

    def __init__(self, enabled: bool, sources: list[Source]) -> None:
        self.enabled = enabled
        self.sources = sources
        self.last = time.monotonic()
        self.seen: dict[str, int] = {}

    def draw(self, stats: _Stats, part: Path | None, force: bool = False) -> None:
        now = time.monotonic()
        if not self.enabled or (now - self.last < 1.0 and not force):
            return
        span = max(now - self.last, 1e-9)
        rates = []
        for source in self.sources:
            n = stats.frames[source.alias]
            rates.append(f"{source.iface} {(n - self.seen.get(source.alias, 0)) / span:,.0f}/s")
            self.seen[source.alias] = n
        self.last = now
        text = (f"capture: {'  '.join(rates)} | errors {stats.errors:,} | losses "
                f"{stats.losses:,} ({stats.dropped:,} dropped) | part "
                f"{part.name if part else '-'}")
        sys.stderr.write("\r\x1b[2K" + text)
        sys.stderr.flush()

    def end(self) -> None:
        if self.enabled:
            sys.stderr.write("\n")
            sys.stderr.flush()


def _write_loop(log: PartLog, sources: list[Source], inbox: queue.SimpleQueue[Record | None],
                reorder_ns: int, stats: _Stats, summary: CaptureSummary, live: _LiveLine,
                start_ns: int) -> None:
    """The writer thread: reorder window, release in time order, part log, live line."""
    heap: list[tuple[int, int, str, str, tuple[Any, ...]]] = []
    seq = itertools.count()
    running = len(sources)
    newest = -1
    newest_mono = time.monotonic()
    origin: int | None = None
    counts = {"error": 0, "status": 0, "mark": 0, "loss": 0}

    def release(horizon: int) -> None:
        nonlocal origin
        lines = []
        while heap and heap[0][0] <= horizon:
            t_abs, _, kind, alias, values = heapq.heappop(heap)
            if origin is None:
                origin = t_abs
                log.open(wall_time(EPOCH, origin) or EPOCH)
            t = t_abs - origin
            if t < 0:
                summary.clamped += 1
                t = 0
            lines.append(_line(t, kind, alias, values, origin))
            if kind in counts:
                counts[kind] += 1
        if lines:
            log.write(lines)

    while running:
        try:
            item = inbox.get(timeout=0.1)
        except queue.Empty:
            item = False  # type: ignore[assignment]
        while item is not False:
            if item is None:
                running -= 1
            else:
                heapq.heappush(heap, (item[0], next(seq), item[1], item[2], item[3]))
                if item[0] > newest:
                    newest, newest_mono = item[0], time.monotonic()
            try:
                item = inbox.get_nowait()
            except queue.Empty:
                item = False  # type: ignore[assignment]
        if newest >= 0:  # the clock runs on while the buses are quiet
            idle_ns = int((time.monotonic() - newest_mono) * 1e9)
            release(newest + idle_ns - reorder_ns)
        log.tick()
        live.draw(stats, log.current)
    release(2**63)
    if origin is None:  # nothing received: still a valid (empty) log
        log.open(wall_time(EPOCH, start_ns) or EPOCH)
    log.close()
    live.draw(stats, log.current, force=True)
    live.end()
    summary.errors, summary.status = counts["error"], counts["status"]
    summary.marks, summary.losses = counts["mark"], counts["loss"]


def run_capture(sources: list[Source], output: Path, buses: list[BusDecl],
                meta: dict[str, str], rotation: Rotation | None = None,
                duration_ns: int | None = None, node: str = "logger",
                reorder_ns: int = 100_000_000, quiet: bool = False,
                stop: threading.Event | None = None, handle_signals: bool = True,
                flush_every_s: float = 1.0) -> CaptureSummary:
    """Capture ``sources`` into ``output`` (and its parts) until a signal, ``duration_ns`` or
    ``stop`` is set. Signal handlers are installed only on the main thread."""
    stop = stop or threading.Event()
    summary = CaptureSummary()
    stopped_by = ["duration" if duration_ns else "end"]
    stats = _Stats([s.alias for s in sources])
    log = PartLog(output, buses, meta, rotation or Rotation(), flush_every_s=flush_every_s)
    inbox: queue.SimpleQueue[Record | None] = queue.SimpleQueue()
    live = _LiveLine(progress_enabled(quiet), sources)
    start_ns = time.time_ns()

    previous: dict[int, Any] = {}
    if handle_signals and threading.current_thread() is threading.main_thread():
        def on_signal(signum: int, _frame: FrameType | None) -> None:
            stopped_by[0] = signal.Signals(signum).name
            stop.set()

        for signum in (signal.SIGINT, signal.SIGTERM):
            previous[signum] = signal.signal(signum, on_signal)
    receivers = [threading.Thread(target=_receive, args=(s, node, inbox, stop, stats),
                                  name=f"tracelab-capture-{s.iface}", daemon=True)
                 for s in sources]
    failure: list[BaseException] = []

    def write() -> None:
        try:
            _write_loop(log, sources, inbox, reorder_ns, stats, summary, live, start_ns)
        except BaseException as error:  # reported by the main thread below
            failure.append(error)
            stop.set()

    writer = threading.Thread(target=write, name="tracelab-capture-writer", daemon=True)
    try:
        for thread in (*receivers, writer):
            thread.start()
        deadline = None if duration_ns is None else time.monotonic() + duration_ns / 1e9
        while not stop.is_set() and writer.is_alive() and any(r.is_alive() for r in receivers):
            remaining = 0.2 if deadline is None else min(0.2, deadline - time.monotonic())
            if remaining <= 0:
                break
            stop.wait(remaining)
        if not stop.is_set() and not any(r.is_alive() for r in receivers):
            stopped_by[0] = "end of input"
        if failure:
            stopped_by[0] = "a write failure"
        stop.set()
        for thread in receivers:
            thread.join()
        writer.join()
    finally:
        stop.set()
        for number, handler in previous.items():
            signal.signal(number, handler)
        for source in sources:
            source.sock.close()
    if failure:
        error = failure[0]
        if isinstance(error, OSError):
            where = log.current or output
            raise StorageError(f"{where}: cannot write the log ({error.strerror or error}); "
                             f"{len(log.paths)} part(s) written") from error
        raise error
    summary.parts = list(log.paths)
    summary.frames = dict(stats.frames)
    summary.dropped = stats.dropped
    summary.lost_arbitration = stats.lost_arbitration
    summary.undecodable = stats.undecodable
    summary.hardware_stamped = stats.hardware
    summary.origin = log.origin
    summary.stopped_by = stopped_by[0]
    summary.timestamps = "hardware" if any(s.hardware for s in sources) else "kernel"
    return summary


def capture_interfaces(ifaces: list[str], output: Path, bus_options: list[BusOption],
                       meta: dict[str, str], rotation: Rotation | None = None,
                       duration_ns: int | None = None, node: str = "logger",
                       hardware: bool = False, reorder_ns: int = 100_000_000,
                       quiet: bool = False) -> CaptureSummary:
    """Open a CAN raw socket per interface, declare each bus (bit rates from the system, else
    ``--bus``) and run the capture."""
    from tracelab.inputs.links import link_info
    from tracelab.inputs.socketcan import open_can_socket

    split_log_name(output)
    if len(set(ifaces)) != len(ifaces):
        raise UsageError("an interface is named twice")
    by_iface: dict[str, BusOption] = {}
    for option in bus_options:
        key = option.key or (ifaces[0] if len(ifaces) == 1 else None)
        if key is None:
            raise UsageError(f"--bus {option.alias}: write IFACE=ALIAS,... when capturing "
                             "several interfaces")
        if key not in ifaces:
            raise UsageError(f"--bus {key}=...: {key!r} is not one of the interfaces "
                             f"({', '.join(ifaces)}){did_you_mean(key, ifaces)}")
        by_iface[key] = option
    for iface in ifaces:
        try:
            socket.if_nametoindex(iface)
        except OSError:
            raise UsageError(f"{iface}: no such network interface (see `ip link show`)"
                             ) from None
    decls, notes = [], []
    for iface in ifaces:
        chosen = by_iface.get(iface)
        link = link_info(iface)
        nominal = link.nominal_bps if link else None
        data = link.data_bps if link else None
        if chosen is not None and chosen.nominal_bps and nominal and chosen.nominal_bps != nominal:
            notes.append(f"{iface}: the interface runs at nominal={nominal}; --bus "
                         f"nominal={chosen.nominal_bps} ignored")
        if nominal is None and chosen is not None:
            nominal, data = chosen.nominal_bps, chosen.data_bps
        elif data is None and chosen is not None:
            data = chosen.data_bps
        if nominal is None:
            raise UsageError(f"{iface}: the system reports no bit rate (a virtual interface, or "
                             f"`ip` missing); give --bus {iface}=ALIAS,nominal=BITS_PER_S")
        alias = chosen.alias if chosen is not None else _alias_of(iface)
        decls.append(BusDecl(alias, nominal, data,
                             name=iface if alias != iface else None))
    aliases = [d.alias for d in decls]
    if len(set(aliases)) != len(aliases):
        raise UsageError(f"two interfaces share a bus alias ({', '.join(aliases)})")
    full_meta = {"run": meta.get("run") or split_log_name(output)[0], **meta,
                 "logger": meta.get("logger", "capture"),
                 "host": meta.get("host", _host()),
                 "timestamps": "hardware" if hardware else "kernel"}
    sources: list[Source] = []
    try:
        for iface, decl in zip(ifaces, decls, strict=True):
            sources.append(Source(iface, decl.alias, open_can_socket(iface, hardware),
                                  hardware))
    except BaseException:
        for source in sources:
            source.sock.close()
        raise
    summary = run_capture(sources, output, decls, full_meta, rotation, duration_ns, node,
                          reorder_ns, quiet)
    summary.notes += notes
    return summary


def _alias_of(iface: str) -> str:
    alias = re.sub(r"[^A-Za-z0-9_-]", "_", iface)[:16]
    return alias or "bus"


def _host() -> str:
    return re.sub(r"\s", "_", socket.gethostname()) or "unknown"
