"""Linux SocketCAN as data: constants, structure layouts, error-frame meaning, ancillary data.

Every constant names the kernel header it comes from; the headers read were Debian's
linux-libc-dev 6.1.187-1 (/usr/include/linux/can.h, can/raw.h, can/error.h,
asm-generic/socket.h, linux/net_tstamp.h). Nothing here opens a socket except
``open_can_socket()``; decoding works on bytes, so tests build frames themselves.
"""

from __future__ import annotations

import errno
import socket
import struct
from dataclasses import dataclass, field

from tracelab.errors import UsageError
from tracelab.format.grammar import FD_PAYLOAD_BYTES

# --- linux/can.h ------------------------------------------------------------------------------
# source: linux/can.h (linux-libc-dev 6.1.187-1)
CAN_EFF_FLAG = 0x80000000  # EFF/SFF is set in the MSB
CAN_RTR_FLAG = 0x40000000  # remote transmission request
CAN_ERR_FLAG = 0x20000000  # error message frame
CAN_SFF_MASK = 0x000007FF
CAN_EFF_MASK = 0x1FFFFFFF
CAN_ERR_MASK = 0x1FFFFFFF  # omit EFF, RTR, ERR flags
CAN_MAX_DLEN = 8
CANFD_MAX_DLEN = 64
CANFD_BRS = 0x01  # bit rate switch (second bitrate for payload data)
CANFD_ESI = 0x02  # error state indicator of the transmitting node
CANFD_FDF = 0x04  # mark CAN FD for dual use of struct canfd_frame
CAN_RAW = 1
SOL_CAN_BASE = 100
#: struct can_frame: can_id u32, len u8, __pad u8, __res0 u8, len8_dlc u8, data[8] (aligned 8)
CAN_FRAME = struct.Struct("=IBBBB8s")
#: struct canfd_frame: can_id u32, len u8, flags u8, __res0 u8, __res1 u8, data[64] (aligned 8)
CANFD_FRAME = struct.Struct("=IBBBB64s")
CAN_MTU = CAN_FRAME.size  # 16
CANFD_MTU = CANFD_FRAME.size  # 72
AF_CAN = getattr(socket, "AF_CAN", 29)  # socket module; 29 is linux/socket.h's AF_CAN

# --- linux/can/raw.h --------------------------------------------------------------------------
# source: linux/can/raw.h (linux-libc-dev 6.1.187-1): SOL_CAN_RAW = SOL_CAN_BASE + CAN_RAW and
# the option enum CAN_RAW_FILTER = 1, CAN_RAW_ERR_FILTER, CAN_RAW_LOOPBACK,
# CAN_RAW_RECV_OWN_MSGS, CAN_RAW_FD_FRAMES, ...
SOL_CAN_RAW = SOL_CAN_BASE + CAN_RAW
CAN_RAW_ERR_FILTER = 2
CAN_RAW_FD_FRAMES = 5

# --- asm-generic/socket.h, linux/net_tstamp.h --------------------------------------------------
# source: asm-generic/socket.h (linux-libc-dev 6.1.187-1); x86-64 and arm64 use these values
SOL_SOCKET = socket.SOL_SOCKET
SO_TIMESTAMPNS = 35  # SO_TIMESTAMPNS_OLD; SCM_TIMESTAMPNS is the same number
SO_TIMESTAMPING = 37  # SO_TIMESTAMPING_OLD; SCM_TIMESTAMPING likewise
SO_RXQ_OVFL = 40
# source: linux/net_tstamp.h (linux-libc-dev 6.1.187-1)
SOF_TIMESTAMPING_RX_HARDWARE = 1 << 2
SOF_TIMESTAMPING_RX_SOFTWARE = 1 << 3
SOF_TIMESTAMPING_SOFTWARE = 1 << 4
SOF_TIMESTAMPING_RAW_HARDWARE = 1 << 6
#: struct timespec on a 64-bit kernel ABI (time_t and long are the C long); struct
#: scm_timestamping (linux/errqueue.h) is three of them: software, (legacy), raw hardware.
TIMESPEC = struct.Struct("@ll")
SCM_TIMESTAMPING = struct.Struct("@llllll")
RXQ_OVFL = struct.Struct("@I")  # the socket's cumulative drop counter, a u32

