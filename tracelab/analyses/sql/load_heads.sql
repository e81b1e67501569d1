-- Step 2 of load: busy time per window of width $window_ns (windows aligned to t = 0).
-- A span (a frame: start_ns for duration_ns = end_ns - start_ns, or an error frame) that
-- starts in window k contributes head = its overlap with window k and overflow = the rest,
-- which window k + 1 receives (load.sql). The rare spans longer than a window move the part
-- beyond window k + 1 on to k + 2 and later (load_long.sql).
-- k = floor(s / width), computed as (s + $k_offset x width) // width - $k_offset: the
-- offset makes the dividend positive, so truncating division is floor division.
-- The frames are scanned once, for the same two time columns a bare sum-per-window reads;
-- error frames (few) are aggregated separately and added.
CREATE OR REPLACE TEMP TABLE tl_heads AS
WITH frame_heads AS (
    SELECT run, bus, k,
           sum(least(d, (k + 1) * $window_ns::BIGINT - s)) AS head_ns, sum(d) AS span_ns,
           count(*) AS frames, 0 AS error_frames,
           max(d) AS longest_ns, min(s) AS first_ns, max(s + d) AS last_ns
    FROM (SELECT run, bus, start_ns AS s, duration_ns AS d,
                 (start_ns + $k_offset::BIGINT * $window_ns::BIGINT) // $window_ns::BIGINT
                     - $k_offset::BIGINT AS k
          FROM frames WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR)
    GROUP BY run, bus, k
),
error_heads AS (
    SELECT run, bus, k,
           sum(least(e - s, (k + 1) * $window_ns::BIGINT - s)) AS head_ns, sum(e - s) AS span_ns,
           0 AS frames, count(*) AS error_frames,
           max(e - s) AS longest_ns, min(s) AS first_ns, max(e) AS last_ns
    FROM (SELECT *, floor_div(s, $window_ns::BIGINT) AS k FROM tl_error_spans)
    GROUP BY run, bus, k
)
SELECT run, bus, k, sum(head_ns) AS head_ns, sum(span_ns) - sum(head_ns) AS spill_ns,
       sum(frames) AS frames, sum(error_frames) AS error_frames, max(longest_ns) AS longest_ns,
       min(first_ns) AS first_ns, max(last_ns) AS last_ns
FROM (SELECT * FROM frame_heads UNION ALL SELECT * FROM error_heads)
GROUP BY run, bus, k;
