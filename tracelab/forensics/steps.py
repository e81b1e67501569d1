"""Every counter change between two replay events, at the frame that made it.

The replay walks error and status records only; between two records it applies the run of
successes in one step (rule g: TEC -1 per own frame, rule h: REC -1 per reception, or into
119..127 from above 127) and records the result at the later record. Drawn as a step
function, that row reads as "flat, then a drop". This module expands each such row into the
changes the frames really made: the k-th own frame after the earlier row lowers TEC by k, the
k-th reception lowers REC, so the stored counters are the step function the rules define.
Vectorised over all rows of a node at once (no loop over rows or frames).
"""

from __future__ import annotations

import numpy as np
import polars as pl

from tracelab.forensics.evidence import BusEvidence
from tracelab.forensics.framestore import Column
from tracelab.physics.confinement import BUS_OFF_LIMIT, PASSIVE_LIMIT, ConfinementConfig


def _steps(times: Column, starts: np.ndarray, counts: np.ndarray
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For segment s, the first counts[s] entries of ``times`` from index starts[s] on:
    (segment, 1-based step k, time), entries past the end of ``times`` left out."""
    counts = np.maximum(counts, 0)
    total = int(counts.sum())
    if total == 0:
        return (np.empty(0, np.int64),) * 3
    seg = np.repeat(np.arange(counts.size), counts)
    first = np.repeat(np.cumsum(counts) - counts, counts)
    k = np.arange(total) - first  # 0-based within the segment
    idx = starts[seg] + k
    ok = idx < times.size
    return seg[ok], (k + 1)[ok], times[idx[ok]]


def _receptions(ev: BusEvidence, node: int, t0: np.ndarray, counts: np.ndarray
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """For segment s, the first counts[s] frames after t0[s] not sent by ``node``:
    (segment, 1-based step k, time), as _steps over the node's receptions would give.

    Reads only windows of the frames after each t0 (the sender of each), widened for the
    segments whose window held too few receptions, never every frame of the bus."""
    counts = np.maximum(counts, 0)
    size = ev.frame_t.size
    g0 = np.asarray(ev.frame_t.searchsorted(t0, side="right"), dtype=np.int64)
    width = counts + counts // 2 + 8
    todo = np.flatnonzero((counts > 0) & (g0 < size))
    out: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []
    while todo.size:  # a loop over widenings (a few), vectorised over segments
        w = np.minimum(width[todo], size - g0[todo])
        rep = np.repeat(np.arange(todo.size), w)
        first = np.repeat(np.cumsum(w) - w, w)
        idx = g0[todo][rep] + np.arange(rep.size) - first
        received = ev.frame_node[idx] != node
        rank = np.cumsum(received)
        before = np.concatenate([[0], rank])[first]  # receptions before each window
        k = rank - before                            # 1-based within the window
        got = np.bincount(rep, weights=received, minlength=todo.size).astype(np.int64)
        enough = (got >= counts[todo]) | (w >= size - g0[todo])
        take = received & enough[rep] & (k <= counts[todo][rep])
        out.append((todo[rep[take]], k[take], ev.frame_t[idx[take]]))
        todo = todo[~enough]
        width[todo] *= 4
    if not out:
        return (np.empty(0, np.int64),) * 3
    seg, k, when = (np.concatenate(x) for x in zip(*out, strict=True))
    order = np.lexsort((k, seg))
    return seg[order], k[order], np.asarray(when[order], dtype=np.int64)


#: State names by the codes _state_codes gives.
STATE_NAMES = ("error-active", "warning", "error-passive", "bus-off")


def _state_codes(tec: np.ndarray, rec: np.ndarray, config: ConfinementConfig) -> np.ndarray:
    """state_of() over arrays (the same rules: i, j, k and the warning level), as indices
    into STATE_NAMES."""
    hot = np.maximum(tec, rec)
    warm = hot >= config.warning_level if config.warning_inclusive else \
        hot > config.warning_level
    return np.where(tec > BUS_OFF_LIMIT, 3,
                    np.where((tec > PASSIVE_LIMIT) | (rec > PASSIVE_LIMIT), 2,
                             np.where(warm, 1, 0))).astype(np.int8)


def every_change(rows: pl.DataFrame, ev: BusEvidence, node: int,
                 config: ConfinementConfig) -> pl.DataFrame:
    """``rows`` (t_ns, tec, rec, state, cause, uncertain, in replay order) with a row before
    each "successes" row for every decrement since the row before it, and the decrements
    after the last row (the replay writes no tail row for an error-active node)."""
    if rows.is_empty() or node < 0:
        return rows
    t = rows["t_ns"].to_numpy().astype(np.int64)
    tec = rows["tec"].to_numpy().astype(np.int64)
    rec = rows["rec"].to_numpy().astype(np.int64)
    unc = rows["uncertain"].to_numpy()
    after = config.rec_after_passive_reception
    last = rows.height - 1
    # segments: (from row i-1 to a "successes" row i), and the tail after the last row
    i = np.flatnonzero((rows["cause"] == "successes").fill_null(False).to_numpy()[1:]) + 1
    t0, t1 = t[i - 1], t[i]
    tec0, tec1, rec0, rec1 = tec[i - 1], tec[i], rec[i - 1], rec[i]
    seg_unc = unc[i]
    if rows["state"][last] != "bus-off" and (tec[last] > 0 or rec[last] > 0):
        t0 = np.append(t0, t[last])
        t1 = np.append(t1, np.iinfo(np.int64).max)
        tec0, rec0 = np.append(tec0, tec[last]), np.append(rec0, rec[last])
        tec1, rec1 = np.append(tec1, 0), np.append(rec1, 0)
        seg_unc = np.append(seg_unc, unc[last])
    if t0.size == 0:
        return rows
    own = ev.own_t[node]
    # rule g: one step down per own frame after t0
    s_a, k_a, t_a = _steps(own, own.searchsorted(t0, side="right"), tec0 - tec1)
    # rule h: per reception; from above 127 the first one sets `after`, then -1 each
    rec_steps = np.where(rec0 > PASSIVE_LIMIT, 1 + np.maximum(0, after - rec1), rec0 - rec1)
    rec_steps = np.where(rec1 < rec0, rec_steps, 0)
    s_b, k_b, t_b = _receptions(ev, node, t0, rec_steps)
    seg = np.concatenate([s_a, s_b])
    when = np.concatenate([t_a, t_b])
    keep = when < t1[seg]  # the row at t1 itself holds the value after t1
    if not keep.any():
        return rows
    is_tec = np.concatenate([np.ones(k_a.size, bool), np.zeros(k_b.size, bool)])[keep]
    k = np.concatenate([k_a, k_b])[keep]
    seg, when = seg[keep], when[keep]
    order = np.lexsort((when, seg))
    seg, when, k, is_tec = seg[order], when[order], k[order], is_tec[order]
    # steps so far of each counter at each change: running max of k within the segment (the
    # segment's number as an offset keeps one segment's maxima out of the next)
    big = int(k.max()) + 1
    offset = seg.astype(np.int64) * big
    nt = np.maximum.accumulate(np.where(is_tec, k, 0) + offset) - offset
    nr = np.maximum.accumulate(np.where(is_tec, 0, k) + offset) - offset
    final = np.ones(seg.size, dtype=bool)  # the last row of each (segment, time)
    final[:-1] = (seg[1:] != seg[:-1]) | (when[1:] != when[:-1])
    s, when, nt, nr = seg[final], when[final], nt[final], nr[final]
    new_tec = np.maximum(tec0[s] - nt, tec1[s])
    passive = rec0[s] > PASSIVE_LIMIT
    new_rec = np.where(passive, np.where(nr == 0, rec0[s], np.maximum(after - (nr - 1), rec1[s])),
                       np.maximum(rec0[s] - nr, rec1[s]))
    codes = _state_codes(new_tec, new_rec, config)
    # before the row they lead to: order by time, then the replay's own rows last at a tie
    t_all = np.concatenate([when, t])
    mine = np.concatenate([np.zeros(s.size, np.int8), np.ones(rows.height, np.int8)])
    order = np.lexsort((np.arange(t_all.size), mine, t_all))
    # the numbers merged by numpy and the strings gathered from small tables: a gather of
    # 100 k's of strings would be most of this step's time
    def merged(new: np.ndarray, old: np.ndarray) -> np.ndarray:
        return np.concatenate([new, old])[order]

    own_rows = np.arange(rows.height)
    return pl.DataFrame({
        "t_ns": t_all[order],
        "tec": merged(new_tec, rows["tec"].to_numpy()),
        "rec": merged(new_rec, rows["rec"].to_numpy()),
        "state": pl.Series(STATE_NAMES).append(rows["state"]).gather(
            merged(codes.astype(np.int64), len(STATE_NAMES) + own_rows)),
        "cause": pl.Series(["success"]).append(rows["cause"]).gather(
            merged(np.zeros(s.size, np.int64), 1 + own_rows)),
        "uncertain": pl.Series(seg_unc[s].astype(bool)).append(rows["uncertain"]).gather(order),
    }).select(pl.col(c).cast(rows.schema[c]) for c in rows.columns)
