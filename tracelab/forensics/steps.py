"""Every counter change between two replay events, at the frame that made it.

The replay walks error and status records only; between two records it applies the run of
successes in one step (rule g: TEC -1 per own frame, rule h: REC -1 per reception, or into
119..127 from above 127) and records the result at the later record. Drawn as a step
function, that row reads as "flat, then a drop". This module expands each such row into the
changes the frames really made: the k-th own frame after the earlier row lowers TEC by k, the
k-th reception lowers REC, so the stored counters are the step function the rules define.
The loop runs over the replay's rows (one per event), each expansion is vectorised.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from tracelab.forensics.evidence import BusEvidence
from tracelab.physics.confinement import PASSIVE_LIMIT, ConfinementConfig, state_of


def every_change(rows: pl.DataFrame, ev: BusEvidence, node: int,
                 config: ConfinementConfig) -> pl.DataFrame:
    """``rows`` (t_ns, tec, rec, state, cause, uncertain, in replay order) with a row before
    each "successes" row for every decrement since the row before it."""
    if rows.is_empty() or node < 0:
        return rows
    t = rows["t_ns"].to_numpy()
    tec = rows["tec"].to_numpy()
    rec = rows["rec"].to_numpy()
    cause = rows["cause"].to_list()
    uncertain = rows["uncertain"].to_list()
    own = ev.own_t[node]
    extra_t: list[np.ndarray] = []
    extra_tec: list[np.ndarray] = []
    extra_rec: list[np.ndarray] = []
    extra_unc: list[bool] = []
    extra_n: list[int] = []
    after = config.rec_after_passive_reception
    for i in range(1, rows.height):  # one row per replay event: rare compared with frames
        if cause[i] != "successes":
            continue
        t0, t1 = int(t[i - 1]), int(t[i])
        tec0, tec1, rec0, rec1 = int(tec[i - 1]), int(tec[i]), int(rec[i - 1]), int(rec[i])
        if t1 <= t0 or (tec1 >= tec0 and rec1 >= rec0):
            continue
        tec_t = np.empty(0, np.int64)
        if tec1 < tec0:  # rule g: one step down per own frame after t0
            a = int(np.searchsorted(own, t0, side="right"))
            tec_t = own[a:a + (tec0 - tec1)]
            tec_t = tec_t[tec_t <= t1]
        rec_t = np.empty(0, np.int64)
        if rec1 < rec0:  # rule h: per reception (a frame of any other sender) after t0
            steps = (1 + max(0, after - rec1)) if rec0 > PASSIVE_LIMIT else rec0 - rec1
            fa = int(np.searchsorted(ev.frame_t, t0, side="right"))
            fb = int(np.searchsorted(ev.frame_t, t1, side="right"))
            received = ev.frame_t[fa:fb][ev.frame_node[fa:fb] != node]
            rec_t = received[:steps]
        times = np.union1d(tec_t, rec_t)
        times = times[times < t1]  # the row at t1 itself holds the value after t1
        if times.size == 0:
            continue
        n_tec = np.searchsorted(tec_t, times, side="right")
        n_rec = np.searchsorted(rec_t, times, side="right")
        tec_at = np.maximum(tec0 - n_tec, tec1)
        if rec0 > PASSIVE_LIMIT:
            rec_at = np.where(n_rec == 0, rec0, np.maximum(after - (n_rec - 1), rec1))
        else:
            rec_at = np.maximum(rec0 - n_rec, rec1)
        extra_t.append(times)
        extra_tec.append(tec_at)
        extra_rec.append(rec_at)
        extra_unc.append(bool(uncertain[i]))
        extra_n.append(int(times.size))
    # the tail: after the last event the replay writes no row for a node that is
    # error-active, so its counters would read as frozen; the frames after it lower them
    last = rows.height - 1
    if rows["state"][last] != "bus-off" and (tec[last] > 0 or rec[last] > 0):
        t0, tec0, rec0 = int(t[last]), int(tec[last]), int(rec[last])
        a = int(np.searchsorted(own, t0, side="right"))
        tec_t = own[a:a + tec0]
        fa = int(np.searchsorted(ev.frame_t, t0, side="right"))
        later = ev.frame_t[fa:]
        received = later[ev.frame_node[fa:] != node]
        rec_t = received[:(1 + after) if rec0 > PASSIVE_LIMIT else rec0]
        times = np.union1d(tec_t, rec_t)
        if times.size:
            n_tec = np.searchsorted(tec_t, times, side="right")
            n_rec = np.searchsorted(rec_t, times, side="right")
            extra_t.append(times)
            extra_tec.append(np.maximum(tec0 - n_tec, 0))
            extra_rec.append(np.where(n_rec == 0, rec0, np.maximum(after - (n_rec - 1), 0))
                             if rec0 > PASSIVE_LIMIT else np.maximum(rec0 - n_rec, 0))
            extra_unc.append(bool(uncertain[last]))
            extra_n.append(int(times.size))
    if not extra_t:
        return rows
    new_t = np.concatenate(extra_t)
    new_tec = np.concatenate(extra_tec)
    new_rec = np.concatenate(extra_rec)
    states = [state_of(int(a), int(b), config=config) for a, b in zip(new_tec, new_rec,
                                                                       strict=True)]
    added = pl.DataFrame({
        "t_ns": new_t, "tec": new_tec, "rec": new_rec, "state": states,
        "cause": ["success"] * new_t.size, "uncertain": np.repeat(extra_unc, extra_n),
    }).with_columns(pl.col(c).cast(rows.schema[c]) for c in rows.columns)
    # before the row they lead to: order by time, then the replay's own rows last at a tie
    ordered = pl.concat([added.with_columns(_o=pl.lit(0)),
                         rows.with_columns(_o=pl.lit(1))], how="vertical")
    return ordered.with_row_index("_i").sort("t_ns", "_o", "_i").drop("_o", "_i")
