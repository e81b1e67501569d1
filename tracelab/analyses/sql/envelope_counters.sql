-- TEC / REC per node as the step functions they are, in long form (bus, node, counter, t_ns,
-- value): every change when a display bucket holds few, else the real points that bound the
-- bucket: its first, lowest, highest and last value, each at the time it occurred. Drawn as
-- steps, a level is therefore never invented (no mean) and a fall or a peak inside a bucket
-- stays visible. Params: $run, $bucket_ns. Reads the view `counter_source` (the replayed
-- counters, else the logged status records) with `seq`, the row order of the source (rows at
-- one instant keep their order: the last is the value after that instant).
WITH src AS (
    SELECT bus, node, t_ns, seq, tec, rec, t_ns // $bucket_ns AS b
    FROM counter_source
    WHERE run = $run
),
long AS (
    SELECT bus, node, 'tec' AS counter, t_ns, seq, b, tec AS value FROM src
    UNION ALL
    SELECT bus, node, 'rec' AS counter, t_ns, seq, b, rec AS value FROM src
),
agg AS (
    SELECT bus, node, counter, b,
           arg_min(value, (t_ns, seq)) AS first_v, min((t_ns, seq)) AS first_k,
           arg_max(value, (t_ns, seq)) AS last_v, max((t_ns, seq)) AS last_k,
           min(value) AS min_v, arg_min((t_ns, seq), value) AS min_k,
           max(value) AS max_v, arg_max((t_ns, seq), value) AS max_k
    FROM long
    GROUP BY ALL
),
points AS (
    SELECT bus, node, counter, unnest([first_k, min_k, max_k, last_k]) AS k,
           unnest([first_v, min_v, max_v, last_v]) AS value
    FROM agg
)
SELECT DISTINCT bus, node, counter, k[1] AS t_ns, k[2] AS seq, value
FROM points
ORDER BY bus, node, counter, t_ns, seq
