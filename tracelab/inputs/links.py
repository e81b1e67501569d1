"""An interface's bit rates as the system reports them: ``ip -details -json link show dev X``.

The JSON keys are those iproute2 prints for a CAN link (source: iproute2 ip/iplink_can.c,
can_print_opt: ``linkinfo.info_data.bittiming.bitrate``, ``data_bittiming.bitrate``, for
fixed-rate devices ``bittiming_bitrate`` / ``data_bittiming_bitrate``, and ``state``).
/sys/class/net/IFACE does not expose CAN bit timing, so it is not read. Virtual interfaces
(vcan) have no bit timing: their rates must come from ``--bus``.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
from dataclasses import dataclass


@dataclass(frozen=True)
class LinkInfo:
    kind: str | None  # "can", "vcan", ...
    nominal_bps: int | None
    data_bps: int | None
    state: str | None  # e.g. "ERROR-ACTIVE"


def parse_ip_link_json(text: str) -> LinkInfo:
    """The first link of ``ip -details -json link show`` output."""
    links = json.loads(text)
    info = (links[0] if links else {}).get("linkinfo", {})
    data = info.get("info_data", {}) or {}

    def rate(obj: str, fixed: str) -> int | None:
        value = (data.get(obj) or {}).get("bitrate") or data.get(fixed)
        return int(value) if value else None

    return LinkInfo(info.get("info_kind"), rate("bittiming", "bittiming_bitrate"),
                    rate("data_bittiming", "data_bittiming_bitrate"), data.get("state"))


def link_info(iface: str) -> LinkInfo | None:
    """None when ``ip`` is missing or does not know the interface."""
    ip = shutil.which("ip") or next((p for p in ("/usr/sbin/ip", "/sbin/ip")
                                     if os.path.exists(p)), None)
    if ip is None:
        return None
    try:
        done = subprocess.run([ip, "-details", "-json", "link", "show", "dev", iface],
                              capture_output=True, text=True, timeout=5, check=False)
    except (OSError, subprocess.TimeoutExpired):
        return None
    if done.returncode != 0:
        return None
    try:
        return parse_ip_link_json(done.stdout)
    except (ValueError, AttributeError, IndexError, TypeError):
        return None
