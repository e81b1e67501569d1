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
from tracelab.physics.confinement import BUS_OFF_LIMIT, PASSIVE_LIMIT, ConfinementConfig


def _steps(times: np.ndarray, starts: np.ndarray, counts: np.ndarray
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


def _states(tec: np.ndarray, rec: np.ndarray, config: ConfinementConfig) -> np.ndarray:
    """state_of() over arrays (the same rules: i, j, k and the warning level)."""
    hot = np.maximum(tec, rec)
    warm = hot >= config.warning_level if config.warning_inclusive else \
        hot > config.warning_level
    return np.where(tec > BUS_OFF_LIMIT, "bus-off",
                    np.where((tec > PASSIVE_LIMIT) | (rec > PASSIVE_LIMIT), "error-passive",
                             np.where(warm, "warning", "error-active")))


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
    cause = rows["cause"].to_numpy()
    unc = rows["uncertain"].to_numpy()
    after = config.rec_after_passive_reception
    last = rows.height - 1
    # segments: (from row i-1 to a "successes" row i), and the tail after the last row
    i = np.flatnonzero(cause[1:] == "successes") + 1
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
    received = ev.frame_t[ev.frame_node != node]
    # rule g: one step down per own frame after t0
    s_a, k_a, t_a = _steps(own, np.searchsorted(own, t0, side="right"), tec0 - tec1)
    # rule h: per reception; from above 127 the first one sets `after`, then -1 each
    rec_steps = np.where(rec0 > PASSIVE_LIMIT, 1 + np.maximum(0, after - rec1), rec0 - rec1)
    rec_steps = np.where(rec1 < rec0, rec_steps, 0)
    s_b, k_b, t_b = _steps(received, np.searchsorted(received, t0, side="right"), rec_steps)
    seg = np.concatenate([s_a, s_b])
    when = np.concatenate([t_a, t_b])
    keep = when < t1[seg]  # the row at t1 itself holds the value after t1
    if not keep.any():
        return rows
    n_tec = np.concatenate([k_a, np.zeros_like(k_b)])
    n_rec = np.concatenate([np.zeros_like(k_a), k_b])
    ev_frame = pl.DataFrame({"seg": seg, "t_ns": when, "n_tec": n_tec, "n_rec": n_rec,
                             "is_tec": np.concatenate([np.ones(k_a.size, bool),
                                                       np.zeros(k_b.size, bool)])}
                            ).filter(pl.Series(keep)).sort("seg", "t_ns")
    # steps so far of each counter at each change: running max of k within the segment
    ev_frame = ev_frame.with_columns(
        pl.when(pl.col("is_tec")).then(pl.col("n_tec")).otherwise(0).cum_max().over("seg")
        .alias("n_tec"),
        pl.when(~pl.col("is_tec")).then(pl.col("n_rec")).otherwise(0).cum_max().over("seg")
        .alias("n_rec"),
    ).unique(["seg", "t_ns"], keep="last", maintain_order=True)
    s = ev_frame["seg"].to_numpy()
    nt, nr = ev_frame["n_tec"].to_numpy(), ev_frame["n_rec"].to_numpy()
    new_tec = np.maximum(tec0[s] - nt, tec1[s])
    passive = rec0[s] > PASSIVE_LIMIT
    new_rec = np.where(passive, np.where(nr == 0, rec0[s], np.maximum(after - (nr - 1), rec1[s])),
                       np.maximum(rec0[s] - nr, rec1[s]))
    states = _states(new_tec, new_rec, config)
    added = pl.DataFrame({
        "t_ns": ev_frame["t_ns"].to_numpy(), "tec": new_tec, "rec": new_rec, "state": states,
        "cause": ["success"] * s.size, "uncertain": seg_unc[s].astype(bool),
    }).with_columns(pl.col(c).cast(rows.schema[c]) for c in rows.columns)
    # before the row they lead to: order by time, then the replay's own rows last at a tie
    ordered = pl.concat([added.with_columns(_o=pl.lit(0)),
                         rows.with_columns(_o=pl.lit(1))], how="vertical")
    return ordered.with_row_index("_i").sort("t_ns", "_o", "_i").drop("_o", "_i")