# --- linux/can/error.h ------------------------------------------------------------------------
# source: linux/can/error.h (linux-libc-dev 6.1.187-1)
CAN_ERR_DLC = 8
CAN_ERR_TX_TIMEOUT = 0x001  # TX timeout (by netdevice driver)
CAN_ERR_LOSTARB = 0x002  # lost arbitration / data[0]
CAN_ERR_CRTL = 0x004  # controller problems / data[1]
CAN_ERR_PROT = 0x008  # protocol violations / data[2..3]
CAN_ERR_TRX = 0x010  # transceiver status / data[4]
CAN_ERR_ACK = 0x020  # received no ACK on transmission
CAN_ERR_BUSOFF = 0x040  # bus off
CAN_ERR_BUSERROR = 0x080  # bus error (may flood!)
CAN_ERR_RESTARTED = 0x100  # controller restarted
CAN_ERR_CNT = 0x200  # TX error counter / data[6], RX error counter / data[7]
#: data[1], controller status
CAN_ERR_CRTL_RX_OVERFLOW = 0x01
CAN_ERR_CRTL_TX_OVERFLOW = 0x02
CAN_ERR_CRTL_RX_WARNING = 0x04
CAN_ERR_CRTL_TX_WARNING = 0x08
CAN_ERR_CRTL_RX_PASSIVE = 0x10
CAN_ERR_CRTL_TX_PASSIVE = 0x20
CAN_ERR_CRTL_ACTIVE = 0x40
#: data[2], protocol violation type
CAN_ERR_PROT_UNSPEC = 0x00
CAN_ERR_PROT_BIT = 0x01
CAN_ERR_PROT_FORM = 0x02
CAN_ERR_PROT_STUFF = 0x04
CAN_ERR_PROT_BIT0 = 0x08
CAN_ERR_PROT_BIT1 = 0x10
CAN_ERR_PROT_OVERLOAD = 0x20
CAN_ERR_PROT_ACTIVE = 0x40
CAN_ERR_PROT_TX = 0x80
#: data[3], protocol violation location
PROT_LOCATIONS: dict[int, tuple[str, str]] = {
    # code: (kernel name, format field)
    0x00: ("CAN_ERR_PROT_LOC_UNSPEC", "unknown"),
    0x03: ("CAN_ERR_PROT_LOC_SOF", "sof"),
    0x02: ("CAN_ERR_PROT_LOC_ID28_21", "arbitration"),
    0x06: ("CAN_ERR_PROT_LOC_ID20_18", "arbitration"),
    0x04: ("CAN_ERR_PROT_LOC_SRTR", "arbitration"),
    0x05: ("CAN_ERR_PROT_LOC_IDE", "arbitration"),
    0x07: ("CAN_ERR_PROT_LOC_ID17_13", "arbitration"),
    0x0F: ("CAN_ERR_PROT_LOC_ID12_05", "arbitration"),
    0x0E: ("CAN_ERR_PROT_LOC_ID04_00", "arbitration"),
    0x0C: ("CAN_ERR_PROT_LOC_RTR", "arbitration"),
    0x0D: ("CAN_ERR_PROT_LOC_RES1", "control"),
    0x09: ("CAN_ERR_PROT_LOC_RES0", "control"),
    0x0B: ("CAN_ERR_PROT_LOC_DLC", "control"),
    0x0A: ("CAN_ERR_PROT_LOC_DATA", "data"),
    0x08: ("CAN_ERR_PROT_LOC_CRC_SEQ", "crc"),
    0x18: ("CAN_ERR_PROT_LOC_CRC_DEL", "crc"),
    0x19: ("CAN_ERR_PROT_LOC_ACK", "ack"),
    0x1B: ("CAN_ERR_PROT_LOC_ACK_DEL", "ack"),
    0x1A: ("CAN_ERR_PROT_LOC_EOF", "eof"),
    0x12: ("CAN_ERR_PROT_LOC_INTERM", "interframe"),
}
#: data[2] bits that name an ISO 11898-1 error type, checked in this order.
PROT_TYPES: tuple[tuple[int, str], ...] = (
    (CAN_ERR_PROT_BIT, "bit"), (CAN_ERR_PROT_BIT0, "bit"), (CAN_ERR_PROT_BIT1, "bit"),
    (CAN_ERR_PROT_STUFF, "stuff"), (CAN_ERR_PROT_FORM, "form"),
)
#: With no type bit, drivers report CRC and ACK errors by location alone (from memory:
#: e.g. the m_can and flexcan drivers set only data[3] for a CRC or ACK error).
TYPE_BY_LOCATION = {0x08: "crc", 0x19: "ack", 0x1B: "ack"}
#: data[4], transceiver status (linux/can/error.h)
TRX_STATUS = {
    0x04: "CANH no wire", 0x05: "CANH short to battery", 0x06: "CANH short to VCC",
    0x07: "CANH short to ground", 0x40: "CANL no wire", 0x50: "CANL short to battery",
    0x60: "CANL short to VCC", 0x70: "CANL short to ground", 0x80: "CANL short to CANH",
}

