-- Step 1 of timing: inter-arrival time of every frame of each (run, bus, id, ext) stream.
-- dt_ns is NULL for the first frame of a stream.
CREATE OR REPLACE TEMP TABLE tl_arrivals AS
SELECT run, bus, id, ext, t_ns,
       t_ns - lag(t_ns) OVER (PARTITION BY run, bus, id, ext ORDER BY t_ns) AS dt_ns
FROM frames
WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR;
