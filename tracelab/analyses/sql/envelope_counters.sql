-- TEC / REC per node downsampled to display buckets (the peak and trough in each bucket, so a
-- short excursion towards a limit stays visible). Params: $run, $bucket_ns.
-- Reads the view `counter_source` (the replayed counters, else the logged status records).
SELECT bus, node, (t_ns // $bucket_ns) * $bucket_ns AS t_ns,
       max(tec) AS tec_max, min(tec) AS tec_min, max(rec) AS rec_max, min(rec) AS rec_min,
       arg_max(tec, t_ns) AS tec_last, arg_max(rec, t_ns) AS rec_last
FROM counter_source
WHERE run = $run
GROUP BY ALL
ORDER BY bus, node, t_ns
