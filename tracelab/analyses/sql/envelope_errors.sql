-- Error events per display bucket, per bus and error type. Params: $run, $bucket_ns.
SELECT bus, type, (t_ns // $bucket_ns) * $bucket_ns AS t_ns, count(*) AS errors
FROM errors
WHERE run = $run
GROUP BY ALL
ORDER BY bus, type, t_ns
