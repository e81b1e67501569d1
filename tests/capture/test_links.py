"""Bit rates from ``ip -details -json link show`` output and the capture's option checks."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tracelab.cli import main
from tracelab.inputs.links import parse_ip_link_json
from tracelab.inputs.options import parse_size_bytes
from tracelab.inputs.rotation import part_path

# An abridged sample in the shape iproute2 prints for a CAN FD link (source: iproute2
# ip/iplink_can.c, can_print_opt: the "bittiming" / "data_bittiming" objects, "state"); the
# values are invented.
CAN_FD_LINK = [{
    "ifindex": 5, "ifname": "can0", "mtu": 72, "operstate": "UP",
    "linkinfo": {"info_kind": "can", "info_data": {
        "ctrlmode": ["FD"], "state": "ERROR-ACTIVE", "restart_ms": 100,
        "bittiming": {"bitrate": 500000, "sample_point": "0.875", "tq": 25},
        "data_bittiming": {"bitrate": 2000000, "sample_point": "0.750", "tq": 25},
        "clock": 80000000}}}]
FIXED_RATE_LINK = [{"ifname": "can1", "linkinfo": {"info_kind": "can", "info_data": {
    "bittiming_bitrate": 250000, "bitrate_const": [125000, 250000, 500000]}}}]
VCAN_LINK = [{"ifname": "vcan0", "linkinfo": {"info_kind": "vcan"}}]


def test_bit_rates_from_ip_json() -> None:
    fd = parse_ip_link_json(json.dumps(CAN_FD_LINK))
    assert (fd.kind, fd.nominal_bps, fd.data_bps, fd.state) == ("can", 500000, 2000000,
                                                                "ERROR-ACTIVE")
    fixed = parse_ip_link_json(json.dumps(FIXED_RATE_LINK))
    assert (fixed.nominal_bps, fixed.data_bps) == (250000, None)
    virtual = parse_ip_link_json(json.dumps(VCAN_LINK))
    assert (virtual.kind, virtual.nominal_bps) == ("vcan", None)


def test_sizes_and_part_names() -> None:
    # common practice, no source: MB = 10**6 bytes, MiB = 2**20 bytes
    assert parse_size_bytes("512MB") == 512_000_000
    assert parse_size_bytes("1GiB") == 2**30
    assert parse_size_bytes("1h") is None
    assert part_path(Path("/d/night.frames.zst"), 3, True) == Path("/d/night-p0003.frames.zst")
    assert part_path(Path("/d/night.frames"), 1, False) == Path("/d/night.frames")


@pytest.mark.parametrize(("args", "message"), [
    (["--rotate", "fast"], "--rotate"),
    (["--duration", "0s"], "--duration must be longer than 0"),
    (["--meta", "Run=x"], "--meta Run=x"),
    (["--bus", "can9=P,nominal=500000"], "'can9' is not one of the interfaces"),
    (["--bus", "tlnone0=P,nominal=500000"], "tlnone0: no such network interface"),
    (["-o", "night.log"], "name the log NAME.frames"),
])
def test_capture_usage_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str],
                              args: list[str], message: str) -> None:
    base = ["capture", "tlnone0", "-o", str(tmp_path / "n.frames"), "--quiet"]
    if "-o" in args:
        base = ["capture", "tlnone0", "--quiet"]
        args = [args[0], str(tmp_path / args[1])]
    assert main([*base, *args]) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err and len(err.strip().splitlines()) == 1
