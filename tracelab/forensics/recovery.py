"""Bus-off recovery: when a bus-off node has seen 128 x 11 recessive bits (rule l).

Every frame and every error frame ends with 11 recessive bits; the idle time after it adds
more. Error frames are placed from their record time (flag start) with the usual flag lengths;
where in the destroyed frame the error fell is estimated from its ``field``.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from tracelab.forensics.evidence import KIND_ERROR, BusEvidence
from tracelab.physics.confinement import (
    RECOVERY_SEQUENCE_BITS,
    RECOVERY_SEQUENCES,
    ConfinementConfig,
)
from tracelab.store.schema import sql_string

#: Error flag bits: a first detector's flag superposed with everybody else's (12), or a lone
#: transmitter's flag on an ACK error (6); then error delimiter (8) and intermission (3).
ERROR_FLAG_BITS = {"ack": 6}
SUPERPOSED_FLAG_BITS = 12
ERROR_TAIL_BITS = 11
#: Where in a frame an error in this field is flagged, as a fraction of the frame (rough
#: midpoints of each field in an 8-byte classic frame; 1.0 = just before the ACK delimiter).
FIELD_POSITION = {"sof": 0.0, "arbitration": 0.12, "control": 0.25, "data": 0.5, "crc": 0.85,
                  "ack": 1.0, "eof": 1.0, "interframe": 1.0, "unknown": 0.5}


def _busy_intervals(ev: BusEvidence, t_from: int, t_to: int) -> tuple[np.ndarray, np.ndarray]:
    """Bus-occupied [start, end) intervals from t_from on: frames and error frames.

    An error frame ends 12 (6 for ACK errors) + 8 + 3 bit times after its record's t_ns; it
    started at the previous interval's end at the earliest, and a frame time before its flag
    at the latest (ACK and CRC errors: right before the ACK slot).
    """
    starts = ends = np.zeros(0, dtype=np.int64)
    if ev.con is not None:
        rows = ev.con.execute(
            f"SELECT start_ns, end_ns FROM frames WHERE run = {sql_string(ev.run)} AND bus = "
            f"{sql_string(ev.bus)} AND t_ns >= {t_from} AND t_ns <= {t_to} "
            "ORDER BY start_ns").fetchnumpy()
        starts = np.asarray(rows["start_ns"], dtype=np.int64)
        ends = np.asarray(rows["end_ns"], dtype=np.int64)
    errs = ev.events.filter((pl.col("kind") == KIND_ERROR) & (pl.col("t_ns") >= t_from)
                            & (pl.col("t_ns") <= t_to))
    if errs.height:
        dur = {(int(i), bool(x)): int(b) // max(1, int(n)) for i, x, b, n in
               ev.frames_by_id.select("id", "ext", "busy_ns", "frames").iter_rows()}
        t_flag = errs["t_ns"].to_numpy().astype(np.int64)
        types = errs["type"].to_list()
        keys = list(zip(errs["id"].to_list(), errs["ext"].to_list(), strict=True))
        flag = np.array([ERROR_FLAG_BITS.get(t, SUPERPOSED_FLAG_BITS) for t in types])
        e_end = (t_flag + (flag + 8 + 3) * ev.bit_ns).astype(np.int64)
        frame_ns = np.array([dur.get((int(i), bool(x)), 0) if i is not None else 0
                             for i, x in keys], dtype=np.float64)
        fields = errs["field"].to_list()
        where = np.array([FIELD_POSITION.get(f or "unknown", 0.5) for f in fields])
        late = np.isin(np.array(types, dtype=object), ["ack", "crc"]) | (where >= 1.0)
        before = np.where(late, frame_ns - ERROR_TAIL_BITS * ev.bit_ns, where * frame_ns)
        e_start = (t_flag - np.maximum(before, 0)).astype(np.int64)
        starts = np.concatenate([starts, e_start])
        ends = np.concatenate([ends, e_end])
        order = np.argsort(ends, kind="stable")
        starts, ends = starts[order], ends[order]
        prev_end = np.concatenate([[starts[0]], ends[:-1]])
        starts = np.maximum(starts, prev_end)
    return starts, ends


def recovery_end_ns(ev: BusEvidence, t_ns: int, config: ConfinementConfig) -> int:
    """When a node that went bus-off at t_ns has seen 128 x 11 recessive bits (rule l).

    Every frame and error frame ends with 11 recessive bits (ACK delimiter + EOF +
    intermission, or error delimiter + intermission); each recessive run (that tail plus the
    idle time after it) supplies floor(run / 11 bits) sequences. With software recovery the
    count starts recovery_delay_ns after the bus-off.
    """
    key = (t_ns, config.recovery_delay_ns if config.recovery == "software" else -1)
    if key in ev._recovery_cache:
        return ev._recovery_cache[key]
    seq_ns = RECOVERY_SEQUENCE_BITS * ev.bit_ns
    count_from = t_ns + (config.recovery_delay_ns if config.recovery == "software" else 0)
    i0 = ev.frame_t.searchsorted(t_ns, side="left")
    i1 = i0 + 4 * RECOVERY_SEQUENCES
    t_to = int(ev.frame_t[i1]) if i1 < ev.frame_t.size else ev.last_t_ns
    if config.recovery == "software":
        t_to = max(t_to, count_from + (t_to - t_ns))
    starts, ends = _busy_intervals(ev, t_ns, t_to)
    result: int | None = None
    if ends.size:
        run_start = np.maximum(ends - ERROR_TAIL_BITS * ev.bit_ns, count_from)
        run_end = np.concatenate([starts[1:], [np.iinfo(np.int64).max // 4]]).astype(np.float64)
        per_run = np.floor(np.maximum(run_end - run_start, 0) / seq_ns + 1e-9)
        cum = np.cumsum(per_run)
        k = int(np.searchsorted(cum, RECOVERY_SEQUENCES, side="left"))
        if k < ends.size:
            done_before = cum[k - 1] if k > 0 else 0.0
            q = RECOVERY_SEQUENCES - done_before
            result = int(np.ceil(run_start[k] + q * seq_ns))
    if result is None:
        result = int(np.ceil(count_from + RECOVERY_SEQUENCES * seq_ns))
    ev._recovery_cache[key] = result
    return result

