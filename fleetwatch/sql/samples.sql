-- name: samples
-- Per-sample staging for the other models: slip, actual ratio, angular speeds, the
-- running and steady flags, and what the event rules need from the samples before (one
-- pass of window functions over unit_id ordered by ts computes every lag, so events.sql
-- needs no sort of its own; a second pass carries the settle clock).
-- Steady rule (design.md 5, domain.md 2.7 "only steady-state windows are meaningful"): the
-- input speed is above steady_n_in_min_rpm AND steady_settle_s have passed since the last
-- "settle reset". A reset is a change of ratio_cmd, a sample at or below the speed floor
-- (the drive was stopped or starting: the settle clock runs again from the start), or a
-- pause in the log longer than gap_min_s (state during the pause unknown).
-- Slip s = 1 - ratio_cmd*n_out/n_in (domain.md 1.3), actual ratio n_in/n_out (domain.md 1.1),
-- omega = 2*pi*n/60 (domain.md 1.2). Scope: samples in [from_ts - context_s, to_ts + context_s)
-- plus, per unit, the last sample of the 31 days before that (so a long data gap across the
-- scope start is still seen); later models keep only what falls in [from_ts, to_ts).
-- This file is the reference definition. `fleetwatch analyze` does not run it: it runs
-- fleetwatch.sqlmodels.samples_frame, which reads the same scope with DuckDB and derives
-- the same columns in polars (one sort, shifts and forward fills instead of two window
-- passes; about half the CPU), registered as the view `samples`;
-- tests/test_sqlmodels_samples.py holds the two equal row for row.
-- reads: telemetry
-- param: from_ts  UTC  runtime: start of the recompute range (inclusive), e.g. TIMESTAMPTZ '2026-06-01 00:00:00+00'.
-- param: to_ts  UTC  runtime: end of the recompute range (exclusive).
-- param: context_s  s  runtime: context read before from_ts and after to_ts (settle time, flatline span, event ends); analyze uses 1 day.
-- param: steady_n_in_min_rpm  rpm  Input speed floor of a running / steady sample.
-- param: steady_settle_s  s  Time since the last settle reset for a sample to count as steady.
-- param: gap_min_s  s  A pause longer than this resets the settle clock.
-- column: unit_id  -  Drive.
-- column: ts  UTC  Sample time.
-- column: day  UTC-date  UTC date of ts.
-- column: seq  -  Position of the sample in the unit's scope (consecutive numbers = adjacent samples).
-- column: v_in  V  As in telemetry.
-- column: i_in  A  As in telemetry.
-- column: p_in  W  As in telemetry.
-- column: n_in  rpm  As in telemetry.
-- column: n_out  rpm  As in telemetry.
-- column: ratio_cmd  -  As in telemetry.
-- column: t_out  N*m  As in telemetry.
-- column: temp  degC  As in telemetry.
-- column: omega_in  rad/s  Input angular speed n_in*pi/30.
-- column: omega_out  rad/s  Output angular speed n_out*pi/30.
-- column: slip  -  1 - ratio_cmd*n_out/n_in (null when n_in <= 0).
-- column: ratio_act  -  n_in/n_out (null when n_out <= 0).
-- column: p_out_w  W  t_out*omega_out (null without t_out).
-- column: running  -  n_in > steady_n_in_min_rpm.
-- column: steady  -  Running and steady_settle_s since the last settle reset.
-- column: prev_ts  UTC  Time of the unit's previous sample.
-- column: prev_n_in  rpm  Input speed of the previous sample.
-- column: prev_ratio_cmd  -  Commanded ratio of the previous sample.
-- column: prev4_ts  UTC  Time of the 4th sample before (crowding test for clock steps).
-- column: same_n_in  -  n_in equals the previous sample's (null when either is null).
-- column: same_n_out  -  n_out equals the previous sample's.
-- column: same_i_in  -  i_in equals the previous sample's.
-- column: same_v_in  -  v_in equals the previous sample's.
-- column: same_temp  -  temp equals the previous sample's.
-- column: dt_prev_s  s  Seconds since the previous sample (null for a unit's first).
-- column: gap_seg  -  seq of the last sample that followed a pause longer than gap_min_s (0: none in the scope); runs never span two values.
-- column: in_range  -  ts inside [from_ts, to_ts).
WITH scope AS (
    SELECT unit_id, ts, day, v_in, i_in, p_in, n_in, n_out, ratio_cmd, t_out, temp,
           false AS is_prior
    FROM telemetry
    WHERE ts >= $from_ts - to_seconds($context_s)
      AND ts < $to_ts + to_seconds($context_s)
      AND day >= (($from_ts - to_seconds($context_s)) AT TIME ZONE 'UTC')::DATE
      AND day <= (($to_ts + to_seconds($context_s)) AT TIME ZONE 'UTC')::DATE
    UNION ALL
    -- the last sample before the scope (looking back at most 31 days): only its time,
    -- speed and ratio are used, as the "previous sample" of the scope's first
    SELECT unit_id, max(ts), NULL, NULL, NULL, NULL, arg_max(n_in, ts), NULL,
           arg_max(ratio_cmd, ts), NULL, NULL, true
    FROM telemetry
    WHERE ts < $from_ts - to_seconds($context_s)
      AND day >= (($from_ts - to_seconds($context_s)) AT TIME ZONE 'UTC')::DATE - 31
      AND day <= (($from_ts - to_seconds($context_s)) AT TIME ZONE 'UTC')::DATE
    GROUP BY unit_id
),
lagged AS (
    SELECT *,
           lag(ts) OVER w AS prev_ts,
           lag(n_in) OVER w AS prev_n_in,
           lag(ratio_cmd) OVER w AS prev_ratio_cmd,
           row_number() OVER w AS seq,
           lag(ts, 4) OVER w AS prev4_ts,
           n_in = lag(n_in) OVER w AS same_n_in,
           n_out = lag(n_out) OVER w AS same_n_out,
           i_in = lag(i_in) OVER w AS same_i_in,
           v_in = lag(v_in) OVER w AS same_v_in,
           temp = lag(temp) OVER w AS same_temp
    FROM scope
    WINDOW w AS (PARTITION BY unit_id ORDER BY ts)
),
flagged AS (
    SELECT *,
           epoch(ts) - epoch(prev_ts) AS dt_prev_s,
           n_in > $steady_n_in_min_rpm AS running,
           (prev_ts IS NULL
            OR ratio_cmd IS DISTINCT FROM prev_ratio_cmd
            OR NOT (n_in > $steady_n_in_min_rpm)
            OR epoch(ts) - epoch(prev_ts) > $gap_min_s) AS settle_reset
    FROM lagged
),
settled AS (
    -- last_value(... IGNORE NULLS) carries the latest reset forward (cheaper in DuckDB than
    -- a running max over the same frame)
    SELECT *,
           last_value(CASE WHEN settle_reset THEN ts END IGNORE NULLS) OVER r AS reset_ts,
           coalesce(last_value(CASE WHEN dt_prev_s > $gap_min_s THEN seq END IGNORE NULLS)
                        OVER r, 0) AS gap_seg
    FROM flagged
    WINDOW r AS (PARTITION BY unit_id ORDER BY ts ROWS UNBOUNDED PRECEDING)
)
SELECT unit_id, ts, day, seq,
       v_in, i_in, p_in, n_in, n_out, ratio_cmd, t_out, temp,
       n_in * pi() / 30.0 AS omega_in,
       n_out * pi() / 30.0 AS omega_out,
       CASE WHEN n_in > 0 THEN 1.0 - ratio_cmd * n_out / n_in END AS slip,
       CASE WHEN n_out > 0 THEN n_in / n_out END AS ratio_act,
       t_out * n_out * pi() / 30.0 AS p_out_w,
       running,
       coalesce(running AND NOT settle_reset
                AND epoch(ts) - epoch(reset_ts) >= $steady_settle_s, false) AS steady,
       prev_ts, prev_n_in, prev_ratio_cmd, dt_prev_s, prev4_ts,
       same_n_in, same_n_out, same_i_in, same_v_in, same_temp, gap_seg,
       (ts >= $from_ts AND ts < $to_ts) AS in_range
FROM settled
WHERE NOT is_prior
