"""Bad-input fixtures shared by the reader and CLI tests: (name, record line, reason part).

Every log starts with HEADER (3 lines) and one good record on line 4; the bad record is
line 5 and one more good record follows on line 6.
"""

from __future__ import annotations

HEADER = ("%tracelab-frames 1\n%bus P nominal=500000\n%bus C nominal=500000 data=2000000\n")
GOOD = "1000\tP\tframe\t0C0\ts\t1\tAA\n"
BAD_LINE = 5

RECORD_CASES: list[tuple[str, str, str]] = [
    ("no kind", "5\tP", "missing fields: a record starts with t_ns, bus, kind (found 2)"),
    ("missing field", "5\tP\tframe\t0C0\ts\t8",
     "missing fields: frame needs 7 (t_ns bus kind id form dlc data), found 6"),
    ("extra field", "5\tP\tframe\t0C0\ts\t0\t-\tx",
     "extra fields: frame needs 7 (t_ns bus kind id form dlc data), found 8"),
    ("non-hex id", "5\tP\tframe\t0G0\ts\t0\t-", "id '0G0' is not 1-8 hex digits"),
    ("id too long", "5\tP\tframe\t123456789\tx\t0\t-", "id '123456789' is not 1-8 hex digits"),
    ("non-hex data", "5\tP\tframe\t0C0\ts\t1\tZZ", "data 'ZZ' is not hex"),
    ("odd hex data", "5\tP\tframe\t0C0\ts\t1\tAAB", "data has an odd number of hex digits (3)"),
    ("11-bit id range", "5\tP\tframe\t800\ts\t0\t-",
     "id 800 is out of range for an 11-bit identifier (max 7FF)"),
    ("29-bit id range", "5\tP\tframe\t20000000\tx\t0\t-",
     "id 20000000 is out of range for a 29-bit identifier (max 1FFFFFFF)"),
    ("classic data length", "5\tP\tframe\t0C0\ts\t8\t1122", "data has 2 bytes, DLC 8 (s) needs 8"),
    ("classic dlc 9 carries 8", "5\tP\tframe\t0C0\ts\t9\t112233445566778899",
     "data has 9 bytes, DLC 9 (s) needs 8"),
    ("fd data length", "5\tC\tframe\t123\tsf\t9\t0011223344556677",
     "data has 8 bytes, DLC 9 (sf) needs 12"),
    ("empty payload needs dash", "5\tP\tframe\t0C0\ts\t1\t-", "data has 0 bytes, DLC 1 (s) needs 1"),
    ("remote with data", "5\tP\tframe\t0C0\tsr\t2\tAABB", "a remote frame carries no data"),
    ("form b without f", "5\tP\tframe\t0C0\tsb\t0\t-", "form 'sb' is invalid"),
    ("form remote fd", "5\tC\tframe\t0C0\tsrf\t0\t-", "form 'srf' is invalid"),
    ("form order", "5\tC\tframe\t0C0\tsef\t0\t-", "form 'sef' is invalid"),
    ("form letter", "5\tP\tframe\t0C0\tq\t0\t-", "form 'q' is invalid"),
    ("dlc range", "5\tP\tframe\t0C0\ts\t16\t-", "dlc '16' is not 0-15"),
    ("brs without data rate", "5\tP\tframe\t0C0\tsfb\t1\tAA",
     "bit-rate switch (b) on bus 'P', which declares no data= bit rate"),
    ("unknown bus", "5\tQ\tframe\t0C0\ts\t0\t-", "unknown bus 'Q' (declared: P, C)"),
    ("unknown bus suggestion", "5\tCC\tframe\t0C0\ts\t0\t-",
     "unknown bus 'CC' (declared: P, C); did you mean 'C'?"),
    ("all buses on a frame", "5\t*\tframe\t0C0\ts\t0\t-",
     "bus '*' (all buses) is allowed for mark records only, not frame"),
    ("unknown kind", "5\tP\tfrme\t0C0\ts\t0\t-",
     "unknown record kind 'frme'; did you mean 'frame'?"),
    ("negative time", "-5\tP\tframe\t0C0\ts\t0\t-", "t_ns '-5' is negative"),
    ("non-integer time", "1.5\tP\tframe\t0C0\ts\t0\t-",
     "t_ns '1.5' is not a non-negative integer (nanoseconds)"),
    ("error type", "5\tP\terror\tbits\tdata\t-\t-\t-", "error type 'bits' is not one of"),
    ("error field", "5\tP\terror\tbit\tpayload\t-\t-\t-", "error field 'payload' is not one of"),
    ("error id without form", "5\tP\terror\tbit\tdata\t0C0\t-\t-",
     "id and form go together: give both, or '-' for both"),
    ("error id range", "5\tP\terror\tbit\tdata\t800\ts\t-",
     "id 800 is out of range for an 11-bit identifier"),
    ("status counter", "5\tP\tstatus\tinv\t-1\t0", "tec '-1' is not a non-negative integer"),
    ("loss until", "5\tP\tloss\t3\t4", "until_ns 4 is before t_ns 5"),
    ("loss count", "5\tP\tloss\tmany\t9", "count 'many' is not a non-negative integer or '-'"),
]


def record_log(bad: str) -> str:
    return HEADER + GOOD + bad + "\n" + "2000\tP\tmark\tafter\n"


#: Faults that make the whole file unreadable: (name, bytes, line or None, reason part).
FATAL_CASES: list[tuple[str, bytes, int | None, str]] = [
    ("empty file", b"", None, "empty file: line 1 must be '%tracelab-frames 1'"),
    ("missing magic", b"%bus P nominal=500000\n0\tP\tmark\tx\n", 1,
     "not a tracelab frame log: line 1 must be '%tracelab-frames 1', found '%bus P"),
    ("bad magic", b"%tracelab-frame 1\n", 1, "not a tracelab frame log"),
    ("unsupported version", b"%tracelab-frames 2\n%bus P nominal=1\n", 1,
     "format version 2 is not supported (this tracelab reads version 1)"),
    ("directive after records", (HEADER + GOOD + "%bus D nominal=250000\n").encode(), 5,
     "directive '%bus' after the first record"),
    ("bad bus rate", b"%tracelab-frames 1\n%bus P nominal=fast\n", 2,
     "%bus P: nominal='fast' is not a positive integer bit rate"),
    ("unknown directive", b"%tracelab-frames 1\n%buss P nominal=1\n", 2,
     "unknown directive '%buss'; did you mean 'bus'?"),
]
