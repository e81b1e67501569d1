-- Mean and peak bus load for one window size. Params: $run, $window_ns.
-- The mean counts windows without frames as zero load (the stored table may omit them).
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
SELECT bus, $window_ns::BIGINT AS window_ns,
       sum(load_ratio) / ((max(t_ns) - min(t_ns)) // $window_ns + 1) AS mean_ratio,
       max(load_ratio) AS peak_ratio,
       arg_max(t_ns, load_ratio) AS peak_t_ns,
       count(*) AS windows
FROM win
GROUP BY ALL
ORDER BY bus
