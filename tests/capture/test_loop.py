"""The capture loop end to end through socket pairs standing in for CAN sockets.

The loop's receive path is unchanged: ``recvmsg`` with room for ancillary data, then the
same parsing and decoding. On an AF_UNIX datagram pair the kernel really delivers
SO_TIMESTAMPNS ancillary data; it never reports SO_RXQ_OVFL there (a unix sender blocks
instead of dropping), so drop counters, and fixed timestamps where a test needs them, are
added to the ancillary data by a thin wrapper around the real socket.
"""

from __future__ import annotations

import os
import signal
import socket
import struct
import sys
import threading
import time
from pathlib import Path
from typing import Any

import polars as pl

from tests.capture.test_socketcan import ERR, canfd, classic
from tests.ingest_check import ingest_strict
from tracelab.fleet.discover import describe_log, group_runs
from tracelab.format.writer import BusDecl, frame_line
from tracelab.inputs.capture import Source, run_capture
from tracelab.inputs.rotation import Rotation
from tracelab.inputs.socketcan import enable_receive_options

T0 = 1_796_072_645_000_000_000  # 2026-11-30T21:04:05Z in ns since 1970
META = {"run": "bench-night", "logger": "capture", "host": "test-host"}


class Injecting:
    """A real socket whose recvmsg results get extra ancillary data: a fixed timestamp per
    datagram (SCM_TIMESTAMPNS replaced) and/or a cumulative drop counter (SO_RXQ_OVFL)."""

    def __init__(self, sock: socket.socket, stamps: list[int] | None = None,
                 drops: list[int] | None = None) -> None:
        self.sock, self.stamps, self.drops, self.n = sock, stamps, drops, 0

    def recvmsg(self, bufsize: int, ancbufsize: int = 0, /) -> tuple[bytes, list[Any], int, Any]:
        data, anc, flags, addr = self.sock.recvmsg(bufsize, ancbufsize)
        i, self.n = self.n, self.n + 1
        if self.stamps is not None and i < len(self.stamps):
            sec, nsec = divmod(self.stamps[i], 1_000_000_000)
            anc = [a for a in anc if a[1] != 35] + [(socket.SOL_SOCKET, 35,
                                                     struct.pack("@ll", sec, nsec))]
        if self.drops is not None and i < len(self.drops) and self.drops[i]:
            anc = [*anc, (socket.SOL_SOCKET, 40, self.drops[i].to_bytes(4, sys.byteorder))]
        return data, anc, flags, addr

    def settimeout(self, value: float | None, /) -> None:
        self.sock.settimeout(value)

    def close(self) -> None:
        self.sock.close()


def _pair() -> tuple[socket.socket, socket.socket]:
    send, receive = socket.socketpair(socket.AF_UNIX, socket.SOCK_DGRAM)
    enable_receive_options(receive)  # the same SOL_SOCKET options a CAN socket gets
    return send, receive


def _records(path: Path) -> list[str]:
    from tracelab.format.compression import open_log

    stream, raw = open_log(path)
    try:
        text = stream.read().decode()
    finally:
        stream.close()
        raw.close()
    assert text.endswith("\n")  # whole lines only
    return [line for line in text.splitlines() if line and line[0].isdigit()]


def _stop_when(stop: threading.Event, condition: Any, timeout_s: float = 20.0) -> None:
    def watch() -> None:
        deadline = time.monotonic() + timeout_s
        while not condition() and time.monotonic() < deadline:
            time.sleep(0.02)
        stop.set()
    threading.Thread(target=watch, daemon=True).start()


def test_two_interfaces_are_merged_in_time_order(tmp_path: Path) -> None:
    send_a, recv_a = _pair()
    send_b, recv_b = _pair()
    stamps_a = [T0 + k * 2_000_000 for k in range(50)]             # 0, 2, 4 ... ms
    stamps_b = [T0 + 1_000_000 + k * 2_000_000 for k in range(50)]  # 1, 3, 5 ... ms
    for k in range(50):  # all of A is queued before any of B: only the window orders them
        send_a.send(classic(0x100 + k, bytes([k])))
    for k in range(50):
        send_b.send(canfd(0x200 + k, bytes(12), 0x04 | 0x01))
    sources = [Source("vcan0", "P", Injecting(recv_a, stamps_a)),
               Source("vcan1", "C", Injecting(recv_b, stamps_b))]
    stop = threading.Event()
    log = tmp_path / "merge.frames"
    _stop_when(stop, lambda: all(s.sock.n >= 50 for s in sources))  # type: ignore[attr-defined]
    summary = run_capture(sources, log, [BusDecl("P", 500000), BusDecl("C", 500000, 2000000)],
                          META, reorder_ns=10**12, quiet=True, stop=stop,
                          handle_signals=False)
    expected = []
    for k in range(50):
        expected.append(frame_line(k * 2_000_000, "P", 0x100 + k, False, False, False, False,
                                   False, 1, bytes([k])))
        expected.append(frame_line(1_000_000 + k * 2_000_000, "C", 0x200 + k, False, False,
                                   True, True, False, 9, bytes(12)))
    assert _records(log) == expected
    header = log.read_text().splitlines()[:5]
    # source: Python's datetime gives 2026-11-30T21:04:05Z for T0 (see T0)
    assert "%origin 2026-11-30T21:04:05.000000000Z" in header
    assert "%meta run=bench-night logger=capture host=test-host part=1" in header
    assert summary.frames == {"P": 50, "C": 50}
    manifest = ingest_strict([log], tmp_path / "ds")
    assert manifest["frames"].to_list() == [100]


