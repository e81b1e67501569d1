"""SocketCAN layouts and error frames decoded from bytes the tests build themselves.

The structures are assembled field by field (int.to_bytes in the host's byte order, as the
kernel's ``__u32 can_id`` is), not with the module's own struct formats. Constant values are
typed here from the kernel headers and, where Python's socket module or the installed headers
have them, compared with those too.
"""

from __future__ import annotations

import re
import socket
import struct
import sys
from pathlib import Path

import pytest

from tracelab.inputs import socketcan as sc

# source: linux/can.h (linux-libc-dev 6.1.187-1)
EFF, RTR, ERR = 0x80000000, 0x40000000, 0x20000000
# source: linux/can.h: CANFD_BRS 0x01, CANFD_ESI 0x02, CANFD_FDF 0x04
BRS, ESI, FDF = 0x01, 0x02, 0x04


def classic(can_id: int, data: bytes, length: int | None = None, len8_dlc: int = 0) -> bytes:
    """struct can_frame: can_id, len, __pad, __res0, len8_dlc, data[8] -> 16 bytes."""
    n = len(data) if length is None else length
    return can_id.to_bytes(4, sys.byteorder) + bytes([n, 0, 0, len8_dlc]) + data.ljust(8, b"\0")


def canfd(can_id: int, data: bytes, flags: int = FDF) -> bytes:
    """struct canfd_frame: can_id, len, flags, __res0, __res1, data[64] -> 72 bytes."""
    return (can_id.to_bytes(4, sys.byteorder) + bytes([len(data), flags, 0, 0])
            + data.ljust(64, b"\0"))


def test_structure_sizes_match_the_headers() -> None:
    # source: linux/can.h: CAN_MTU = sizeof(struct can_frame) = 16, CANFD_MTU = 72
    assert (sc.CAN_MTU, sc.CANFD_MTU) == (16, 72)
    assert len(classic(0, b"")) == 16 and len(canfd(0, b"")) == 72


def test_constants_agree_with_pythons_socket_module() -> None:
    if not hasattr(socket, "CAN_EFF_FLAG"):
        pytest.skip("this Python's socket module has no CAN constants")
    # source: CPython's socket module (built from the same kernel headers)
    assert sc.CAN_EFF_FLAG == socket.CAN_EFF_FLAG == EFF
    assert sc.CAN_RTR_FLAG == socket.CAN_RTR_FLAG == RTR
    assert sc.CAN_ERR_FLAG == socket.CAN_ERR_FLAG == ERR
    assert sc.CAN_SFF_MASK == socket.CAN_SFF_MASK
    assert sc.CAN_EFF_MASK == socket.CAN_EFF_MASK
    assert sc.CAN_ERR_MASK == socket.CAN_ERR_MASK
    assert sc.SOL_CAN_RAW == socket.SOL_CAN_RAW
    assert sc.AF_CAN == socket.AF_CAN and sc.CAN_RAW == socket.CAN_RAW
    for name in ("CAN_RAW_ERR_FILTER", "CAN_RAW_FD_FRAMES", "SO_RXQ_OVFL", "SO_TIMESTAMPNS"):
        if hasattr(socket, name):
            assert getattr(sc, name) == getattr(socket, name), name


def _header_defines(path: Path) -> dict[str, int]:
    text = path.read_text()
    return {m.group(1): int(m.group(2), 0)
            for m in re.finditer(r"#define\s+(\w+)\s+(0x[0-9A-Fa-f]+|\d+)U?\b", text)}


@pytest.mark.parametrize("header", ["linux/can/error.h", "linux/can.h"])
def test_constants_agree_with_the_installed_kernel_headers(header: str) -> None:
    path = Path("/usr/include") / header
    if not path.exists():
        pytest.skip(f"/usr/include/{header} not installed (apt-get install linux-libc-dev)")
    # source: the installed header itself (linux-libc-dev)
    defines = _header_defines(path)
    ours = {name: getattr(sc, name) for name in dir(sc)
            if name in defines and isinstance(getattr(sc, name), int)}
    assert len(ours) >= (25 if header.endswith("error.h") else 8)
    assert {n: defines[n] for n in ours} == ours
    if header.endswith("error.h"):
        locations = {name: code for code, (name, _) in sc.PROT_LOCATIONS.items()}
        assert {n: defines[n] for n in locations} == locations
        # every location the header defines is mapped
        assert {n for n in defines if n.startswith("CAN_ERR_PROT_LOC_")} == set(locations)


