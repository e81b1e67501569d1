-- Identifiers by share of busy time per (run, bus): share = the id's frame time / all busy
-- time (frames and error frames) of that bus in the run. The $top largest per (run, bus).
WITH per_id AS (SELECT run, bus, id, ext, frames, busy_ns FROM tl_ids),
total AS (SELECT run, bus, sum(busy_ns) AS total_ns FROM tl_load GROUP BY run, bus),
ranked AS (
    SELECT p.run, p.bus, p.id, p.ext, p.frames, p.busy_ns::BIGINT AS busy_ns,
           p.busy_ns / nullif(t.total_ns, 0) AS share,
           row_number() OVER (PARTITION BY p.run, p.bus ORDER BY p.busy_ns DESC, p.id, p.ext)
               AS rank
    FROM per_id p JOIN total t ON t.run = p.run AND t.bus = p.bus
)
SELECT * FROM ranked WHERE rank <= $top ORDER BY run, bus, rank;
