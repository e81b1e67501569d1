-- Step 3 of timing: cycle index of every frame of a periodic stream.
-- cycle = cumulative sum of round(inter-arrival / period), so a missing frame advances the
-- index by the number of periods it skipped and drift does not accumulate into the index.
-- t_rel_ns = arrival time since the stream's first frame (keeps the fit well conditioned).
CREATE OR REPLACE TEMP TABLE tl_cycles AS
SELECT a.run, a.bus, a.id, a.ext, a.t_ns, a.dt_ns, p.period_ns,
       sum(coalesce(round(a.dt_ns / p.period_ns), 0)) OVER w AS cycle,
       (a.t_ns - first_value(a.t_ns) OVER w)::DOUBLE AS t_rel_ns
FROM tl_arrivals a
JOIN tl_periods p ON a.run = p.run AND a.bus = p.bus AND a.id = p.id AND a.ext = p.ext
WHERE p.period_ns IS NOT NULL
WINDOW w AS (PARTITION BY a.run, a.bus, a.id, a.ext ORDER BY a.t_ns
             ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW);