def test_classic_standard_frame() -> None:
    frame = sc.decode_frame(classic(0x0C0, bytes.fromhex("11223344556677FF")))
    assert (frame.can_id, frame.ext, frame.rtr, frame.err, frame.fd) == (0x0C0, False, False,
                                                                          False, False)
    assert (frame.dlc, frame.data) == (8, bytes.fromhex("11223344556677FF"))


def test_classic_extended_remote_and_len8_dlc() -> None:
    ext = sc.decode_frame(classic(EFF | 0x18DAF110, b"\x02\x10"))
    assert (ext.can_id, ext.ext, ext.dlc, ext.data) == (0x18DAF110, True, 2, b"\x02\x10")
    remote = sc.decode_frame(classic(RTR | 0x7DF, b"", length=8))
    # a remote frame's len is the requested DLC; it carries no data
    assert (remote.rtr, remote.dlc, remote.data) == (True, 8, b"")
    # source: linux/can.h: len8_dlc "optional DLC for 8 byte payload length (9 .. 15)"
    long_dlc = sc.decode_frame(classic(0x100, bytes(8), len8_dlc=13))
    assert (long_dlc.dlc, len(long_dlc.data)) == (13, 8)
    ignored = sc.decode_frame(classic(0x100, bytes(4), len8_dlc=13))  # only with len 8
    assert ignored.dlc == 4


def test_fd_frames_flags_and_dlc() -> None:
    frame = sc.decode_frame(canfd(0x123, bytes(range(12)), FDF | BRS))
    # source: ISO 11898-1:2015 Table 5: 12 bytes is DLC 9
    assert (frame.fd, frame.brs, frame.esi, frame.dlc, frame.data) == (True, True, False, 9,
                                                                       bytes(range(12)))
    big = sc.decode_frame(canfd(EFF | 0x1F0A0001, bytes(range(64)), FDF | BRS | ESI))
    assert (big.ext, big.can_id, big.brs, big.esi, big.dlc) == (True, 0x1F0A0001, True, True, 15)
    # an FD frame without the FDF flag (older kernels) is still FD by its size
    assert sc.decode_frame(canfd(0x1, b"\xaa", flags=0)).fd
    # derived: a length between two DLC sizes rounds up, padded with zeros
    odd = sc.decode_frame(canfd(0x1, b"\x01" * 10))
    assert (odd.dlc, odd.data) == (9, b"\x01" * 10 + b"\0\0")


def test_other_sizes_are_refused() -> None:
    with pytest.raises(ValueError, match="neither a can_frame"):
        sc.decode_frame(b"\0" * 20)


def _error(cls: int, data: bytes) -> sc.ErrorReport:
    return sc.interpret_error(sc.decode_frame(classic(ERR | cls, data.ljust(8, b"\0"))))


# source: linux/can/error.h (linux-libc-dev 6.1.187-1): class bits in can_id, data[1..7]
PROT, CRTL, ACK, BUSOFF, BUSERROR, RESTARTED, CNT, TRX, LOSTARB, TX_TIMEOUT = (
    0x008, 0x004, 0x020, 0x040, 0x080, 0x100, 0x200, 0x010, 0x002, 0x001)


