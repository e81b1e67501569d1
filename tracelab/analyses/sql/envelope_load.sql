-- Bus load for every selectable window size, enveloped into display buckets.
-- Params: $run. Reads the `load` analysis (one row per stored window) and tl_env_sizes
-- (window_ns, bucket_ns): each window a multiple of the stored one, each bucket a multiple of
-- its window. Step 1 re-aggregates the stored windows once for all sizes; step 2 gives one row
-- per bucket with the min / max / mean of the window loads in it, so a 24 h run stays a few
-- thousand points per trace.
CREATE OR REPLACE TEMP TABLE tl_env_load AS
WITH base AS (
    SELECT bus, t_ns, busy_ns
    FROM load
    WHERE run = $run AND window_ns = (SELECT min(window_ns) FROM load WHERE run = $run)
)
SELECT s.window_ns, s.bucket_ns, b.bus, (b.t_ns // s.window_ns) * s.window_ns AS t_ns,
       sum(b.busy_ns)::DOUBLE / s.window_ns AS load_ratio
FROM base b CROSS JOIN tl_env_sizes s
GROUP BY s.window_ns, s.bucket_ns, b.bus, (b.t_ns // s.window_ns) * s.window_ns;

SELECT bus, window_ns, (t_ns // bucket_ns) * bucket_ns AS t_ns,
       min(load_ratio) AS load_min, max(load_ratio) AS load_max, avg(load_ratio) AS load_mean
FROM tl_env_load
GROUP BY bus, window_ns, bucket_ns, (t_ns // bucket_ns) * bucket_ns
ORDER BY window_ns, bus, t_ns;
