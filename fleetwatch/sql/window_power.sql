-- name: window_power
-- Efficiency inputs per unit and window, from steady samples where output torque is logged:
-- mean output power t_out*omega_out, mean electrical input power p_in, and mean estimated
-- motor shaft power k_e*(i_in - i0)*omega_in (domain.md 1.4: P_shaft = T_shaft*omega with
-- T_shaft = k_t*(I - I_0)), k_e and i0 from motor_constants (the unit's latest usable
-- weekly fit of an earlier ISO week, see windows.sql). efficiency.sql divides them: overall efficiency P_out/P_in and
-- variator-only efficiency P_out/P_shaft (domain.md 1.2). Ratios of window means rather
-- than means of per-sample ratios, so a sample with a small denominator cannot dominate.
-- Units without t_out give no rows: their drive efficiency cannot be measured
-- (domain.md 1.2).
-- reads: samples, motor_constants
-- param: window_min  min  Length of a window.
-- column: unit_id  -  Drive.
-- column: window_start  UTC  Window start.
-- column: n_measured  -  Steady samples with t_out and p_in logged.
-- column: p_out_mean_w  W  Mean t_out*omega_out.
-- column: p_in_meas_mean_w  W  Mean p_in over the same samples.
-- column: p_shaft_mean_w  W  Mean k_e*(i_in - i0)*omega_in over the same samples (null without i_in or a motor fit).
SELECT s.unit_id,
       to_timestamp(floor(epoch(s.ts) / ($window_min * 60.0)) * ($window_min * 60.0))
           AS window_start,
       count(*) AS n_measured,
       avg(s.p_out_w) AS p_out_mean_w,
       avg(s.p_in) AS p_in_meas_mean_w,
       avg(mc.k_e * (s.i_in - mc.i0_a) * s.omega_in) AS p_shaft_mean_w
FROM samples AS s
LEFT JOIN motor_constants AS mc
       ON mc.unit_id = s.unit_id AND mc.week_start = date_trunc('week', s.day)::DATE
WHERE s.in_range AND s.steady AND s.t_out IS NOT NULL AND s.p_in IS NOT NULL
GROUP BY ALL
