"""Pieces of the hypothesis scoring and the log segmentation, checked on small arrays."""

from __future__ import annotations

import math

import numpy as np
from scipy.stats import binom

from tracelab.forensics.hypotheses import _binomial, _position_split
from tracelab.forensics.verdict import _run_start


def test_binomial_loglik_at_the_fitted_share_matches_scipy() -> None:
    # source: scipy.stats.binom.logpmf (the binomial coefficient is common to every
    # hypothesis and left out of _binomial)
    for k, n in ((3, 10), (31, 34), (135, 269), (1, 2)):
        want = binom.logpmf(k, n, k / n) - math.log(math.comb(n, k))
        assert math.isclose(_binomial(k, n), want, rel_tol=1e-12, abs_tol=1e-12)
    assert _binomial(0, 10) == 0.0 and _binomial(10, 10) == 0.0  # derived: 0 log 0 = 0


def test_a_group_with_its_own_stuff_share_is_preferred_only_when_it_differs() -> None:
    # derived: 34 errors on the culprit's own frames, 31 stuff (its monitoring flags at once);
    # 269 on others' frames, 135 stuff (receptions found mostly at the CRC check)
    own = np.r_[np.ones(31, bool), np.zeros(3, bool)]
    rest = np.r_[np.ones(135, bool), np.zeros(134, bool)]
    stuff = np.r_[own, rest]
    usable = np.ones(stuff.size, bool)
    group = np.r_[np.ones(own.size, bool), np.zeros(rest.size, bool)]
    penalty = 0.5 * math.log(stuff.size)
    gain = _position_split(stuff, usable, group, penalty)
    split = _binomial(31, 34) + _binomial(135, 269) - _binomial(166, 303)
    assert gain == split - penalty and gain > 5
    # the same share in both groups: the extra share only costs its penalty
    same = np.r_[np.ones(17, bool), np.zeros(17, bool), np.ones(135, bool), np.zeros(134, bool)]
    assert _position_split(same, usable, group, penalty) < 0
    # fewer than POSITION_MIN_ERRORS errors in a group: no evidence either way
    tiny = np.zeros(stuff.size, bool)
    tiny[:3] = True
    assert _position_split(stuff, usable, tiny, penalty) == 0.0


def test_a_run_start_is_the_first_error_of_a_run_on_that_node() -> None:
    # derived: 40 errors spread over nodes 0..3, then from index 40 on 3 of every 4 on node 4
    tx = np.r_[np.tile([0, 1, 2, 3], 10), np.tile([4, 4, 4, 1], 15)]
    t = np.arange(tx.size) * 1000
    assert _run_start(tx, t, 4, run=30, share=0.6) == 40_000
    assert _run_start(tx, t, 2, run=30, share=0.6) is None
    assert _run_start(tx[:20], t[:20], 4, run=30, share=0.6) is None
