-- name: day_stats
-- Per unit and UTC day, the sample-level statistics of unit_days: data received against
-- expected (domain.md 4, completeness), steady slip mean and 95th percentile, ratio tracking
-- error, temperature, input energy and measured efficiency. Percentiles need the samples,
-- so this runs with samples.sql; unit_days.sql joins it with the events and the fits.
-- Measured efficiency = sum(t_out*omega_out) / sum(p_in) over the day's steady samples with
-- t_out logged (domain.md 1.2, eta = P_out/P_in; ratio of sums so light-load samples with a
-- small p_in do not dominate).
-- reads: samples
-- param: sample_period_s  s  Expected logging period.
-- column: unit_id  -  Drive.
-- column: day  UTC-date  Day.
-- column: samples  -  Samples received.
-- column: steady_samples  -  Steady samples.
-- column: completeness  -  samples / (86400/sample_period_s).
-- column: slip_mean  -  Mean steady slip.
-- column: slip_p95  -  95th percentile of steady slip.
-- column: ratio_error  -  Mean steady (ratio_act - ratio_cmd)/ratio_cmd.
-- column: efficiency  -  sum(t_out*omega_out)/sum(p_in) over steady samples with t_out.
-- column: temp_mean  degC  Mean temperature.
-- column: energy_in_wh  Wh  sum(p_in)*sample_period_s/3600.
SELECT unit_id,
       day,
       count(*) AS samples,
       count(*) FILTER (WHERE steady) AS steady_samples,
       count(*) / (86400.0 / $sample_period_s) AS completeness,
       avg(slip) FILTER (WHERE steady) AS slip_mean,
       quantile_cont(slip, 0.95) FILTER (WHERE steady) AS slip_p95,
       avg((ratio_act - ratio_cmd) / ratio_cmd) FILTER (WHERE steady) AS ratio_error,
       sum(p_out_w) FILTER (WHERE steady AND p_in IS NOT NULL)
           / nullif(sum(p_in) FILTER (WHERE steady AND p_out_w IS NOT NULL), 0) AS efficiency,
       avg(temp) AS temp_mean,
       sum(p_in) * $sample_period_s / 3600.0 AS energy_in_wh
FROM samples
WHERE in_range
GROUP BY unit_id, day
