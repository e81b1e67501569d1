-- Step 2 of timing: the period of each stream and whether it is periodic.
--   catalog message with a period  -> that period (period_source = 'catalog')
--   catalog message without one    -> event-driven (period_ns NULL)
--   identifier not in the catalog  -> inferred: m0 = median of all inter-arrivals; the period
--     is the median of the inter-arrivals within [0.5, gap_factor] x m0 (gaps and bursts
--     ignored), rounded to the nanosecond. Stable (periodic) when the stream has at least
--     4 inter-arrivals, at least 80 % of them lie in that band and the period is at least
--     1 ns (not a stream of duplicates); else event-driven.
-- Needs tl_arrivals, tl_streams and tl_catalog(bus, id, ext, name, sender, period_ns).
CREATE OR REPLACE TEMP TABLE tl_periods AS
WITH raw AS (
    SELECT g, count(*) AS frames, count(dt_ns) AS n_dt, median(dt_ns) AS m0_ns,
           min(t_ns) AS t0_ns, avg(dt_ns) AS mean_ns, min(dt_ns) AS min_ns,
           max(dt_ns) AS max_ns
    FROM tl_arrivals GROUP BY g
),
named AS (
    SELECT r.*, s.run, s.bus, s.id, s.ext, c.id IS NOT NULL AS in_catalog, c.name, c.sender,
           c.period_ns AS catalog_period_ns
    FROM raw r JOIN tl_streams s ON s.g = r.g
    LEFT JOIN tl_catalog c ON c.bus = s.bus AND c.id = s.id AND c.ext = s.ext
),
band AS (
    SELECT a.g, median(a.dt_ns) AS m1_ns, count(*) AS n_band
    FROM tl_arrivals a JOIN named n ON a.g = n.g
    WHERE NOT n.in_catalog AND a.dt_ns BETWEEN 0.5 * n.m0_ns AND $gap_factor::DOUBLE * n.m0_ns
    GROUP BY a.g
)
SELECT n.g, n.run, n.bus, n.id, n.ext, n.frames, n.t0_ns, n.name, n.sender,
       n.m0_ns AS median_ns, n.mean_ns, n.min_ns, n.max_ns,
       CASE WHEN n.in_catalog THEN n.catalog_period_ns
            WHEN n.n_dt >= 4 AND coalesce(b.n_band, 0) >= 0.8 * n.n_dt AND b.m1_ns >= 1
                THEN round(b.m1_ns)::BIGINT
       END AS period_ns,
       CASE WHEN n.in_catalog THEN 'catalog' ELSE 'inferred' END AS period_source
FROM named n LEFT JOIN band b ON b.g = n.g;
