-- Step 4 of timing: one row per (run, bus, id, ext) stream (docs/analyses.md defines every
-- column). Needs tl_periods, tl_cycles, tl_gaps. Event-driven streams get counts only.
WITH stats AS (
    SELECT run, bus, id, ext,
           median(dt_ns) AS median_ns, avg(dt_ns) AS mean_ns,
           min(dt_ns) AS min_ns, max(dt_ns) AS max_ns,
           stddev_pop(dt_ns - period_ns) FILTER (dt_ns <= $gap_factor::DOUBLE * period_ns)
               AS cycle_std_ns,
           quantile_cont(dt_ns - period_ns, 0.01) FILTER (dt_ns <= $gap_factor::DOUBLE * period_ns)
               AS cycle_p01_ns,
           quantile_cont(dt_ns - period_ns, 0.99) FILTER (dt_ns <= $gap_factor::DOUBLE * period_ns)
               AS cycle_p99_ns,
           max(abs(dt_ns - period_ns)) FILTER (dt_ns <= $gap_factor::DOUBLE * period_ns)
               AS cycle_max_abs_ns,
           regr_slope(t_rel_ns, cycle) AS slope_ns, regr_intercept(t_rel_ns, cycle) AS icpt_ns,
           count(*) FILTER (dt_ns < 0.5 * period_ns) AS bursts
    FROM tl_cycles GROUP BY run, bus, id, ext
),
phase AS (
    SELECT c.run, c.bus, c.id, c.ext,
           stddev_pop(c.t_rel_ns - (s.icpt_ns + s.slope_ns * c.cycle)) AS phase_std_ns,
           max(abs(c.t_rel_ns - (s.icpt_ns + s.slope_ns * c.cycle))) AS phase_max_abs_ns
    FROM tl_cycles c
    JOIN stats s ON c.run = s.run AND c.bus = s.bus AND c.id = s.id AND c.ext = s.ext
    GROUP BY c.run, c.bus, c.id, c.ext
),
gapsum AS (
    SELECT run, bus, id, ext, count(*) AS gaps,
           coalesce(sum(missing) FILTER (NOT in_loss), 0) AS missing,
           coalesce(sum(missing) FILTER (in_loss), 0) AS missing_in_loss
    FROM tl_gaps GROUP BY run, bus, id, ext
)
SELECT p.run, p.bus, p.id, p.ext, p.name, p.sender, p.frames AS count,
       p.period_ns, CASE WHEN p.period_ns IS NOT NULL THEN p.period_source END AS period_source,
       s.median_ns, s.mean_ns, s.min_ns, s.max_ns,
       s.cycle_std_ns, s.cycle_p01_ns, s.cycle_p99_ns, s.cycle_max_abs_ns,
       ph.phase_std_ns, ph.phase_max_abs_ns,
       (s.slope_ns / p.period_ns - 1) * 1e6 AS drift_ppm,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(g.missing, 0) END AS missing,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(g.gaps, 0) END AS gaps,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(s.bursts, 0) END AS bursts,
       CASE WHEN p.period_ns IS NOT NULL THEN coalesce(g.missing_in_loss, 0) END
           AS missing_in_loss
FROM tl_periods p
LEFT JOIN stats s ON p.run = s.run AND p.bus = s.bus AND p.id = s.id AND p.ext = s.ext
LEFT JOIN phase ph ON p.run = ph.run AND p.bus = ph.bus AND p.id = ph.id AND p.ext = ph.ext
LEFT JOIN gapsum g ON p.run = g.run AND p.bus = g.bus AND p.id = g.id AND p.ext = g.ext
ORDER BY p.run, p.bus, p.ext, p.id;
