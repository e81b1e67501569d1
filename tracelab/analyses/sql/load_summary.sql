-- Summary per (run, bus): statistics of the window load ratios (quantile_cont = linear
-- interpolation), the start of the first window at the maximum, frames per second over the
-- busy span (first frame start to last frame end).
WITH agg AS (
    SELECT run, bus, any_value(window_ns) AS window_ns, count(*) AS windows,
           avg(load_ratio) AS mean, quantile_cont(load_ratio, 0.5) AS p50,
           quantile_cont(load_ratio, 0.95) AS p95, quantile_cont(load_ratio, 0.99) AS p99,
           max(load_ratio) AS max, sum(busy_ns) AS busy_ns,
           sum(frames) AS frames, sum(error_frames) AS error_frames
    FROM tl_load GROUP BY run, bus
),
peak AS (
    SELECT l.run, l.bus, min(l.t_ns) AS max_t_ns
    FROM tl_load l JOIN agg a ON a.run = l.run AND a.bus = l.bus AND l.load_ratio = a.max
    GROUP BY l.run, l.bus
),
span AS (SELECT run, bus, first_ns, last_ns FROM tl_span)
SELECT a.run, a.bus, a.window_ns, a.windows, a.mean, a.p50, a.p95, a.p99, a.max, p.max_t_ns,
       a.frames::BIGINT AS frames, a.error_frames::BIGINT AS error_frames,
       a.busy_ns::BIGINT AS busy_ns, (s.last_ns - s.first_ns) AS span_ns,
       a.frames / nullif((s.last_ns - s.first_ns) / 1e9, 0) AS frames_per_s
FROM agg a
JOIN peak p ON p.run = a.run AND p.bus = a.bus
LEFT JOIN span s ON s.run = a.run AND s.bus = a.bus
ORDER BY a.run, a.bus;
