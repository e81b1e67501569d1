-- Out-of-range spans of the plotted signals at display resolution: the buckets holding a
-- value outside [min_limit, max_limit], consecutive buckets merged (islands: a bucket's
-- index minus its rank is constant along a run of buckets). Params: $run, $bucket_ns.
WITH hit AS (
    SELECT DISTINCT s.message, s.signal, bucket(s.t_ns, $bucket_ns) AS t_ns
    FROM signals s
    JOIN tl_signal_plot p ON s.bus = p.bus AND s.id = p.id AND s.ext = p.ext
                         AND s.signal = p.signal
    WHERE s.run = $run AND (s.value < p.min_limit OR s.value > p.max_limit)
),
island AS (
    SELECT *, floor_div(t_ns, $bucket_ns)
              - row_number() OVER (PARTITION BY message, signal ORDER BY t_ns) AS grp
    FROM hit
)
SELECT message, signal, min(t_ns) AS from_ns, max(t_ns) + $bucket_ns AS to_ns
FROM island
GROUP BY message, signal, grp
ORDER BY message, signal, from_ns;
