-- name: efficiency
-- Per unit and steady window: measured efficiency where output torque is logged, and for
-- every unit the residual of input power against the unit's own normal-behaviour model.
-- Measured (domain.md 1.2): efficiency = P_out/P_in = mean(t_out*omega_out)/mean(p_in);
-- variator_efficiency = P_out / estimated motor shaft power k_e*(i_in - i0)*omega_in
-- (domain.md 1.4), inputs from window_power.
-- Residual (normal-behaviour modelling, domain.md 3.5): p_in_pred is a linear model
-- p = c0 + c1*P_kin + c2*L^2 + c3*w_kin + c4*L fitted by least squares on the unit's
-- reference windows (first reference_days of data, or after its last wear reset), where
-- L is the input-side load (load_mean, or t_out/ratio for measured load),
-- w_kin = n_out*ratio_cmd*pi/30 the input speed the output speed asks for at zero slip, and
-- P_kin = L*w_kin the mechanical input power. c1 is about 1/efficiency, c2 the copper loss
-- (I^2*R with I ~ L/k), c3 speed-dependent losses. Extra slip (n_in rises for the same
-- output), more friction, or a motor losing efficiency raise the residual. Without t_out
-- the load comes from motor current, so a change of the driven machine's load cannot be
-- told from a change of drive losses; the residual is a load proxy there (domain.md 1.2).
-- Coefficients come from view power_models (fleetwatch/fits.py).
-- method: 'measured' for windows with t_out, else 'residual_only'.
-- reads: windows, window_power, power_models
-- column: unit_id  -  Drive.
-- column: window_start  UTC  Window start.
-- column: day  UTC-date  Day.
-- column: method  -  measured or residual_only.
-- column: efficiency  -  P_out/P_in (measured only).
-- column: variator_efficiency  -  P_out/P_shaft (measured only).
-- column: p_in_pred  W  Input power predicted by the unit's reference model.
-- column: power_resid_pct  %  100*(p_in_mean - p_in_pred)/p_in_pred.
WITH w AS (
    SELECT w.*,
           CASE WHEN w.load_source = 'measured' THEN w.load_mean / w.ratio_cmd_mean
                ELSE w.load_mean END AS load_in,
           w.n_out_mean * w.ratio_cmd_mean * pi() / 30.0 AS w_kin
    FROM windows AS w
    WHERE w.steady_samples > 0
),
pred AS (
    SELECT w.unit_id, w.window_start, w.day, w.p_in_mean,
           m.c0 + m.c1 * w.load_in * w.w_kin + m.c2 * w.load_in * w.load_in
               + m.c3 * w.w_kin + m.c4 * w.load_in AS p_in_pred
    FROM w
    LEFT JOIN power_models AS m
           ON m.unit_id = w.unit_id
          AND w.window_start >= m.valid_from AND w.window_start < m.valid_to
)
SELECT p.unit_id,
       p.window_start,
       p.day,
       CASE WHEN wp.n_measured > 0 THEN 'measured' ELSE 'residual_only' END AS method,
       wp.p_out_mean_w / nullif(wp.p_in_meas_mean_w, 0) AS efficiency,
       wp.p_out_mean_w / nullif(wp.p_shaft_mean_w, 0) AS variator_efficiency,
       p.p_in_pred,
       CASE WHEN p.p_in_pred > 0
            THEN 100.0 * (p.p_in_mean - p.p_in_pred) / p.p_in_pred END AS power_resid_pct
FROM pred AS p
LEFT JOIN window_power AS wp USING (unit_id, window_start)
