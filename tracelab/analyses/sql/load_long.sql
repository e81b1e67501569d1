-- Step 2b of load (only when some span is longer than a window): a span starting in window
-- k hands all of its overflow to window k + 1 in load_heads.sql; here the part beyond window
-- k + 1 is taken back from k + 1 and given to windows k + 2 and later, by exact overlap.
CREATE OR REPLACE TEMP TABLE tl_long AS
WITH spans AS (
    SELECT run, bus, start_ns AS s, end_ns AS e
    FROM frames WHERE ($run::VARCHAR IS NULL OR run = $run::VARCHAR)
                  AND duration_ns > $window_ns::BIGINT
    UNION ALL
    SELECT run, bus, s, e FROM tl_error_spans WHERE e - s > $window_ns::BIGINT
),
keyed AS (SELECT *, floor_div(s, $window_ns::BIGINT) AS k0 FROM spans),
reach AS (
    SELECT run, bus, s, e, k0 + 1 AS k,
           -greatest(e - (k0 + 2) * $window_ns::BIGINT, 0) AS extra_ns
    FROM keyed
    UNION ALL
    SELECT run, bus, s, e, k, least(e, (k + 1) * $window_ns::BIGINT)
                              - greatest(s, k * $window_ns::BIGINT)
    FROM (SELECT *, unnest(range(k0 + 2, floor_div(e - 1, $window_ns::BIGINT) + 1)) AS k
          FROM keyed)
)
SELECT run, bus, k, sum(extra_ns) AS extra_ns FROM reach GROUP BY run, bus, k;
