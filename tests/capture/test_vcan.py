"""Integration on a virtual CAN interface: frames sent on vcan are captured into a log that
ingests --strict. Needs the vcan module and CAP_NET_ADMIN; skipped with the reason otherwise."""

from __future__ import annotations

import shutil
import socket
import subprocess
import threading
import time
from pathlib import Path

import pytest

from tests.capture.test_socketcan import EFF, canfd, classic
from tests.ingest_check import ingest_strict
from tracelab.inputs.capture import capture_interfaces
from tracelab.inputs.options import BusOption
from tracelab.inputs.socketcan import CAN_RAW_FD_FRAMES, SOL_CAN_RAW

IFACE = "tlvcan0"


def _vcan() -> str | None:
    """None when the interface is up, else why it cannot be."""
    if not hasattr(socket, "AF_CAN"):
        return "this Python has no AF_CAN"
    try:
        socket.socket(socket.AF_CAN, socket.SOCK_RAW, socket.CAN_RAW).close()
    except OSError as error:
        return f"the kernel offers no CAN raw sockets ({error.strerror}; modprobe can_raw)"
    ip = shutil.which("ip") or "/usr/sbin/ip"
    if shutil.which("modprobe"):
        subprocess.run(["modprobe", "vcan"], capture_output=True, check=False)
    subprocess.run([ip, "link", "del", IFACE], capture_output=True, check=False)
    add = subprocess.run([ip, "link", "add", "dev", IFACE, "type", "vcan"], capture_output=True,
                         text=True, check=False)
    if add.returncode:
        return f"cannot create a vcan interface ({add.stderr.strip() or add.returncode}): " \
               "the vcan module is not loadable here or CAP_NET_ADMIN is missing"
    subprocess.run([ip, "link", "set", "dev", IFACE, "mtu", "72"], capture_output=True,
                   check=False)  # CAN FD frames on vcan need the FD MTU
    up = subprocess.run([ip, "link", "set", "up", IFACE], capture_output=True, text=True,
                        check=False)
    return None if up.returncode == 0 else f"cannot bring {IFACE} up: {up.stderr.strip()}"


@pytest.fixture
def vcan() -> object:
    reason = _vcan()
    if reason:
        pytest.skip(reason)
    yield IFACE
    subprocess.run([shutil.which("ip") or "/usr/sbin/ip", "link", "del", IFACE],
                   capture_output=True, check=False)


def test_frames_sent_on_vcan_are_captured(vcan: str, tmp_path: Path) -> None:
    sender = socket.socket(socket.AF_CAN, socket.SOCK_RAW, socket.CAN_RAW)
    sender.setsockopt(SOL_CAN_RAW, CAN_RAW_FD_FRAMES, 1)
    sender.bind((vcan,))
    frames = [classic(0x0C0, bytes(range(8))), classic(EFF | 0x18DAF110, b"\x02\x10"),
              canfd(0x123, bytes(12), 0x04 | 0x01)]

    def send() -> None:
        time.sleep(0.5)  # the capture socket is bound by then
        for frame in frames:
            sender.send(frame)

    threading.Thread(target=send, daemon=True).start()
    log = tmp_path / "vcan.frames"
    summary = capture_interfaces([vcan], log, [BusOption(vcan, "V", 500000, 2000000)],
                                 {"run": "vcan-check"}, duration_ns=1_500_000_000, quiet=True)
    sender.close()
    records = [line.split("\t")[2:] for line in log.read_text().splitlines()
               if line[:1].isdigit()]
    assert records == [["frame", "0C0", "s", "8", "0001020304050607"],
                       ["frame", "18DAF110", "x", "2", "0210"],
                       ["frame", "123", "sfb", "9", "00" * 12]]
    assert summary.frames == {"V": 3}
    ingest_strict([log], tmp_path / "ds")
