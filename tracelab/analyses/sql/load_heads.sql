-- Step 2 of load: busy time per window of width $window_ns (windows aligned to t = 0), and
-- busy time per identifier, in one scan of the frames (two grouping sets).
-- A span [s, e) (a frame's [start_ns, end_ns) or an error frame) starting in window k gives
-- head_ns = its overlap with window k and spill_ns = its overlap with window k + 1; the rare
-- spans longer than a window also reach k + 2 and beyond (load_long.sql).
CREATE OR REPLACE TEMP TABLE tl_grouped AS
WITH spans AS (
    SELECT run, bus, id, ext, start_ns AS s, end_ns AS e, 1 AS n_frame, 0 AS n_error
    FROM frames WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR
    UNION ALL
    SELECT run, bus, NULL, NULL, s, e, 0, 1 FROM tl_error_spans
),
keyed AS (SELECT *, floor_div(s, $window_ns::BIGINT) AS k FROM spans)
SELECT run, bus, k, id, ext, grouping(k) = 0 AS by_window,
       sum(least(e, (k + 1) * $window_ns::BIGINT) - s) AS head_ns,
       sum(least(greatest(e - (k + 1) * $window_ns::BIGINT, 0), $window_ns::BIGINT)) AS spill_ns,
       sum(n_frame) AS frames, sum(n_error) AS error_frames,
       max(e - s) AS longest_ns, min(s) AS first_ns, max(e) AS last_ns, sum(e - s) AS busy_ns
FROM keyed GROUP BY GROUPING SETS ((run, bus, k), (run, bus, id, ext));

CREATE OR REPLACE TEMP TABLE tl_heads AS
SELECT run, bus, k, head_ns, spill_ns, frames, error_frames, longest_ns, first_ns, last_ns
FROM tl_grouped WHERE by_window;
