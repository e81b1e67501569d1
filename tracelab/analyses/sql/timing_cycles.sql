-- Step 3 of timing: cycle index of every frame of a periodic stream.
-- cycle = cumulative sum of step = round(inter-arrival / period) (0 for the first frame),
-- so a missing frame advances the index by the number of periods it skipped and drift does
-- not accumulate into the index. Written as cycle = rn + correction, where rn is the frame's
-- position and the correction sums (step - 1) over the earlier irregular steps (gaps,
-- bursts). In a stream with no irregular step (the common case) cycle = rn. Otherwise the
-- stream's frames are cut into blocks of $block positions: the correction at the start of
-- every block comes from a running sum over the (few) blocks, and only the frames of blocks
-- that hold an irregular step need a running sum of their own. No second full sort.
CREATE OR REPLACE TEMP VIEW tl_steps AS
SELECT a.g, a.t_ns, a.dt_ns, a.rn, p.period_ns,
       CASE WHEN a.rn = 0 THEN 0 ELSE round(a.dt_ns / p.period_ns)::BIGINT - 1 END AS extra
FROM tl_arrivals a JOIN tl_periods p ON a.g = p.g
WHERE p.period_ns IS NOT NULL;

CREATE OR REPLACE TEMP TABLE tl_blocks AS
WITH irregular AS (SELECT DISTINCT g FROM tl_steps WHERE extra <> 0),
blocks AS (
    SELECT g, rn // $block::BIGINT AS b, sum(extra) AS extra_sum, count(*) FILTER (extra <> 0) AS n_irregular
    FROM tl_steps WHERE g IN (SELECT g FROM irregular)
    GROUP BY g, b
)
SELECT g, b, n_irregular,
       coalesce(sum(extra_sum) OVER (PARTITION BY g ORDER BY b
                                     ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING), 0)
           AS corr0
FROM blocks;

CREATE OR REPLACE TEMP TABLE tl_cycles AS
WITH keyed AS (
    SELECT s.*, k.corr0, k.n_irregular
    FROM tl_steps s JOIN tl_blocks k ON k.g = s.g AND k.b = s.rn // $block::BIGINT
)
SELECT g, t_ns, dt_ns, period_ns, rn::DOUBLE AS cycle
FROM tl_steps WHERE g NOT IN (SELECT g FROM tl_blocks)
UNION ALL
SELECT g, t_ns, dt_ns, period_ns, (rn + corr0)::DOUBLE
FROM keyed WHERE n_irregular = 0
UNION ALL
SELECT g, t_ns, dt_ns, period_ns,
       (rn + corr0 + sum(extra) OVER (PARTITION BY g, rn // $block::BIGINT ORDER BY rn
                                     ROWS UNBOUNDED PRECEDING))::DOUBLE
FROM keyed WHERE n_irregular > 0;

DROP VIEW tl_steps;
