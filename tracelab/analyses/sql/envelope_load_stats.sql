-- Mean and peak bus load per bus and window size, from tl_env_load (envelope_load.sql).
-- The mean counts windows without frames as zero load (the stored table may omit them).
SELECT bus, window_ns,
       sum(load_ratio) / ((max(t_ns) - min(t_ns)) // window_ns + 1) AS mean_ratio,
       max(load_ratio) AS peak_ratio,
       arg_max(t_ns, load_ratio) AS peak_t_ns,
       count(*) AS windows
FROM tl_env_load
GROUP BY bus, window_ns
ORDER BY window_ns, bus;