def test_kernel_timestamps_error_frames_and_overflow(tmp_path: Path) -> None:
    send, recv = _pair()
    datagrams = [
        classic(0x0C0, b"\x01"),
        classic(ERR | 0x008 | 0x080, bytes([0, 0, 0x04, 0x0A, 0, 0, 0, 0])),  # stuff in data
        classic(ERR | 0x004 | 0x200, bytes([0, 0x20, 0, 0, 0, 0, 136, 5])),  # TX passive
        classic(ERR | 0x004, bytes([0, 0x01])),                               # RX overflow
        classic(0x0C0, b"\x02"),
        classic(0x0C0, b"\x03"),
        classic(ERR | 0x040, bytes(8)),                                       # bus-off
        classic(ERR | 0x100, bytes(8)),                                       # restarted
        classic(0x0C0, b"\x04"),
    ]
    drops = [0, 0, 0, 0, 3, 3, 3, 3, 5]  # the kernel's cumulative count as each arrives
    for datagram in datagrams:
        send.send(datagram)
    source = Source("can0", "P", Injecting(recv, drops=drops))
    stop = threading.Event()
    _stop_when(stop, lambda: source.sock.n >= len(datagrams))  # type: ignore[attr-defined]
    log = tmp_path / "errors.frames"
    summary = run_capture([source], log, [BusDecl("P", 500000)], META, node="bench-logger",
                          reorder_ns=10**12, quiet=True, stop=stop, handle_signals=False)
    rows = [line.split("\t") for line in _records(log)]
    kinds = [r[2:] for r in rows]
    assert kinds == [
        ["frame", "0C0", "s", "1", "01"],
        ["error", "stuff", "data", "-", "-", "-"],
        ["mark", "bench-logger: controller error-passive (tx)"],
        ["status", "bench-logger", "136", "5"],
        ["loss", "-", rows[4][4]],                  # controller RX overflow: count unknown
        ["loss", "3", rows[5][4]],                  # 3 dropped before the 2nd frame
        ["frame", "0C0", "s", "1", "02"],
        ["frame", "0C0", "s", "1", "03"],
        ["mark", "bench-logger: controller bus-off"],
        ["mark", "bench-logger: controller restarted"],
        ["status", "bench-logger", "0", "0"],
        ["loss", "2", rows[11][4]],
        ["frame", "0C0", "s", "1", "04"],
    ]
    t = [int(r[0]) for r in rows]
    assert t[0] == 0 and all(b >= a for a, b in zip(t, t[1:], strict=False))  # kernel stamps
    # the 3 drops lie between the frame before them and the frame that reported them
    assert int(rows[5][4]) == t[6]
    assert (summary.dropped, summary.losses, summary.errors, summary.status) == (5, 3, 1, 2)
    manifest = ingest_strict([log], tmp_path / "ds")
    assert manifest.select("frames", "errors", "status", "marks", "losses").row(0) == (4, 1, 2,
                                                                                     3, 3)


def _feed(send: socket.socket, n: int, gap_s: float = 0.0) -> threading.Thread:
    def run() -> None:
        for k in range(n):
            send.send(classic(0x123, k.to_bytes(4, "big") + bytes(4)))
            if gap_s:
                time.sleep(gap_s)
    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    return thread


def _check_parts(parts: list[Path], root: Path, frames: int, tmp_path: Path) -> None:
    headers = []
    for path in parts:
        from tracelab.format.reader import read_header
        headers.append(read_header(path))
    assert {h.origin for h in headers} == {headers[0].origin}
    assert {h.meta["run"] for h in headers} == {"bench-night"}
    assert [h.meta["part"] for h in headers] == [str(i + 1) for i in range(len(parts))]
    manifest = ingest_strict(parts, tmp_path / "ds")
    assert manifest["frames"].sum() == frames
    assert set(manifest["run"].to_list()) == {"bench-night"}
    # fleet discovery groups the parts into one run
    specs = group_runs([describe_log(p) for p in parts], root)
    assert len(specs) == 1 and len(specs[0].files) == len(parts)


