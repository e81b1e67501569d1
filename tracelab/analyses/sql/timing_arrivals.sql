-- Step 1 of timing: inter-arrival time and position of every frame of each stream
-- (run, bus, id, ext). A stream is keyed by g = hash(run, bus, id, ext) so that the sort
-- carries two integers, not strings; tl_streams maps g back (timing.py checks that no two
-- streams share a key). dt_ns is NULL and rn 0 for the first frame of a stream.
CREATE OR REPLACE TEMP TABLE tl_arrivals AS
SELECT g, t_ns, t_ns - lag(t_ns) OVER w AS dt_ns, row_number() OVER w - 1 AS rn
FROM (SELECT hash(run, bus, id, ext) AS g, t_ns FROM frames
      WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR)
WINDOW w AS (PARTITION BY g ORDER BY t_ns);

CREATE OR REPLACE TEMP TABLE tl_streams AS
SELECT hash(run, bus, id, ext) AS g, run, bus, id, ext
FROM frames
WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR
GROUP BY run, bus, id, ext;
