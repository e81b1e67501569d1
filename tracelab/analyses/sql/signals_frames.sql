-- The frames `tracelab signals` decodes: every data frame of a catalogued message that has
-- signals, with the payload length the catalog gives (tl_signal_messages: key, bus, id, ext,
-- nbytes), in the order key, run, t_ns, file, line. Params: $run (NULL = all), $from_ns,
-- $to_ns (NULL = open). Frames of another length are counted by signals_lengths.sql.
SELECT m.key, f.run, f.bus, f.t_ns, f.data, f.file, f.line
FROM frames f
JOIN tl_signal_messages m ON f.bus = m.bus AND f.id = m.id AND f.ext = m.ext
WHERE NOT f.rtr AND octet_length(f.data) = m.nbytes
  AND ($run IS NULL OR f.run = $run)
  AND ($from_ns IS NULL OR f.t_ns >= $from_ns)
  AND ($to_ns IS NULL OR f.t_ns < $to_ns)
ORDER BY m.key, f.run, f.t_ns, f.file, f.line;
