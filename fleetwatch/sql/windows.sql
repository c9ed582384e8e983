-- name: windows
-- Per unit and window of window_min minutes: how much data came (completeness), the
-- steady-state slip and its spread, the load, ratios, speeds, current, power and energy.
-- Only steady samples (see samples.sql) enter the slip, load, ratio, speed, current and
-- power means: transients and low speed make n_out*i/n_in meaningless (domain.md 2.7).
-- Load (design.md 5): output torque t_out where the window has it ('measured'), else the
-- estimated motor shaft torque k_e*(i_in - i0) ('motor_model', domain.md 1.4
-- T_shaft = k_t*(I - I_0), k_t = k_e in SI) with k_e of the unit's latest usable weekly
-- motor fit of an EARLIER ISO week (a unit's first weeks: the week's own fit), view
-- motor_constants, registered by analyze from fleetwatch/fits.py. k_e drifts slowly (a few
-- per cent over months at most, domain.md 1.4), so last week's value serves as well as this
-- week's, and a window's load does not change when later data of its week arrives: an
-- incremental run recomputes only the new days. The mean of k_e*(i_in - i0) over the
-- window equals k_e*(mean(i_in) - i0) because k_e is constant within a week.
-- Energy: sum(p_in) * sample_period_s over all samples (nominal period, design.md 5).
-- completeness = samples / (window_min*60/sample_period_s); above 1 means more samples than
-- the logging period allows (overlapping time after a clock step back).
-- reads: samples, motor_constants
-- param: window_min  min  Length of a window.
-- param: sample_period_s  s  Expected logging period.
-- column: unit_id  -  Drive.
-- column: window_start  UTC  Window start (multiple of window_min since 1970-01-01 UTC).
-- column: day  UTC-date  UTC date of window_start.
-- column: samples  -  Samples received.
-- column: steady_samples  -  Steady samples.
-- column: slip_mean  -  Mean steady slip.
-- column: slip_p95  -  95th percentile of steady slip (linear interpolation).
-- column: load_mean  N*m  Mean steady load (t_out, else k_e*(i_in - i0)).
-- column: load_source  -  measured or motor_model.
-- column: ratio_cmd_mean  -  Mean steady commanded ratio.
-- column: ratio_act_mean  -  Mean steady actual ratio n_in/n_out.
-- column: ratio_error  -  Mean steady (ratio_act - ratio_cmd)/ratio_cmd.
-- column: n_in_mean  rpm  Mean steady input speed.
-- column: n_out_mean  rpm  Mean steady output speed.
-- column: i_in_mean  A  Mean steady motor current.
-- column: p_in_mean  W  Mean steady input power.
-- column: energy_in_wh  Wh  sum(p_in)*sample_period_s/3600 over all samples.
-- column: energy_out_wh  Wh  sum(t_out*omega_out)*sample_period_s/3600 (null without t_out).
-- column: temp_mean  degC  Mean temperature over all samples.
-- column: completeness  -  samples / (window_min*60/sample_period_s).
WITH binned AS (
    SELECT *,
           to_timestamp(floor(epoch(ts) / ($window_min * 60.0)) * ($window_min * 60.0))
               AS window_start
    FROM samples
    WHERE in_range
),
agg AS (
    SELECT unit_id,
           window_start,
           count(*) AS samples,
           count(*) FILTER (WHERE steady) AS steady_samples,
           avg(slip) FILTER (WHERE steady) AS slip_mean,
           quantile_cont(slip, 0.95) FILTER (WHERE steady) AS slip_p95,
           avg(t_out) FILTER (WHERE steady) AS t_out_mean,
           count(t_out) AS t_out_logged,
           avg(ratio_cmd) FILTER (WHERE steady) AS ratio_cmd_mean,
           avg(ratio_act) FILTER (WHERE steady) AS ratio_act_mean,
           avg((ratio_act - ratio_cmd) / ratio_cmd) FILTER (WHERE steady) AS ratio_error,
           avg(n_in) FILTER (WHERE steady) AS n_in_mean,
           avg(n_out) FILTER (WHERE steady) AS n_out_mean,
           avg(i_in) FILTER (WHERE steady) AS i_in_mean,
           avg(p_in) FILTER (WHERE steady) AS p_in_mean,
           sum(p_in) * $sample_period_s / 3600.0 AS energy_in_wh,
           sum(p_out_w) * $sample_period_s / 3600.0 AS energy_out_wh,
           avg(temp) AS temp_mean
    FROM binned
    GROUP BY unit_id, window_start
)
SELECT a.unit_id,
       a.window_start,
       (a.window_start AT TIME ZONE 'UTC')::DATE AS day,
       a.samples,
       a.steady_samples,
       a.slip_mean,
       a.slip_p95,
       CASE WHEN a.t_out_logged > 0 THEN a.t_out_mean
            ELSE mc.k_e * (a.i_in_mean - mc.i0_a) END AS load_mean,
       CASE WHEN a.t_out_logged > 0 THEN 'measured' ELSE 'motor_model' END AS load_source,
       a.ratio_cmd_mean,
       a.ratio_act_mean,
       a.ratio_error,
       a.n_in_mean,
       a.n_out_mean,
       a.i_in_mean,
       a.p_in_mean,
       a.energy_in_wh,
       a.energy_out_wh,
       a.temp_mean,
       a.samples / ($window_min * 60.0 / $sample_period_s) AS completeness
FROM agg AS a
LEFT JOIN motor_constants AS mc
       ON mc.unit_id = a.unit_id
      AND mc.week_start = date_trunc('week', (a.window_start AT TIME ZONE 'UTC')::DATE)::DATE
