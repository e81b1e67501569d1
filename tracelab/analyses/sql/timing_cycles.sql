-- Step 3 of timing: cycle index of every frame of a periodic stream.
-- cycle = cumulative sum of round(inter-arrival / period), so a missing frame advances the
-- index by the number of periods it skipped and drift does not accumulate into the index.
-- In a stream where every step is 1 (no gap, no burst: the common case) the cycle index is
-- the frame's position rn, and no second sort is needed; only streams with an irregular step
-- take the running sum.
CREATE OR REPLACE TEMP TABLE tl_cycles AS
WITH steps AS (
    SELECT a.g, a.t_ns, a.dt_ns, a.rn, p.period_ns,
           coalesce(round(a.dt_ns / p.period_ns), 0) AS step
    FROM tl_arrivals a JOIN tl_periods p ON a.g = p.g
    WHERE p.period_ns IS NOT NULL
),
irregular AS (SELECT DISTINCT g FROM steps WHERE rn > 0 AND step <> 1)
SELECT g, t_ns, dt_ns, period_ns, rn::DOUBLE AS cycle
FROM steps WHERE g NOT IN (SELECT g FROM irregular)
UNION ALL
SELECT g, t_ns, dt_ns, period_ns,
       sum(step) OVER (PARTITION BY g ORDER BY rn ROWS UNBOUNDED PRECEDING)::DOUBLE AS cycle
FROM steps WHERE g IN (SELECT g FROM irregular);
