-- One row per gap: an inter-arrival above gap_factor x period. missing = round(gap / period)
-- - 1, at least 1. in_loss: the gap overlaps a logger loss interval [t_ns, until_ns) on the
-- same run and bus (the logger, not the bus, may have dropped the frames).
CREATE OR REPLACE TEMP TABLE tl_gaps AS
SELECT g.run, g.bus, g.id, g.ext, g.t_ns - g.dt_ns AS from_ns, g.t_ns AS to_ns,
       greatest(round(g.dt_ns / g.period_ns)::BIGINT - 1, 1) AS missing,
       EXISTS (SELECT 1 FROM losses l
               WHERE l.run = g.run AND l.bus = g.bus
                 AND l.t_ns < g.t_ns AND l.until_ns > g.t_ns - g.dt_ns) AS in_loss
FROM tl_cycles g
WHERE g.dt_ns > $gap_factor::DOUBLE * g.period_ns;
