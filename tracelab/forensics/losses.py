"""Logger losses: what the replay can still say across an interval the log does not cover.

A ``loss`` record says the logger dropped ``count`` records over [t_ns, until_ns). Inside it
errors and frames are missing, so every counter is only known between bounds:

- lower reading: none of the lost records was an error (the replay as it stands);
- upper reading: the lost records were errors, as many as the loss can hold (``count``, and
  no more than back-to-back shortest error frames fit in the interval), charged to the
  hypothesis' culprit.

The first degradation is then an interval [earliest_ns, latest_ns]: the upper reading's
transition (never before the loss starts) and the lower reading's. Silences that overlap a
loss are trimmed to the part outside it, never dropped: a node that vanished inside a loss
vanished somewhere between its last frame seen and the end of the loss.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from tracelab.forensics.evidence import KIND_ERROR, PREDICTED, BusEvidence, with_extra_errors

#: The shortest attempt an error can destroy: an error detected right after arbitration
#: (about 20 bits) plus a 6-bit flag, 8-bit delimiter and 3-bit intermission.
SHORTEST_ERROR_ATTEMPT_BITS = 37


def loss_before(ev: BusEvidence, t_ns: int) -> tuple[int, int] | None:
    """The last loss interval that starts before t_ns, or None."""
    if not ev.losses.shape[0]:
        return None
    i = int(np.searchsorted(ev.losses[:, 0], t_ns, side="left")) - 1
    if i < 0:
        return None
    return int(ev.losses[i, 0]), int(ev.losses[i, 1])


def trim_to_losses(ev: BusEvidence, a: int, b: int) -> list[tuple[int, int]]:
    """[a, b) minus every loss interval (a loop over the few losses overlapping it)."""
    pieces = [(a, b)]
    for lo, hi in ev.losses.tolist():
        if lo >= b or hi <= a:
            continue
        nxt = []
        for x, y in pieces:
            if hi <= x or lo >= y:
                nxt.append((x, y))
                continue
            if lo > x:
                nxt.append((x, lo))
            if hi < y:
                nxt.append((hi, y))
        pieces = nxt
    return pieces


def lost_counts(ev: BusEvidence) -> list[int]:
    """Per loss interval, how many error records it can have hidden at most."""
    out = []
    rows = ev.loss_counts if ev.loss_counts is not None else [None] * ev.losses.shape[0]
    for (lo, hi), count in zip(ev.losses.tolist(), rows, strict=True):
        fit = int((hi - lo) / (SHORTEST_ERROR_ATTEMPT_BITS * ev.bit_ns)) + 1
        out.append(min(fit, int(count)) if count is not None else fit)
    return out


def filled_evidence(ev: BusEvidence, mode: str = "rate", tx: int | None = None,
                    t_to: int | None = None) -> BusEvidence | None:
    """The evidence with errors put into the losses before t_to: ``mode="rate"`` at the error
    rate seen around each loss (the most likely reading), ``"upper"`` as many as the loss can
    hold. Their transmitters follow the sender mix of the errors around the loss, or ``tx``.
    None when no loss needs filling."""
    errors = ev.events.filter(pl.col("kind") == KIND_ERROR)
    t_err = errors["t_ns"].to_numpy().astype(np.int64)
    tx_err = errors["tx"].to_numpy().astype(np.int64)
    times: list[int] = []
    senders: list[int] = []
    for (lo, hi), most in zip(ev.losses.tolist(), lost_counts(ev), strict=True):
        if (t_to is not None and lo > t_to) or most <= 0:
            continue  # a loop over the few loss intervals
        span = max(hi - lo, 1)
        near = ((t_err >= lo - span) & (t_err < lo)) | ((t_err >= hi) & (t_err < hi + span))
        if not near.any():
            continue  # no errors on either side: nothing says the fault went on inside
        n = most if mode == "upper" else min(most, int(round(near.sum() / 2)))
        if n <= 0:
            continue
        times += np.linspace(lo, hi - 1, n).astype(np.int64).tolist()
        if tx is not None:
            senders += [tx] * n
        else:
            mix = tx_err[near]
            senders += mix[np.linspace(0, mix.size - 1, n).astype(np.int64)].tolist()
    if not times:
        return None
    return with_extra_errors(ev, times, senders, "stuff", None, field="data")


def original_rows(filled: BusEvidence) -> np.ndarray:
    """Mask over a filled evidence's events: True for the logged ones."""
    return (filled.events["file"] != PREDICTED).fill_null(True).to_numpy()
