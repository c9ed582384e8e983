-- name: motor_sums
-- Sufficient statistics of the DC motor fit v_in = R*i_in + k_e*omega_in (domain.md 1.4:
-- V = E + I*R, E = k_e*omega) per unit and UTC day, over steady samples in the range.
-- Least squares needs only these sums (normal equations of the two-column fit without
-- intercept), so the fit is exact over every steady sample without pulling samples into
-- Python; fleetwatch/fits.py adds the days of each ISO week (the sums are additive, so an
-- incremental run adds a new day's sums to those of the week's earlier days instead of
-- redoing the week) and solves them (same result as physics.fit_motor_constants).
-- Steady samples only: at constant speed the inductive drop L*di/dt is absent.
-- Winding resistance rises with temperature, R_T = R_20*(1 + alpha*(T - 20)) (domain.md 1.4,
-- alpha for annealed copper from memory). Where temp is logged it is taken as the winding
-- temperature and the current column becomes i_in*(1 + alpha*(temp - 20)), so the fitted R
-- is referred to 20 degC and a warm week does not look like a resistance drift; without
-- temp, R is the resistance at operating temperature.
-- reads: samples
-- param: alpha_per_k  1/K  runtime: temperature coefficient of copper (physics.ALPHA_COPPER_PER_K).
-- column: unit_id  -  Drive.
-- column: week_start  UTC-date  Monday of the ISO week.
-- column: day  UTC-date  UTC day.
-- column: n  -  Steady samples with v_in, i_in and n_in logged.
-- column: n_temp  -  Of those, samples with temp logged (R referred to 20 degC).
-- column: s_ii  A^2  Sum of ic^2, ic = i_in*(1 + alpha*(temp - 20)) (i_in without temp).
-- column: s_iw  A*rad/s  Sum of ic*omega_in.
-- column: s_ww  (rad/s)^2  Sum of omega_in^2.
-- column: s_vi  V*A  Sum of v_in*ic.
-- column: s_vw  V*rad/s  Sum of v_in*omega_in.
-- column: s_vv  V^2  Sum of v_in^2.
WITH x AS (
    SELECT unit_id, day, v_in, omega_in, temp,
           i_in * coalesce(1.0 + $alpha_per_k * (temp - 20.0), 1.0) AS ic
    FROM samples
    WHERE in_range AND steady
      AND isfinite(v_in) AND isfinite(i_in) AND isfinite(omega_in)
)
SELECT unit_id,
       date_trunc('week', day)::DATE AS week_start,
       day,
       count(*) AS n,
       count(temp) AS n_temp,
       sum(ic * ic) AS s_ii,
       sum(ic * omega_in) AS s_iw,
       sum(omega_in * omega_in) AS s_ww,
       sum(v_in * ic) AS s_vi,
       sum(v_in * omega_in) AS s_vw,
       sum(v_in * v_in) AS s_vv
FROM x
GROUP BY unit_id, day
