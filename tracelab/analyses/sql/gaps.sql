-- One row per gap: an inter-arrival above gap_factor x period. missing = round(gap / period)
-- - 1, at least 1. in_loss: the gap (from_ns, to_ns) overlaps a logger loss interval
-- [t_ns, until_ns) on the same run and bus (the logger, not the bus, may have lost frames).
CREATE OR REPLACE TEMP TABLE tl_gaps AS
WITH raw AS (
    SELECT s.run, s.bus, s.id, s.ext, c.t_ns - c.dt_ns AS from_ns, c.t_ns AS to_ns,
           greatest(round(c.dt_ns / c.period_ns)::BIGINT - 1, 1) AS missing
    FROM tl_cycles c JOIN tl_streams s ON s.g = c.g
    WHERE c.dt_ns > $gap_factor::DOUBLE * c.period_ns
)
SELECT r.*, EXISTS (SELECT 1 FROM losses l
                    WHERE l.run = r.run AND l.bus = r.bus
                      AND l.t_ns < r.to_ns AND l.until_ns > r.from_ns) AS in_loss
FROM raw r;
