-- Step 4 of timing: one row per (run, bus, id, ext) stream (docs/analyses.md defines every
-- column). Needs tl_periods, tl_cycles, tl_gaps. Event-driven streams get counts only.
-- t_rel_ns = arrival time since the stream's first frame (keeps the fit well conditioned).
WITH cyc AS (
    SELECT c.g, c.dt_ns, c.period_ns, c.cycle, (c.t_ns - p.t0_ns)::DOUBLE AS t_rel_ns,
           c.dt_ns <= $gap_factor::DOUBLE * c.period_ns AS regular
    FROM tl_cycles c JOIN tl_periods p ON p.g = c.g
),
stats AS (
    SELECT g,
           stddev_pop(dt_ns - period_ns) FILTER (regular) AS cycle_std_ns,
           quantile_cont(dt_ns - period_ns, [0.01, 0.99]) FILTER (regular) AS cycle_q_ns,
           max(abs(dt_ns - period_ns)) FILTER (regular) AS cycle_max_abs_ns,
           regr_slope(t_rel_ns, cycle) AS slope_ns, regr_intercept(t_rel_ns, cycle) AS icpt_ns,
           count(*) FILTER (dt_ns < 0.5 * period_ns) AS bursts
    FROM cyc GROUP BY g
),
phase AS (
    SELECT c.g,
           stddev_pop(c.t_rel_ns - (s.icpt_ns + s.slope_ns * c.cycle)) AS phase_std_ns,
           max(abs(c.t_rel_ns - (s.icpt_ns + s.slope_ns * c.cycle))) AS phase_max_abs_ns
    FROM cyc c JOIN stats s ON c.g = s.g
    GROUP BY c.g
),
gapsum AS (
    SELECT run, bus, id, ext, count(*) AS gaps,
           coalesce(sum(missing) FILTER (NOT in_loss), 0) AS missing,
           coalesce(sum(missing) FILTER (in_loss), 0) AS missing_in_loss
    FROM tl_gaps GROUP BY run, bus, id, ext
)
SELECT p.run, p.bus, p.id, p.ext, p.name, p.sender, p.frames AS count,
       p.period_ns, CASE WHEN p.period_ns IS NOT NULL THEN p.period_source END AS period_source,
       CASE WHEN p.period_ns IS NOT NULL THEN p.median_ns END AS median_ns,
       CASE WHEN p.period_ns IS NOT NULL THEN p.mean_ns END AS mean_ns,
       CASE WHEN p.period_ns IS NOT NULL THEN p.min_ns END AS min_ns,
       CASE WHEN p.period_ns IS NOT NULL THEN p.max_ns END AS max_ns,
       s.cycle_std_ns, s.cycle_q_ns[1] AS cycle_p01_ns, s.cycle_q_ns[2] AS cycle_p99_ns,
       s.cycle_max_abs_ns,
       ph.phase_std_ns, ph.phase_max_abs_ns,
       (s.slope_ns / p.period_ns - 1) * 1e6 AS drift_ppm,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(g.missing, 0) END AS missing,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(g.gaps, 0) END AS gaps,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(s.bursts, 0) END AS bursts,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(g.missing_in_loss, 0) END
           AS missing_in_loss
FROM tl_periods p
LEFT JOIN stats s ON p.g = s.g
LEFT JOIN phase ph ON p.g = ph.g
LEFT JOIN gapsum g ON p.run = g.run AND p.bus = g.bus AND p.id = g.id AND p.ext = g.ext
ORDER BY p.run, p.bus, p.ext, p.id;
