-- Step 1 of timing: inter-arrival time and position of every frame of each stream of the
-- batch (tl_batch: g, t_ns; see timing_streams.sql). dt_ns is NULL and rn 0 for the first
-- frame of a stream.
CREATE OR REPLACE TEMP TABLE tl_arrivals AS
SELECT g, t_ns, t_ns - lag(t_ns) OVER w AS dt_ns, row_number() OVER w - 1 AS rn
FROM tl_batch
WINDOW w AS (PARTITION BY g ORDER BY t_ns);
