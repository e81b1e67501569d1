-- Step 2b of load (only when some span is longer than a window): the overlap of those spans
-- with windows k + 2 and beyond.
CREATE OR REPLACE TEMP TABLE tl_long AS
WITH spans AS (
    SELECT run, bus, start_ns AS s, end_ns AS e
    FROM frames WHERE ($run::VARCHAR IS NULL OR run = $run::VARCHAR)
                  AND end_ns - start_ns > $window_ns::BIGINT
    UNION ALL
    SELECT run, bus, s, e FROM tl_error_spans WHERE e - s > $window_ns::BIGINT
),
reach AS (
    SELECT run, bus, s, e,
           unnest(range(floor_div(s, $window_ns::BIGINT) + 2,
                        floor_div(e - 1, $window_ns::BIGINT) + 1)) AS k
    FROM spans
)
SELECT run, bus, k,
       sum(least(e, (k + 1) * $window_ns::BIGINT) - greatest(s, k * $window_ns::BIGINT))
           AS extra_ns
FROM reach GROUP BY run, bus, k;
