-- Step 2 of load: busy time per window of width $window_ns (windows aligned to t = 0).
-- A span (a frame: start_ns for duration_ns = end_ns - start_ns, or an error frame) that
-- starts in window k contributes head = its overlap with window k and overflow = the rest,
-- which window k + 1 receives (load.sql). The rare spans longer than a window move the part
-- beyond window k + 1 on to k + 2 and later (load_long.sql).
-- k = floor(s / width), computed as (s + k_offset x width) // width - k_offset: the offset
-- makes the dividend positive, so truncating division is floor division.
-- The windows scan reads the same two time columns as a bare sum-per-window query; head =
-- span - overflow, and only the few frames that cross a window's end are summed for the
-- overflow (a FILTER, cheaper than a least() per frame). Error frames (few) are aggregated
-- separately and added.
CREATE OR REPLACE TEMP TABLE tl_heads AS
WITH frame_heads AS (
    SELECT run, bus, k,
           sum(d) - coalesce(sum(s + d - (k + 1) * $window_ns::BIGINT)
                             FILTER (WHERE s + d > (k + 1) * $window_ns::BIGINT), 0) AS head_ns,
           sum(d) AS span_ns, count(*) AS frames, 0 AS error_frames
    FROM (SELECT run, bus, start_ns AS s, duration_ns AS d,
                 (start_ns + $k_offset::BIGINT * $window_ns::BIGINT) // $window_ns::BIGINT
                     - $k_offset::BIGINT AS k
          FROM frames WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR)
    GROUP BY run, bus, k
),
error_heads AS (
    SELECT run, bus, k,
           sum(least(e - s, (k + 1) * $window_ns::BIGINT - s)) AS head_ns, sum(e - s) AS span_ns,
           0 AS frames, count(*) AS error_frames
    FROM (SELECT *, floor_div(s, $window_ns::BIGINT) AS k FROM tl_error_spans)
    GROUP BY run, bus, k
)
SELECT run, bus, k, sum(head_ns) AS head_ns, sum(span_ns) - sum(head_ns) AS spill_ns,
       sum(frames) AS frames, sum(error_frames) AS error_frames
FROM (SELECT * FROM frame_heads UNION ALL SELECT * FROM error_heads)
GROUP BY run, bus, k;

-- Per identifier (the second scan): frames, busy time and the longest frame (does any span
-- reach past the next window?).
CREATE OR REPLACE TEMP TABLE tl_ids AS
SELECT run, bus, id, ext, count(*) AS frames, sum(duration_ns) AS busy_ns,
       max(duration_ns) AS longest_ns
FROM frames WHERE $run::VARCHAR IS NULL OR run = $run::VARCHAR
GROUP BY run, bus, id, ext;

-- First frame start and last frame end per (run, bus), for frames per second. Only frames
-- that start in the first window, or late enough to end in the last one, can qualify; the
-- filters let the Parquet row-group statistics skip the rest of the file: on t_ns, which the
-- parts store (start_ns <= t_ns < start_ns + duration_ns, so they drop no qualifying frame;
-- start_ns is derived in the view and has no statistics).
CREATE OR REPLACE TEMP TABLE tl_span AS
WITH edges AS (
    SELECT h.run, h.bus, min(h.k) AS k0, max(h.k) AS k1, max(i.longest_ns) AS longest_ns
    FROM tl_heads h JOIN tl_ids i ON i.run = h.run AND i.bus = h.bus
    WHERE h.frames > 0
    GROUP BY h.run, h.bus
),
lo AS (SELECT min(k0 * $window_ns::BIGINT) AS a, max((k0 + 1) * $window_ns::BIGINT) AS b,
              max((k0 + 1) * $window_ns::BIGINT) + max(longest_ns) AS c
       FROM edges),
hi AS (SELECT min(k1 * $window_ns::BIGINT - longest_ns) AS a FROM edges)
SELECT e.run, e.bus,
       (SELECT min(f.start_ns) FROM frames f
        WHERE f.start_ns >= (SELECT a FROM lo) AND f.start_ns < (SELECT b FROM lo)
          AND f.t_ns >= (SELECT a FROM lo) AND f.t_ns < (SELECT c FROM lo)
          AND f.run = e.run AND f.bus = e.bus) AS first_ns,
       (SELECT max(f.start_ns + f.duration_ns) FROM frames f
        WHERE f.start_ns >= (SELECT a FROM hi) AND f.t_ns >= (SELECT a FROM hi)
          AND f.run = e.run AND f.bus = e.bus) AS last_ns
FROM edges e;
