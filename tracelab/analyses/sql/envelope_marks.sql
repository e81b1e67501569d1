-- Marks (test steps) of one run, earliest first. Params: $run, $limit.
SELECT bus, t_ns, text FROM marks WHERE run = $run ORDER BY t_ns, line LIMIT $limit