def test_rotation_by_size_with_zstd_parts(tmp_path: Path) -> None:
    send, recv = _pair()
    n = 6000
    feeder = _feed(send, n)
    source = Source("can0", "P", Injecting(recv))
    stop = threading.Event()
    _stop_when(stop, lambda: source.sock.n >= n)  # type: ignore[attr-defined]
    summary = run_capture([source], tmp_path / "night.frames.zst", [BusDecl("P", 500000)],
                          META, rotation=Rotation(size_bytes=4000), quiet=True, stop=stop,
                          handle_signals=False, flush_every_s=0.0, reorder_ns=1_000_000)
    feeder.join()
    assert len(summary.parts) >= 2
    assert summary.parts[0].name == "night-p0001.frames.zst"
    assert all(p.stat().st_size > 0 for p in summary.parts)
    _check_parts(summary.parts, tmp_path, n, tmp_path)
    payloads = [int(line.split("\t")[6][:8], 16) for p in summary.parts for line in _records(p)]
    assert payloads == list(range(n))  # nothing lost or repeated across part boundaries


def test_rotation_by_interval_gzip(tmp_path: Path) -> None:
    send, recv = _pair()
    n = 120
    feeder = _feed(send, n, gap_s=0.01)
    source = Source("can0", "P", Injecting(recv))
    stop = threading.Event()
    _stop_when(stop, lambda: source.sock.n >= n)  # type: ignore[attr-defined]
    summary = run_capture([source], tmp_path / "night.frames.gz", [BusDecl("P", 500000)],
                          META, rotation=Rotation(interval_ns=300_000_000), quiet=True,
                          stop=stop, handle_signals=False, flush_every_s=0.05,
                          reorder_ns=1_000_000)
    feeder.join()
    assert len(summary.parts) >= 2
    _check_parts(summary.parts, tmp_path, n, tmp_path)


def test_sigterm_mid_write_closes_the_part_cleanly(tmp_path: Path) -> None:
    send, recv = _pair()
    source = Source("can0", "P", Injecting(recv))
    sent = {"n": 0}

    def feed_then_signal() -> None:
        while source.sock.n < 400:  # type: ignore[attr-defined]
            send.send(classic(0x321, sent["n"].to_bytes(8, "big")))
            sent["n"] += 1
            if sent["n"] == 300:
                os.kill(os.getpid(), signal.SIGTERM)  # while frames are still arriving
                return
            time.sleep(0.0005)

    before = signal.getsignal(signal.SIGTERM)
    threading.Thread(target=feed_then_signal, daemon=True).start()
    log = tmp_path / "cut.frames.zst"
    summary = run_capture([source], log, [BusDecl("P", 500000)], META, quiet=True,
                          flush_every_s=0.01, reorder_ns=5_000_000)
    assert summary.stopped_by == "SIGTERM"
    assert signal.getsignal(signal.SIGTERM) is before  # the handler is put back
    written = _records(log)
    assert len(written) == summary.frames["P"] == sent["n"] == 300  # queued frames drained
    manifest = ingest_strict([log], tmp_path / "ds")
    assert manifest["frames"].to_list() == [300]


def test_empty_capture_is_still_a_valid_log(tmp_path: Path) -> None:
    _, recv = _pair()
    stop = threading.Event()
    stop.set()
    log = tmp_path / "quiet.frames"
    summary = run_capture([Source("can0", "P", recv)], log, [BusDecl("P", 500000)], META,
                          quiet=True, stop=stop, handle_signals=False)
    assert summary.frames == {"P": 0}
    manifest = ingest_strict([log], tmp_path / "ds")
    assert manifest["frames"].to_list() == [0]
    assert pl.read_parquet(tmp_path / "ds" / "manifest.parquet")["origin"].null_count() == 0


def test_live_line_names_rates_errors_losses_and_part(capsys: Any) -> None:
    from tracelab.inputs.capture import _LiveLine, _Stats

    sources = [Source("can0", "P", None), Source("can1", "C", None)]  # type: ignore[arg-type]
    stats = _Stats(["P", "C"])
    live = _LiveLine(True, sources)
    live.last -= 2.0  # two seconds have passed
    stats.frames.update(P=2000, C=500)
    stats.errors, stats.losses, stats.dropped = 3, 1, 17
    live.draw(stats, Path("night-p0002.frames.zst"))
    live.end()
    err = capsys.readouterr().err
    assert "can0 1,000/s" in err and "can1 250/s" in err  # derived: frames / 2 s
    assert "errors 3" in err and "losses 1 (17 dropped)" in err
    assert "part night-p0002.frames.zst" in err
    quiet = _LiveLine(False, sources)
    quiet.draw(stats, None, force=True)
    assert capsys.readouterr().err == ""


def test_a_write_failure_stops_the_capture_with_one_error(tmp_path: Path,
                                                          monkeypatch: Any) -> None:
    import pytest

    from tracelab.errors import StorageError
    from tracelab.inputs import rotation

    def full(self: Any, now_mono: float | None = None) -> None:
        raise OSError(28, "No space left on device")

    send, recv = _pair()
    for k in range(50):
        send.send(classic(0x123, bytes([k])))
    monkeypatch.setattr(rotation.PartLog, "flush", full)
    stop = threading.Event()
    with pytest.raises(StorageError, match="No space left on device"):
        run_capture([Source("can0", "P", Injecting(recv))], tmp_path / "full.frames",
                    [BusDecl("P", 500000)], META, quiet=True, stop=stop, handle_signals=False,
                    flush_every_s=0.0, reorder_ns=1_000_000)