@pytest.mark.parametrize(("kind", "location", "expected"), [
    (0x04, 0x0A, ("stuff", "data")),        # CAN_ERR_PROT_STUFF at CAN_ERR_PROT_LOC_DATA
    (0x01, 0x0F, ("bit", "arbitration")),   # CAN_ERR_PROT_BIT at LOC_ID12_05
    (0x08, 0x03, ("bit", "sof")),           # CAN_ERR_PROT_BIT0 at LOC_SOF
    (0x10 | 0x80, 0x0B, ("bit", "control")),  # CAN_ERR_PROT_BIT1 | PROT_TX at LOC_DLC
    (0x02, 0x1A, ("form", "eof")),          # CAN_ERR_PROT_FORM at LOC_EOF
    (0x02, 0x18, ("form", "crc")),          # form error at the CRC delimiter
    (0x00, 0x08, ("crc", "crc")),           # unspecified at LOC_CRC_SEQ (driver practice)
    (0x00, 0x19, ("ack", "ack")),           # unspecified at LOC_ACK
    (0x00, 0x12, ("other", "interframe")),  # unspecified at LOC_INTERM
    (0x20, 0x00, ("other", "unknown")),     # CAN_ERR_PROT_OVERLOAD, location unspecified
    (0x00, 0x77, ("other", "unknown")),     # a location the header does not define
])
def test_protocol_violations_become_type_and_field(kind: int, location: int,
                                                   expected: tuple[str, str]) -> None:
    report = _error(PROT | BUSERROR, bytes([0, 0, kind, location]))
    assert report.errors == [expected]


def test_error_classes_without_protocol_details() -> None:
    assert _error(ACK, b"").errors == [("ack", "ack")]
    assert _error(BUSERROR, b"").errors == [("other", "unknown")]
    lost = _error(LOSTARB, bytes([5]))
    assert lost.errors == [] and lost.lost_arbitration


def test_controller_states_counters_and_overflow() -> None:
    passive = _error(CRTL | CNT, bytes([0, 0x20, 0, 0, 0, 0, 136, 7]))  # TX_PASSIVE
    assert (passive.state, passive.state_side, passive.counters) == ("error-passive", "tx",
                                                                    (136, 7))
    warning = _error(CRTL, bytes([0, 0x04 | 0x08]))  # RX_WARNING | TX_WARNING
    assert (warning.state, warning.state_side, warning.counters) == ("warning", "tx+rx", None)
    assert _error(CRTL, bytes([0, 0x40])).state == "error-active"  # CAN_ERR_CRTL_ACTIVE
    overflow = _error(CRTL, bytes([0, 0x01]))  # CAN_ERR_CRTL_RX_OVERFLOW
    assert overflow.rx_overflow and overflow.state is None
    assert _error(BUSOFF, b"").state == "bus-off"
    assert _error(RESTARTED, b"").state == "restarted"
    # counters are taken only when CAN_ERR_CNT says data[6..7] are valid
    assert _error(CRTL, bytes([0, 0x20, 0, 0, 0, 0, 200, 9])).counters is None


def test_transceiver_and_timeout_notes() -> None:
    report = _error(TRX | TX_TIMEOUT, bytes([0, 0, 0, 0, 0x07]))  # CANH short to ground
    assert report.notes == ["transceiver: CANH short to ground", "transmit timeout"]


def test_ancillary_timestamps_and_drop_counter() -> None:
    # layouts: struct timespec {long tv_sec; long tv_nsec} (64-bit ABI), scm_timestamping is
    # three timespecs (linux/errqueue.h), SO_RXQ_OVFL a u32; the levels/types from
    # asm-generic/socket.h
    ts = struct.pack("@ll", 1_796_072_645, 123_456_789)
    hw = struct.pack("@llllll", 1, 2, 0, 0, 1_796_072_645, 999)
    drops = (7).to_bytes(4, sys.byteorder)
    anc = sc.parse_ancillary([(socket.SOL_SOCKET, 35, ts), (socket.SOL_SOCKET, 37, hw),
                              (socket.SOL_SOCKET, 40, drops), (263, 1, b"ignored")])
    assert anc.software_ns == 1_796_072_645_123_456_789
    assert anc.hardware_ns == 1_796_072_645_000_000_999
    assert anc.drops == 7
    assert sc.parse_ancillary([]) == sc.Ancillary()