#: CAN FD payload length -> DLC (ISO 11898-1:2015, Table 5, as format.grammar holds it).
FD_LEN_TO_DLC = {n: dlc for dlc, n in enumerate(FD_PAYLOAD_BYTES)}


@dataclass(frozen=True)
class CanFrame:
    """One received structure, decoded."""

    can_id: int  # without the flag bits
    ext: bool
    rtr: bool
    err: bool
    fd: bool
    brs: bool
    esi: bool
    dlc: int
    data: bytes


def _fd_dlc(length: int) -> tuple[int, int]:
    """(DLC, payload bytes) for a CAN FD length; a length between two DLC sizes is rounded up
    (the kernel's can_fd_len2dlc() does the same, from memory; real drivers only deliver the
    16 sizes, virtual interfaces pass what a sender wrote)."""
    length = min(length, CANFD_MAX_DLEN)
    for size in FD_PAYLOAD_BYTES:
        if size >= length:
            return FD_LEN_TO_DLC[size], size
    return 15, CANFD_MAX_DLEN


def decode_frame(buf: bytes) -> CanFrame:
    """A ``struct can_frame`` (16 bytes) or ``struct canfd_frame`` (72 bytes) from recvmsg.

    Which one it is follows from the size (with CAN_RAW_FD_FRAMES on, the kernel delivers
    classic frames as 16 bytes and CAN FD frames as 72). A classic DLC of 9-15 arrives in
    ``len8_dlc`` when ``len`` is 8.
    """
    if len(buf) == CANFD_MTU:
        raw_id, length, flags, _, _, payload = CANFD_FRAME.unpack(buf)
        ext = bool(raw_id & CAN_EFF_FLAG)
        err = bool(raw_id & CAN_ERR_FLAG)
        ident = raw_id & (CAN_ERR_MASK if err else CAN_EFF_MASK if ext else CAN_SFF_MASK)
        dlc, size = _fd_dlc(length)
        data = payload[:min(length, CANFD_MAX_DLEN)].ljust(size, b"\0")
        return CanFrame(ident, ext, False, err, True, bool(flags & CANFD_BRS),
                        bool(flags & CANFD_ESI), dlc, data)
    if len(buf) == CAN_MTU:
        raw_id, length, _, _, len8_dlc, payload = CAN_FRAME.unpack(buf)
        ext = bool(raw_id & CAN_EFF_FLAG)
        rtr = bool(raw_id & CAN_RTR_FLAG)
        err = bool(raw_id & CAN_ERR_FLAG)
        ident = raw_id & (CAN_ERR_MASK if err else CAN_EFF_MASK if ext else CAN_SFF_MASK)
        length = min(length, CAN_MAX_DLEN)
        dlc = len8_dlc if length == CAN_MAX_DLEN and 9 <= len8_dlc <= 15 else length
        return CanFrame(ident, ext, rtr, err, False, False, False, dlc,
                        b"" if rtr else payload[:length])
    raise ValueError(f"{len(buf)} bytes is neither a can_frame ({CAN_MTU}) nor a canfd_frame "
                     f"({CANFD_MTU})")


