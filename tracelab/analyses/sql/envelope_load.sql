-- Bus load re-aggregated to one selectable window size, then enveloped into display buckets.
-- Params: $run, $window_ns (a multiple of the stored window), $bucket_ns (a multiple of
-- $window_ns). Reads the `load` analysis (one row per stored window). One row per bucket:
-- the min / max / mean of the window loads inside it, so a 24 h run stays a few thousand points.
WITH base AS (
    SELECT bus, t_ns, busy_ns
    FROM load
    WHERE run = $run AND window_ns = (SELECT min(window_ns) FROM load WHERE run = $run)
),
win AS (
    SELECT bus, (t_ns // $window_ns) * $window_ns AS t_ns,
           sum(busy_ns)::DOUBLE / $window_ns AS load_ratio
    FROM base
    GROUP BY ALL
)
SELECT bus, $window_ns::BIGINT AS window_ns, (t_ns // $bucket_ns) * $bucket_ns AS t_ns,
       min(load_ratio) AS load_min, max(load_ratio) AS load_max, avg(load_ratio) AS load_mean
FROM win
GROUP BY ALL
ORDER BY bus, t_ns
