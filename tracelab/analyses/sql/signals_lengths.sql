-- Data frames of a message with signals whose payload length differs from the catalog's:
-- they are not decoded (the bit positions depend on the length). One row per (key, run)
-- with the count and the first such frame. Params as signals_frames.sql.
SELECT m.key, f.run, f.bus, count(*) AS frames, min(f.t_ns) AS t_ns, max(f.t_ns) AS until_ns,
       arg_min(f.file, f.t_ns) AS file, arg_min(f.line, f.t_ns) AS line,
       arg_min(octet_length(f.data), f.t_ns) AS nbytes
FROM frames f
JOIN tl_signal_messages m ON f.bus = m.bus AND f.id = m.id AND f.ext = m.ext
WHERE NOT f.rtr AND octet_length(f.data) <> m.nbytes
  AND ($run IS NULL OR f.run = $run)
  AND ($from_ns IS NULL OR f.t_ns >= $from_ns)
  AND ($to_ns IS NULL OR f.t_ns < $to_ns)
GROUP BY m.key, f.run, f.bus
ORDER BY m.key, f.run;
