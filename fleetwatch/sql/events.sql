-- name: events
-- Discrete events per unit, one row each, for the status rules and the event history:
--  gross_slip: slip > gross_slip_limit on >= gross_slip_min_samples consecutive running samples
--    (n_in above the speed floor; steady or not, a slipping contact does not wait for the
--    settle time) whose ratio_cmd equals the previous sample's: while the actuator travels
--    to a new ratio, ratio_cmd*n_out/n_in is no slip (domain.md 2.7). Beyond the traction
--    peak the contact slides and heat and wear jump (domain.md 2.1). Episodes that overlap a
--    flatline of n_in or n_out are dropped: slip from a stuck speed sensor is not slip.
--    peak = highest slip, ratio_cmd at that sample.
--  stall: i_in > stall_i_a while n_in < stall_n_in_max_rpm on consecutive samples lasting
--    >= stall_min_s (locked rotor: E = 0, current V/R, domain.md 1.4). peak = highest current,
--    ratio_cmd = ratio at the stall's first sample (steep ratios stall at start).
--  ratio_change_stopped: ratio_cmd differs from the previous sample's at a sample where the
--    input stands still (n_in < stall_n_in_max_rpm): the wheel was asked to move across
--    cones that do not turn. When the previous sample still ran, the command came during the
--    stop or the coast-down (the log cannot tell); the description says so. Across a pause
--    longer than gap_min_s nobody knows when the command changed: not reported.
--    peak = size of the ratio step.
--  flatline: n_in, n_out, i_in, v_in or temp identical to the last digit on consecutive
--    samples for >= flatline_min_s while the drive runs on both (a live sensor on a running
--    drive always moves a little; common practice, no source). A speed (n_in, n_out) that
--    repeats a nonzero value also counts while the drive stands still: a standing shaft
--    reads zero, so a stuck speed sensor shows through the idle hours too. peak = duration
--    in s.
--  data_gap: more than gap_min_s between consecutive samples. A pause that follows a sample
--    at standstill is reported only when the unit's logger is seen recording through
--    standstill (standstill samples in the scope covering at least 4*gap_min_s): a logger
--    that stays quiet while the drive idles (nights, weekends) makes such pauses normal.
--    peak = pause in s. A forward clock step looks exactly like a pause once ingest has
--    sorted the rows by time (there is no logger sequence number to tell them apart), so
--    forward steps are reported as data_gap.
--  clock_jump: a step back of the logger clock makes the repeated stretch of time overlap
--    the earlier samples: after ingest has sorted by time the two series interleave and the
--    stretch holds about twice the samples the logging period allows. A sample is
--    "crowded" when it and the 4 samples before it span less than 3*sample_period_s
--    (normal logging spans 4 periods; even +/- period/4 of jitter keeps it above 3.5);
--    >= 3 crowded samples in a row make one event (common practice, no source).
--    peak = (samples - 1)*sample_period_s - span of the stretch: the time logged twice,
--    about the size of the step. Steps that land exactly on earlier timestamps are rejected
--    by ingest as conflicting duplicates and show in `quarantine` instead. Forward steps:
--    see data_gap.
-- Runs (gross_slip, stall, flatline, clock_jump) are islands of consecutive hit samples;
-- they break at pauses longer than gap_min_s (samples.gap_seg). The run-level rule (sample
-- count, duration) decides whether a run is an event, then the run is reported as one row
-- per UTC day it touches (a sensor stuck for a week gives seven rows, each saying it continues): pieces
-- never depend on how the history was cut for processing, so an incremental analyze and a
-- full rebuild give the same rows. Only rows whose end_ts lies in [from_ts, to_ts) are
-- returned; samples.sql reads a day of context on both sides, so every piece is whole.
-- reads: samples
-- param: from_ts  UTC  runtime: start of the recompute range (inclusive).
-- param: to_ts  UTC  runtime: end of the recompute range (exclusive).
-- param: steady_n_in_min_rpm  rpm  Input speed floor of a running sample.
-- param: gross_slip_limit  -  Slip above this is gross slip.
-- param: gross_slip_min_samples  samples  Consecutive samples that make a gross-slip event.
-- param: stall_i_a  A  Stall current.
-- param: stall_n_in_max_rpm  rpm  Below this input speed the drive stands still.
-- param: stall_min_s  s  Shortest stall reported.
-- param: flatline_min_s  s  Shortest flatline reported.
-- param: gap_min_s  s  Shortest data gap reported; runs break at longer pauses.
-- param: sample_period_s  s  Expected logging period.
-- column: unit_id  -  Drive.
-- column: kind  -  gross_slip, stall, ratio_change_stopped, flatline, data_gap, clock_jump.
-- column: start_ts  UTC  Event start (first sample; for pauses the last sample before).
-- column: end_ts  UTC  Event end (last sample; for pauses the first sample after).
-- column: day  UTC-date  UTC date of start_ts.
-- column: samples  -  Samples in the event (0 for a pause).
-- column: peak  kind-specific  Peak slip (-), peak current (A), ratio step (-), duration or step (s).
-- column: ratio_cmd  -  Commanded ratio at the event.
-- column: signal  -  Signal involved (slip, i_in, ratio_cmd, the flat column, ts).
-- column: description  -  Plain-language summary.
-- base only projects samples: NOT MATERIALIZED lets each branch below scan samples with its
-- own filter instead of DuckDB copying every sample once more (about a third of the model)
WITH base AS NOT MATERIALIZED (
    SELECT unit_id, ts, seq, slip, i_in, n_in, n_out, v_in, temp, ratio_cmd, running,
           prev_ts, prev_n_in, prev_ratio_cmd, prev4_ts, dt_prev_s, gap_seg,
           same_n_in, same_n_out, same_i_in, same_v_in, same_temp,
           coalesce(running AND prev_n_in > $steady_n_in_min_rpm
                    AND dt_prev_s <= $gap_min_s, false) AS run_pair,
           coalesce(dt_prev_s <= $gap_min_s, false) AS near_pair
    FROM samples
),
-- every hit sample of a run kind, with the start t0 of the stretch it stands for
hits AS (
    SELECT unit_id, 'gross_slip' AS kind, 'slip' AS signal, ts, ts AS t0, seq, gap_seg,
           slip AS value, ratio_cmd, '' AS unit
    FROM base
    WHERE running AND slip > $gross_slip_limit AND ratio_cmd = prev_ratio_cmd
    UNION ALL
    SELECT unit_id, 'stall', 'i_in', ts, ts, seq, gap_seg, i_in, ratio_cmd, 'A'
    FROM base WHERE i_in > $stall_i_a AND n_in < $stall_n_in_max_rpm
    UNION ALL
    SELECT unit_id, 'clock_jump', 'ts', ts, prev4_ts, seq, 0, NULL, ratio_cmd, ''
    FROM base WHERE epoch(ts) - epoch(prev4_ts) < 3 * $sample_period_s
    UNION ALL
    SELECT unit_id, 'flatline', 'n_in', ts, prev_ts, seq, gap_seg, n_in, ratio_cmd, 'rpm'
    FROM base WHERE same_n_in AND (run_pair OR (near_pair AND n_in <> 0))
    UNION ALL
    SELECT unit_id, 'flatline', 'n_out', ts, prev_ts, seq, gap_seg, n_out, ratio_cmd, 'rpm'
    FROM base WHERE same_n_out AND (run_pair OR (near_pair AND n_out <> 0))
    UNION ALL
    SELECT unit_id, 'flatline', 'i_in', ts, prev_ts, seq, gap_seg, i_in, ratio_cmd, 'A'
    FROM base WHERE run_pair AND same_i_in
    UNION ALL
    SELECT unit_id, 'flatline', 'v_in', ts, prev_ts, seq, gap_seg, v_in, ratio_cmd, 'V'
    FROM base WHERE run_pair AND same_v_in
    UNION ALL
    SELECT unit_id, 'flatline', 'temp', ts, prev_ts, seq, gap_seg, temp, ratio_cmd, 'degC'
    FROM base WHERE run_pair AND same_temp
),
-- islands: hits on adjacent samples (consecutive seq) with no pause longer than
-- gap_min_s between them (same gap_seg) form one run
islands AS (
    SELECT *,
           seq - row_number() OVER (PARTITION BY unit_id, kind, signal, gap_seg ORDER BY seq)
               AS isl,
           (ts AT TIME ZONE 'UTC')::DATE AS piece_day
    FROM hits
),
-- each run's pieces (one per UTC day it touches) first, then the run totals from the
-- pieces: far fewer rows to join than hit samples
piece_stats AS (
    SELECT unit_id, kind, signal, gap_seg, isl, piece_day,
           min(t0) AS piece_t0,
           max(ts) AS end_ts,
           count(*) AS n,
           max(value) AS vmax,
           arg_max(ratio_cmd, value) AS ratio_at_peak,
           arg_min(ratio_cmd, ts) AS ratio_first,
           any_value(value) AS value,
           any_value(unit) AS unit
    FROM islands
    GROUP BY unit_id, kind, signal, gap_seg, isl, piece_day
),
run_stats AS (
    SELECT unit_id, kind, signal, gap_seg, isl,
           min(piece_t0) AS run_t0, max(end_ts) AS run_t1, sum(n) AS run_n
    FROM piece_stats
    GROUP BY unit_id, kind, signal, gap_seg, isl
),
pieces AS (
    SELECT p.unit_id, p.kind, p.signal,
           greatest(p.piece_t0, p.piece_day::TIMESTAMP AT TIME ZONE 'UTC') AS start_ts,
           p.end_ts,
           p.n + CASE WHEN p.kind = 'flatline' AND p.piece_t0 >= p.piece_day::TIMESTAMP
                                AT TIME ZONE 'UTC' THEN 1
                      WHEN p.kind = 'clock_jump' AND p.piece_t0 >= p.piece_day::TIMESTAMP
                                AT TIME ZONE 'UTC' THEN 4
                      ELSE 0 END AS samples,
           p.vmax, p.ratio_at_peak, p.ratio_first, p.value, p.unit, r.run_t0, r.run_t1
    FROM piece_stats AS p
    JOIN run_stats AS r USING (unit_id, kind, signal, gap_seg, isl)
    WHERE CASE p.kind
              WHEN 'gross_slip' THEN r.run_n >= $gross_slip_min_samples
              WHEN 'stall' THEN epoch(r.run_t1) - epoch(r.run_t0) >= $stall_min_s
              WHEN 'flatline' THEN epoch(r.run_t1) - epoch(r.run_t0) >= $flatline_min_s
              WHEN 'clock_jump' THEN r.run_n >= 3
          END
),
described AS (
    SELECT *,
           epoch(end_ts) - epoch(start_ts) AS span_s,
           CASE WHEN run_t0 < start_ts THEN ' (continues from the day before)' ELSE '' END
           || CASE WHEN run_t1 > end_ts THEN ' (continues next day)' ELSE '' END AS cont
    FROM pieces
),
idle_logging AS (
    SELECT unit_id,
           count(*) FILTER (WHERE n_in < $stall_n_in_max_rpm) * $sample_period_s
               >= 4 * $gap_min_s AS logs_idle
    FROM base
    GROUP BY unit_id
),
pauses AS (
    SELECT b.*
    FROM base AS b
    JOIN idle_logging AS l USING (unit_id)
    WHERE b.dt_prev_s > $gap_min_s
      AND (b.prev_n_in >= $stall_n_in_max_rpm OR l.logs_idle)
),
ev AS (
    SELECT unit_id, kind, start_ts, end_ts, samples, vmax AS peak, ratio_at_peak AS ratio_cmd,
           signal,
           printf('gross slip for %s, peak %.0f %% at ratio %.2f',
                  CASE WHEN span_s + $sample_period_s < 5400
                       THEN printf('%.0f min', (span_s + $sample_period_s) / 60.0)
                       ELSE printf('%.1f h', (span_s + $sample_period_s) / 3600.0) END,
                  100.0 * vmax, ratio_at_peak) || cont AS description
    FROM described AS g
    WHERE kind = 'gross_slip'
      AND NOT EXISTS (
          SELECT 1 FROM described AS f
          WHERE f.kind = 'flatline' AND f.unit_id = g.unit_id AND f.signal IN ('n_in', 'n_out')
            AND f.start_ts <= g.end_ts AND f.end_ts >= g.start_ts)
    UNION ALL
    SELECT unit_id, kind, start_ts, end_ts, samples, vmax, ratio_first, signal,
           printf('stall: %.1f A with the input standing still for %s, at ratio %.2f',
                  vmax,
                  CASE WHEN samples = 1 THEN '1 sample'
                       ELSE printf('%d samples (%.0f s)', samples, span_s) END,
                  ratio_first) || cont
    FROM described WHERE kind = 'stall'
    UNION ALL
    SELECT unit_id, kind, start_ts, end_ts, samples, span_s, NULL, signal,
           printf('%s stuck at %s %s for %s', signal, value::VARCHAR, unit,
                  CASE WHEN span_s < 5400 THEN printf('%.0f min', span_s / 60.0)
                       ELSE printf('%.1f h', span_s / 3600.0) END) || cont
    FROM described WHERE kind = 'flatline'
    UNION ALL
    SELECT unit_id, kind, start_ts, end_ts, samples,
           -- samples beyond what the span allows, times the period: the time logged twice
           (samples - 1) * $sample_period_s - span_s, ratio_first, signal,
           printf('%d samples crowd %.0f min, about twice the logging rate: the clock '
                  'stepped back about %.0f min', samples, span_s / 60.0,
                  ((samples - 1) * $sample_period_s - span_s) / 60.0) || cont
    FROM described WHERE kind = 'clock_jump'
    UNION ALL
    SELECT unit_id, 'ratio_change_stopped', prev_ts, ts, 2, abs(ratio_cmd - prev_ratio_cmd),
           ratio_cmd, 'ratio_cmd',
           printf('ratio commanded from %.2f to %.2f while the drive stood still', prev_ratio_cmd,
                  ratio_cmd)
           || CASE WHEN prev_n_in >= $stall_n_in_max_rpm
                   THEN printf(' (it was turning %.0f min earlier)', dt_prev_s / 60.0)
                   ELSE '' END
    FROM base
    WHERE ratio_cmd <> prev_ratio_cmd AND n_in < $stall_n_in_max_rpm
      AND dt_prev_s <= $gap_min_s
    UNION ALL
    SELECT unit_id, 'data_gap', prev_ts, ts, 0, dt_prev_s, prev_ratio_cmd, 'ts',
           printf('no data for %s; the drive was %s before and %s after',
                  CASE WHEN dt_prev_s < 5400 THEN printf('%.0f min', dt_prev_s / 60.0)
                       WHEN dt_prev_s < 172800 THEN printf('%.1f h', dt_prev_s / 3600.0)
                       ELSE printf('%.1f d', dt_prev_s / 86400.0) END,
                  CASE WHEN prev_n_in > $steady_n_in_min_rpm THEN 'running'
                       WHEN prev_n_in < $stall_n_in_max_rpm THEN 'standing still'
                       ELSE 'turning slowly' END,
                  CASE WHEN n_in > $steady_n_in_min_rpm THEN 'running'
                       WHEN n_in < $stall_n_in_max_rpm THEN 'standing still'
                       ELSE 'turning slowly' END)
    FROM pauses
)
SELECT unit_id, kind, start_ts, end_ts, (start_ts AT TIME ZONE 'UTC')::DATE AS day,
       samples::BIGINT AS samples, peak::DOUBLE AS peak, ratio_cmd::DOUBLE AS ratio_cmd,
       signal, description
FROM ev
WHERE end_ts >= $from_ts AND end_ts < $to_ts
