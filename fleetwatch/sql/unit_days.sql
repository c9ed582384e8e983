-- name: unit_days
-- One row per unit and UTC day: the features the health models read (design.md 5).
-- Sample statistics come from day_stats; event counts from events (by the day the event
-- started); the creep features from creep_daily, the day's robust fit
-- slip = creep_a + creep_b*load over its steady windows after removing each ratio bin's
-- reference offset (fleetwatch/fits.py; Theil-Sen, domain.md 3.6; ratio-bin normalisation
-- because spin makes baseline slip depend on ratio, domain.md 2.4), with
-- slip_at_load = creep_a + creep_b*load_ref_nm; power_resid_pct is the mean of the day's
-- window residuals of input power against the unit's normal-behaviour model (efficiency,
-- domain.md 3.5).
-- reads: day_stats, events, creep_daily, efficiency
-- column: unit_id  -  Drive.
-- column: day  UTC-date  Day.
-- column: samples  -  Samples received.
-- column: steady_samples  -  Steady samples.
-- column: completeness  -  Samples received / expected.
-- column: slip_mean  -  Mean steady slip.
-- column: slip_p95  -  95th percentile of steady slip.
-- column: slip_at_load  -  creep_a + creep_b*load_ref_nm.
-- column: creep_a  -  Load-independent slip offset of the day's fit.
-- column: creep_b  1/(N*m)  Compliance: slip per unit input-side load.
-- column: ratio_error  -  Mean ratio tracking error.
-- column: power_resid_pct  %  Mean input-power residual of the day's steady windows.
-- column: efficiency  -  Measured efficiency (instrumented units).
-- column: temp_mean  degC  Mean temperature.
-- column: energy_in_wh  Wh  Input energy.
-- column: gross_slip_events  -  Gross-slip events started that day.
-- column: stall_events  -  Stalls started that day.
-- column: ratio_change_stopped_events  -  Ratio changes commanded while stopped.
-- column: flatline_events  -  Sensor flatlines started that day.
-- column: gap_events  -  Data gaps started that day.
-- column: clock_jump_events  -  Clock jumps that day.
WITH ev AS (
    SELECT unit_id, day,
           count(*) FILTER (WHERE kind = 'gross_slip') AS gross_slip_events,
           count(*) FILTER (WHERE kind = 'stall') AS stall_events,
           count(*) FILTER (WHERE kind = 'ratio_change_stopped') AS ratio_change_stopped_events,
           count(*) FILTER (WHERE kind = 'flatline') AS flatline_events,
           count(*) FILTER (WHERE kind = 'data_gap') AS gap_events,
           count(*) FILTER (WHERE kind = 'clock_jump') AS clock_jump_events
    FROM events
    GROUP BY unit_id, day
),
eff AS (
    SELECT unit_id, day, avg(power_resid_pct) AS power_resid_pct
    FROM efficiency
    GROUP BY unit_id, day
)
SELECT d.unit_id,
       d.day,
       d.samples,
       d.steady_samples,
       d.completeness,
       d.slip_mean,
       d.slip_p95,
       c.slip_at_load,
       c.creep_a,
       c.creep_b,
       d.ratio_error,
       f.power_resid_pct,
       d.efficiency,
       d.temp_mean,
       d.energy_in_wh,
       coalesce(e.gross_slip_events, 0) AS gross_slip_events,
       coalesce(e.stall_events, 0) AS stall_events,
       coalesce(e.ratio_change_stopped_events, 0) AS ratio_change_stopped_events,
       coalesce(e.flatline_events, 0) AS flatline_events,
       coalesce(e.gap_events, 0) AS gap_events,
       coalesce(e.clock_jump_events, 0) AS clock_jump_events
FROM day_stats AS d
LEFT JOIN ev AS e USING (unit_id, day)
LEFT JOIN eff AS f USING (unit_id, day)
LEFT JOIN creep_daily AS c USING (unit_id, day)