@dataclass
class ErrorReport:
    """What one kernel error frame says, in the format's terms."""

    errors: list[tuple[str, str]] = field(default_factory=list)  # (type, field)
    state: str | None = None  # warning | error-passive | bus-off | error-active | restarted
    state_side: str = ""  # "tx", "rx", "tx+rx" or "" for warning / error-passive
    counters: tuple[int, int] | None = None  # (tec, rec) when CAN_ERR_CNT says they are valid
    rx_overflow: bool = False  # the controller dropped received frames
    notes: list[str] = field(default_factory=list)  # for a mark: what the log has no field for
    lost_arbitration: bool = False


def interpret_error(frame: CanFrame) -> ErrorReport:
    """Map the error class bits (in the id) and data bytes to records (docs/capture.md)."""
    cls = frame.can_id
    data = frame.data.ljust(CAN_ERR_DLC, b"\0")
    report = ErrorReport()
    if cls & CAN_ERR_PROT:
        kind, location = data[2], data[3]
        error_type = next((name for bit, name in PROT_TYPES if kind & bit),
                          TYPE_BY_LOCATION.get(location, "ack" if cls & CAN_ERR_ACK else "other"))
        report.errors.append((error_type, PROT_LOCATIONS.get(location, ("", "unknown"))[1]))
        if kind & CAN_ERR_PROT_OVERLOAD:
            report.notes.append("overload reported")
    elif cls & CAN_ERR_ACK:
        report.errors.append(("ack", "ack"))
    elif cls & CAN_ERR_BUSERROR:
        report.errors.append(("other", "unknown"))
    if cls & CAN_ERR_CRTL:
        status = data[1]
        report.rx_overflow = bool(status & CAN_ERR_CRTL_RX_OVERFLOW)
        if status & CAN_ERR_CRTL_TX_OVERFLOW:
            report.notes.append("controller TX buffer overflow")
        for tx_bit, rx_bit, state in (
                (CAN_ERR_CRTL_TX_PASSIVE, CAN_ERR_CRTL_RX_PASSIVE, "error-passive"),
                (CAN_ERR_CRTL_TX_WARNING, CAN_ERR_CRTL_RX_WARNING, "warning")):
            if status & (tx_bit | rx_bit):
                report.state = state
                report.state_side = "+".join(s for s, b in (("tx", tx_bit), ("rx", rx_bit))
                                             if status & b)
                break
        else:
            if status & CAN_ERR_CRTL_ACTIVE:
                report.state = "error-active"
    if cls & CAN_ERR_BUSOFF:
        report.state, report.state_side = "bus-off", ""
    if cls & CAN_ERR_RESTARTED:
        report.state, report.state_side = "restarted", ""
    if cls & CAN_ERR_CNT:
        report.counters = (data[6], data[7])
    if cls & CAN_ERR_TRX and data[4]:
        report.notes.append("transceiver: " + TRX_STATUS.get(data[4], f"status 0x{data[4]:02X}"))
    if cls & CAN_ERR_TX_TIMEOUT:
        report.notes.append("transmit timeout")
    report.lost_arbitration = bool(cls & CAN_ERR_LOSTARB)
    return report


@dataclass(frozen=True)
class Ancillary:
    """Receive timestamps (ns since 1970, or the device clock for hardware) and the socket's
    cumulative drop counter, from recvmsg's ancillary data."""

    software_ns: int | None = None
    hardware_ns: int | None = None
    drops: int | None = None


