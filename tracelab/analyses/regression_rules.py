"""When a message "moved": the one rule table behind the fleet's regression flags and
`tracelab compare`, and the p99 phase jitter both compare.

A metric regressed when the new value is at least ``FACTOR`` times the reference *and* above
it by at least the metric's absolute floor (a doubling of noise-sized numbers is not a
regression). The fleet takes the median of a vehicle's previous runs as the reference (and
asks for ``MIN_HISTORY`` of them); compare takes the reference run.
"""

from __future__ import annotations

import duckdb
import polars as pl

MIN_HISTORY = 2
FACTOR = 2.0
MISSING_MIN_INCREASE = 3
JITTER_MIN_INCREASE_NS = 50_000
DRIFT_MIN_INCREASE_PPM = 100.0
#: Flagged metrics: (name in the flags, column of the fleet's per-message stats, floor).
METRICS = (
    ("missing", "missing", MISSING_MIN_INCREASE),
    ("jitter_p99_ns", "jitter", JITTER_MIN_INCREASE_NS),
    ("abs_drift_ppm", "drift", DRIFT_MIN_INCREASE_PPM),
)
#: compare only: a message's observed period (median interval) moved by this share or more
#: (derived: 100 x the 100 ppm drift floor, so a drifting clock alone never trips it).
PERIOD_MIN_CHANGE = 0.01


def regressed(reference: float | None, value: float | None, floor: float) -> bool:
    """The rule of the table above for one metric."""
    if reference is None or value is None:
        return False
    return value >= FACTOR * reference and value - reference >= floor


PHASE_P99_SQL = """
WITH arrivals AS (
    SELECT f.run, f.bus, f.id, f.ext, f.t_ns, t.period_ns,
           f.t_ns - lag(f.t_ns) OVER w AS dt_ns,
           (f.t_ns - first_value(f.t_ns) OVER w)::DOUBLE AS t_rel_ns
    FROM frames f
    JOIN (SELECT DISTINCT run, bus, id, ext, period_ns FROM timing
          WHERE period_ns IS NOT NULL) t
      ON f.run = t.run AND f.bus = t.bus AND f.id = t.id AND f.ext = t.ext
    WINDOW w AS (PARTITION BY f.run, f.bus, f.id, f.ext ORDER BY f.t_ns)
), cycles AS (
    SELECT run, bus, id, ext, t_rel_ns,
           sum(coalesce(round(dt_ns / period_ns), 0)) OVER (
               PARTITION BY run, bus, id, ext ORDER BY t_ns
               ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW)::DOUBLE AS cycle
    FROM arrivals
), fit AS (
    SELECT run, bus, id, ext, regr_slope(t_rel_ns, cycle) AS slope_ns,
           regr_intercept(t_rel_ns, cycle) AS icpt_ns
    FROM cycles GROUP BY run, bus, id, ext
)
SELECT c.run, c.bus, c.id, c.ext,
       quantile_cont(abs(c.t_rel_ns - (f.icpt_ns + f.slope_ns * c.cycle)), 0.99) AS jitter_p99_ns
FROM cycles c JOIN fit f ON c.run = f.run AND c.bus = f.bus AND c.id = f.id AND c.ext = f.ext
GROUP BY c.run, c.bus, c.id, c.ext
"""


def phase_jitter_p99(con: duckdb.DuckDBPyConnection) -> pl.DataFrame:
    """p99 of |phase jitter| per periodic stream: the arrival's distance from the straight
    line fitted through (cycle index, arrival time), the cycle index advancing by
    round(inter-arrival / period) (timing's definition; the slope takes drift out).
    Needs the views frames and timing (for the periods)."""
    return con.sql(PHASE_P99_SQL).pl()
