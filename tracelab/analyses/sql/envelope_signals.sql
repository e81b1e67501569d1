-- Signals marked for the report, enveloped into display buckets: the min / max / mean of the
-- physical value per bucket (never the raw points). Params: $run, $bucket_ns, $from_ns,
-- $to_ns. Reads the `signals` analysis and tl_signal_plot (bus, id, ext, message, signal).
SELECT s.message, s.signal, any_value(s.unit) AS unit, bucket(s.t_ns, $bucket_ns) AS t_ns,
       min(s.value) AS v_min, max(s.value) AS v_max, avg(s.value) AS v_mean,
       count(*) AS values
FROM signals s
JOIN tl_signal_plot p ON s.bus = p.bus AND s.id = p.id AND s.ext = p.ext
                     AND s.signal = p.signal
WHERE s.run = $run AND s.t_ns >= $from_ns AND s.t_ns <= $to_ns
GROUP BY s.message, s.signal, bucket(s.t_ns, $bucket_ns)
ORDER BY s.message, s.signal, t_ns;