def parse_ancillary(ancdata: list[tuple[int, int, bytes]]) -> Ancillary:
    software = hardware = drops = None
    for level, kind, payload in ancdata:
        if level != SOL_SOCKET:
            continue
        if kind == SO_TIMESTAMPNS and len(payload) >= TIMESPEC.size:
            sec, nsec = TIMESPEC.unpack_from(payload)
            software = sec * 1_000_000_000 + nsec
        elif kind == SO_TIMESTAMPING and len(payload) >= SCM_TIMESTAMPING.size:
            s_sec, s_nsec, _, _, h_sec, h_nsec = SCM_TIMESTAMPING.unpack_from(payload)
            if s_sec or s_nsec:
                software = software or s_sec * 1_000_000_000 + s_nsec
            if h_sec or h_nsec:
                hardware = h_sec * 1_000_000_000 + h_nsec
        elif kind == SO_RXQ_OVFL and len(payload) >= RXQ_OVFL.size:
            (drops,) = RXQ_OVFL.unpack_from(payload)
    return Ancillary(software, hardware, drops)


#: Room recvmsg needs for the ancillary data above (with slack for the cmsg headers).
ANCILLARY_BYTES = socket.CMSG_SPACE(TIMESPEC.size) + socket.CMSG_SPACE(SCM_TIMESTAMPING.size) \
    + socket.CMSG_SPACE(RXQ_OVFL.size) + 64


def enable_receive_options(sock: socket.socket, hardware: bool = False) -> None:
    """Kernel receive timestamps, optional hardware ones, and the drop counter; these are
    SOL_SOCKET options and work on any datagram socket (the tests use a socket pair)."""
    sock.setsockopt(SOL_SOCKET, SO_TIMESTAMPNS, 1)
    if hardware:
        sock.setsockopt(SOL_SOCKET, SO_TIMESTAMPING,
                        SOF_TIMESTAMPING_RX_HARDWARE | SOF_TIMESTAMPING_RAW_HARDWARE
                        | SOF_TIMESTAMPING_RX_SOFTWARE | SOF_TIMESTAMPING_SOFTWARE)
    sock.setsockopt(SOL_SOCKET, SO_RXQ_OVFL, 1)


def open_can_socket(iface: str, hardware: bool = False,
                    receive_buffer: int = 4 << 20) -> socket.socket:
    """A raw CAN socket bound to ``iface``: CAN FD frames on, every error class subscribed,
    timestamps and the drop counter as ancillary data."""
    try:
        sock = socket.socket(AF_CAN, socket.SOCK_RAW, CAN_RAW)
    except OSError as error:
        if error.errno in (errno.EAFNOSUPPORT, errno.EPROTONOSUPPORT, errno.EINVAL):
            raise UsageError("this kernel offers no SocketCAN raw sockets (AF_CAN); load the "
                             "modules: modprobe can_raw") from None
        raise UsageError(f"{iface}: cannot open a CAN socket ({error.strerror})") from None
    try:
        sock.setsockopt(SOL_CAN_RAW, CAN_RAW_FD_FRAMES, 1)
        sock.setsockopt(SOL_CAN_RAW, CAN_RAW_ERR_FILTER, struct.pack("=I", CAN_ERR_MASK))
        enable_receive_options(sock, hardware)
        sock.setsockopt(SOL_SOCKET, socket.SO_RCVBUF, receive_buffer)
        sock.bind((iface,))
    except OSError as error:
        sock.close()
        if error.errno == errno.ENODEV:
            raise UsageError(f"{iface}: no such CAN interface (see `ip -details link show`)"
                             ) from None
        if error.errno in (errno.EPERM, errno.EACCES):
            raise UsageError(f"{iface}: permission denied ({error.strerror}); see "
                             "docs/capture.md, Permissions") from None
        raise UsageError(f"{iface}: cannot set up the CAN socket ({error.strerror})") from None
    return sock
