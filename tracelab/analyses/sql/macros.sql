-- Macros for analyses and for `tracelab sql` (documented in docs/analyses.md).
-- All times are integer nanoseconds since the run's %origin.

-- Floor division for BIGINT (DuckDB's // truncates towards zero).
CREATE OR REPLACE TEMP MACRO floor_div(a, b) AS (a - (((a % b) + b) % b)) // b;

-- Start of the window of width w_ns that contains t_ns (windows aligned to t = 0).
CREATE OR REPLACE TEMP MACRO bucket(t_ns, w_ns) AS floor_div(t_ns, w_ns) * w_ns;

-- Identifier as the frame log writes it: 3 hex digits (base) or 8 (extended), upper case.
CREATE OR REPLACE TEMP MACRO hex_id(id, ext) AS
    lpad(hex(id::UINTEGER), CASE WHEN ext THEN 8 ELSE 3 END, '0');

-- Seconds since the origin, as a DOUBLE.
CREATE OR REPLACE TEMP MACRO secs(t_ns) AS t_ns / 1e9;

-- Milliseconds, as a DOUBLE (for periods and jitter).
CREATE OR REPLACE TEMP MACRO ms(t_ns) AS t_ns / 1e6;

-- Wall-clock time (UTC, TIMESTAMP_NS) of t_ns in run r, from the run's %origin; NULL when
-- the log had no %origin.
CREATE OR REPLACE TEMP MACRO wall_time(r, t_ns) AS make_timestamp_ns(
    (SELECT epoch_ns(CAST(rtrim(any_value(m.origin), 'Z') AS TIMESTAMP_NS))
     FROM manifest m WHERE m.run = r) + t_ns);

-- The decoded values of one signal (name or message.name) from the `signals` analysis, with
-- the time in seconds: SELECT * FROM sig('coolant_temp'). The view is looked up when the
-- macro is used, so sessions without a signals analysis still open.
CREATE OR REPLACE TEMP MACRO sig(wanted, source := 'signals') AS TABLE
    SELECT run, bus, t_ns, t_ns / 1e9 AS t_s, message, signal, raw, value, unit, file, line
    FROM query_table(source)
    WHERE signal = wanted OR message || '.' || signal = wanted
    ORDER BY run, t_ns;
