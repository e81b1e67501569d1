-- Step 3 of load: every window from the first busy one to the last, per (run, bus), with
-- busy_ns = head + spill from the window before + long-span overlap; load_ratio = busy / width.
-- Needs tl_heads and tl_long.
CREATE OR REPLACE TEMP TABLE tl_load AS
WITH bounds AS (
    SELECT run, bus, min(k) AS k0,
           max(k + CASE WHEN spill_ns > 0 THEN 1 ELSE 0 END) AS k1
    FROM tl_heads GROUP BY run, bus
    UNION ALL
    SELECT run, bus, min(k), max(k) FROM tl_long GROUP BY run, bus
),
windows AS (
    SELECT run, bus, unnest(range(min(k0), max(k1) + 1)) AS k FROM bounds GROUP BY run, bus
)
SELECT w.run, w.bus, $window_ns::BIGINT AS window_ns, w.k * $window_ns::BIGINT AS t_ns,
       (coalesce(h.head_ns, 0) + coalesce(p.spill_ns, 0) + coalesce(l.extra_ns, 0))::BIGINT
           AS busy_ns,
       (coalesce(h.head_ns, 0) + coalesce(p.spill_ns, 0) + coalesce(l.extra_ns, 0))
           / $window_ns::DOUBLE AS load_ratio,
       coalesce(h.frames, 0)::BIGINT AS frames, coalesce(h.error_frames, 0)::BIGINT AS error_frames
FROM windows w
LEFT JOIN tl_heads h ON h.run = w.run AND h.bus = w.bus AND h.k = w.k
LEFT JOIN tl_heads p ON p.run = w.run AND p.bus = w.bus AND p.k = w.k - 1
LEFT JOIN tl_long l ON l.run = w.run AND l.bus = w.bus AND l.k = w.k;
