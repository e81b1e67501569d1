-- Step 1 of load: the bus time of every error frame (an estimate; docs/analyses.md).
-- An error at t_ns aborts the frame in the field where it was detected. We count the bits of
-- that frame from SOF to the end of the detecting field (unstuffed, classic layout, 8 data
-- bytes when unknown), then 6 error-flag bits, 8 error-delimiter bits and 3 intermission bits
-- after t_ns. Field lengths: ISO 11898-1:2015 clause 10.4 (data and remote frame formats;
-- clause number from memory). Extended identifiers add 20 bits (SRR, IDE, 18-bit extension).
-- The nominal bit time of each bus is taken from its frames without BRS (duration = bits x
-- bit time, ingest computes it that way).
CREATE OR REPLACE TEMP TABLE tl_error_spans AS
WITH field_bits(field, before_end_bits, ext_extra_bits) AS (
    VALUES ('sof', 1, 0), ('arbitration', 13, 20), ('control', 19, 20), ('data', 83, 20),
           ('crc', 99, 20), ('ack', 101, 20), ('eof', 108, 20), ('interframe', 0, 0),
           ('unknown', 0, 0)
),
bit AS (
    SELECT run, bus, sum(duration_ns)::DOUBLE / sum(bits) AS bit_ns
    FROM frames
    WHERE NOT brs AND bits > 0 AND ($run::VARCHAR IS NULL OR run = $run::VARCHAR)
      AND bus IN (SELECT bus FROM errors)
    GROUP BY run, bus
)
SELECT e.run, e.bus,
       e.t_ns - round((coalesce(f.before_end_bits, 0)
                       + CASE WHEN e.ext THEN coalesce(f.ext_extra_bits, 0) ELSE 0 END)
                      * b.bit_ns)::BIGINT AS s,
       e.t_ns + round(17 * b.bit_ns)::BIGINT AS e
FROM errors e
JOIN bit b ON b.run = e.run AND b.bus = e.bus
LEFT JOIN field_bits f ON f.field = e.field
WHERE $run::VARCHAR IS NULL OR e.run = $run::VARCHAR;
