-- Step 2 of timing: the period of each stream and whether it is periodic.
--   catalog message with a period  -> that period (period_source = 'catalog')
--   catalog message without one    -> event-driven (period_ns NULL)
--   identifier not in the catalog  -> inferred: m0 = median of all inter-arrivals; the period
--     is the median of the inter-arrivals within [0.5, gap_factor] x m0 (gaps and bursts
--     ignored), rounded to the nanosecond. Stable (periodic) when the stream has at least
--     4 inter-arrivals and at least 80 % of them lie in that band; else event-driven.
-- Needs tl_arrivals and tl_catalog(bus, id, ext, name, sender, period_ns).
CREATE OR REPLACE TEMP TABLE tl_periods AS
WITH raw AS (
    SELECT run, bus, id, ext, count(*) AS frames, count(dt_ns) AS n_dt,
           median(dt_ns) AS m0_ns
    FROM tl_arrivals GROUP BY run, bus, id, ext
),
band AS (
    SELECT a.run, a.bus, a.id, a.ext, median(a.dt_ns) AS m1_ns, count(*) AS n_band
    FROM tl_arrivals a
    JOIN raw r ON a.run = r.run AND a.bus = r.bus AND a.id = r.id AND a.ext = r.ext
    LEFT JOIN tl_catalog c ON c.bus = a.bus AND c.id = a.id AND c.ext = a.ext
    WHERE c.id IS NULL
      AND a.dt_ns BETWEEN 0.5 * r.m0_ns AND $gap_factor::DOUBLE * r.m0_ns
    GROUP BY a.run, a.bus, a.id, a.ext
)
SELECT r.run, r.bus, r.id, r.ext, r.frames, c.name, c.sender,
       CASE WHEN c.id IS NOT NULL THEN c.period_ns
            WHEN r.n_dt >= 4 AND coalesce(b.n_band, 0) >= 0.8 * r.n_dt
                THEN round(b.m1_ns)::BIGINT
       END AS period_ns,
       CASE WHEN c.id IS NOT NULL THEN 'catalog' ELSE 'inferred' END AS period_source
FROM raw r
LEFT JOIN tl_catalog c ON c.bus = r.bus AND c.id = r.id AND c.ext = r.ext
LEFT JOIN band b ON b.run = r.run AND b.bus = r.bus AND b.id = r.id AND b.ext = r.ext;
