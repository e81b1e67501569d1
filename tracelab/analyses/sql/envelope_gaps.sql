-- Gap raster: the (message, time bucket) cells a gap covers. A cell is `logger` when the gap
-- overlaps a logger-loss interval on its bus (the logger dropped frames, not the bus): the
-- timing analysis's in_loss flag when it has one, else an overlap test against `losses`.
-- Params: $run, $bucket_ns. Reads the view gap_source (run, bus, id, ext, from_ns, to_ns,
-- in_loss) over the `gaps` analysis, and `losses`.
WITH g AS (
    SELECT bus, id, ext, from_ns, to_ns,
           coalesce(in_loss, EXISTS (
               SELECT 1 FROM losses l
               WHERE l.run = $run AND (l.bus = g0.bus OR l.bus = '*')
                 AND l.t_ns < g0.to_ns AND l.until_ns > g0.from_ns
           )) AS logger
    FROM gap_source g0
    WHERE run = $run
),
cells AS (
    SELECT bus, id, ext, logger,
           unnest(range(from_ns // $bucket_ns, to_ns // $bucket_ns + 1)) AS cell
    FROM g
),
agg AS (
    SELECT bus, id, ext, cell * $bucket_ns AS t_ns,
           count(*) AS gaps, bool_and(logger) AS logger
    FROM cells
    GROUP BY bus, id, ext, cell
)
SELECT bus, id, ext, t_ns, gaps, logger
FROM agg
-- messages with frames missing on the bus first, those only the logger lost after them
ORDER BY bool_and(logger) OVER (PARTITION BY bus, id, ext), bus, ext, id, t_ns
