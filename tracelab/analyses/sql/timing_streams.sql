-- Step 0 of timing: every (run, bus, id, ext) stream with its frame count, keyed by
-- g = hash(run, bus, id, ext) so that the later sorts carry two integers, not strings
-- (timing.py checks that no two streams share a key). timing.py cuts the streams into
-- batches of whole streams that fit the connection's memory (every step below works per
-- stream) and gives each batch's frames to the next steps as tl_batch(g, t_ns).
CREATE OR REPLACE TEMP TABLE tl_streams AS
SELECT hash(run, bus, id, ext) AS g, run, bus, id, ext, count(*) AS frames
FROM frames
WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR
GROUP BY run, bus, id, ext;
