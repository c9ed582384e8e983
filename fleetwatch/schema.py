"""Table contracts: every lake table, its columns, types, units and meaning.

This registry is the single source of the README's table reference (a test fails when a
table or column here is missing from the README) and the contract between stages: ingest
writes the base tables, analyze and the models write the derived ones, the report, the
dashboard and the SQL console read them.

Types are DuckDB/Arrow type names: VARCHAR, DOUBLE, BIGINT, BOOLEAN, DATE, TIMESTAMPTZ
(UTC instant). Units follow design.md section 3 ('-' = dimensionless).
"""
from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Column", "Table", "TABLES", "TELEMETRY_COLUMNS", "BASE_TABLES", "DERIVED_TABLES",
           "ADVISOR_TABLES", "table", "STATUS_LEVELS"]


@dataclass(frozen=True)
class Column:
    name: str
    type: str
    unit: str
    help: str
    required: bool = True


@dataclass(frozen=True)
class Table:
    name: str
    help: str
    columns: tuple[Column, ...]
    key: tuple[str, ...] = ()
    partition_by: tuple[str, ...] = ()
    written_by: str = ""

    @property
    def column_names(self) -> list[str]:
        return [c.name for c in self.columns]


def _c(name, type_, unit, help_, required=True):
    return Column(name, type_, unit, help_, required)


STATUS_LEVELS = ("normal", "watch", "alert")

TELEMETRY_COLUMNS = (
    _c("unit_id", "VARCHAR", "-", "One installed drive."),
    _c("ts", "TIMESTAMPTZ", "UTC", "Sample time (UTC)."),
    _c("v_in", "DOUBLE", "V", "Motor terminal voltage (null when only p_in is logged).", False),
    _c("i_in", "DOUBLE", "A", "Motor current (null when only p_in is logged).", False),
    _c("p_in", "DOUBLE", "W", "Input electrical power; v_in * i_in when not logged."),
    _c("n_in", "DOUBLE", "rpm", "Input shaft speed."),
    _c("n_out", "DOUBLE", "rpm", "Output shaft speed."),
    _c("ratio_cmd", "DOUBLE", "-", "Commanded transmission ratio i = n_in / n_out."),
    _c("t_out", "DOUBLE", "N*m", "Output torque (only on instrumented units).", False),
    _c("temp", "DOUBLE", "degC", "Temperature.", False),
    _c("batch_id", "VARCHAR", "-", "Ingest batch that brought the row."),
    _c("day", "DATE", "UTC date", "Partition column: UTC date of ts."),
)

BASE_TABLES = (
    Table("telemetry", "Accepted drive samples in canonical units, one row per unit and time.",
          TELEMETRY_COLUMNS, key=("unit_id", "ts"), partition_by=("day",), written_by="ingest"),
    Table("quarantine", "Rejected rows with their raw values and the reason, nothing is lost.", (
        _c("batch_id", "VARCHAR", "-", "Ingest batch."),
        _c("source_file", "VARCHAR", "path", "File the row came from."),
        _c("line", "BIGINT", "-", "Line number in the source file (1 = header for CSV; "
           "row number for Parquet/NDJSON)."),
        _c("column", "VARCHAR", "-", "Source column at fault (null when the whole row is).",
           False),
        _c("rule", "VARCHAR", "-", "Validation rule that rejected the row (e.g. not_numeric, "
           "out_of_range, bad_timestamp, nonexistent_local_time, ambiguous_local_time, "
           "missing_value, empty_unit_id, conflicting_duplicate)."),
        _c("message", "VARCHAR", "-", "Plain-language reason."),
        _c("raw", "VARCHAR", "-", "The raw row as JSON text (source column -> text)."),
        _c("kind", "VARCHAR", "-", "telemetry or maintenance."),
        _c("ingested_at", "TIMESTAMPTZ", "UTC", "When the batch ran."),
    ), written_by="ingest"),
    Table("maintenance", "Maintenance log: what was done to which unit and whether it resets "
          "wear tracking.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("ts", "TIMESTAMPTZ", "UTC", "When the work was done."),
        _c("action", "VARCHAR", "-", "What was done (e.g. roller replaced, inspection)."),
        _c("note", "VARCHAR", "-", "Free text.", False),
        _c("resets_wear", "BOOLEAN", "-", "True when the action restores the contact (wear "
           "trends restart after it)."),
        _c("batch_id", "VARCHAR", "-", "Ingest batch."),
    ), key=("unit_id", "ts", "action"), written_by="ingest"),
    Table("batches", "One ledger row per ingested file and batch: rows_read = accepted + "
          "quarantined + duplicates.", (
        _c("batch_id", "VARCHAR", "-", "Ingest batch."),
        _c("kind", "VARCHAR", "-", "telemetry or maintenance."),
        _c("source_file", "VARCHAR", "path", "File ingested."),
        _c("content_sha256", "VARCHAR", "-", "Hash of the file's bytes (re-ingest is a no-op)."),
        _c("rows_read", "BIGINT", "rows", "Data rows read from the file."),
        _c("accepted", "BIGINT", "rows", "Rows written to the target table."),
        _c("quarantined", "BIGINT", "rows", "Rows written to quarantine."),
        _c("duplicates", "BIGINT", "rows", "Exact duplicates (in the batch or already in the "
           "lake), not written again."),
        _c("status", "VARCHAR", "-", "ok, refused (file error) or skipped (already ingested)."),
        _c("message", "VARCHAR", "-", "Error or note.", False),
        _c("started_at", "TIMESTAMPTZ", "UTC", "Batch start."),
        _c("finished_at", "TIMESTAMPTZ", "UTC", "Batch end."),
    ), written_by="ingest"),
)

DERIVED_TABLES = (
    Table("windows", "Per unit and window (window_min): steady-state slip, load, energy and "
          "data completeness.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("window_start", "TIMESTAMPTZ", "UTC", "Window start."),
        _c("day", "DATE", "UTC date", "UTC date of window_start."),
        _c("samples", "BIGINT", "-", "Samples received."),
        _c("steady_samples", "BIGINT", "-", "Samples with n_in above steady_n_in_min_rpm and "
           "ratio_cmd unchanged for steady_settle_s."),
        _c("slip_mean", "DOUBLE", "-", "Mean slip s = 1 - ratio_cmd*n_out/n_in over steady "
           "samples."),
        _c("slip_p95", "DOUBLE", "-", "95th percentile of steady slip."),
        _c("load_mean", "DOUBLE", "N*m", "Mean load over steady samples: t_out where logged, "
           "else estimated motor shaft torque k_e*(i_in - i0)."),
        _c("load_source", "VARCHAR", "-", "measured (t_out) or motor_model."),
        _c("ratio_cmd_mean", "DOUBLE", "-", "Mean commanded ratio over steady samples."),
        _c("ratio_act_mean", "DOUBLE", "-", "Mean actual ratio n_in/n_out over steady samples."),
        _c("ratio_error", "DOUBLE", "-", "Mean ratio tracking error (ratio_act - ratio_cmd)/"
           "ratio_cmd over steady samples."),
        _c("n_in_mean", "DOUBLE", "rpm", "Mean input speed over steady samples."),
        _c("n_out_mean", "DOUBLE", "rpm", "Mean output speed over steady samples."),
        _c("i_in_mean", "DOUBLE", "A", "Mean motor current over steady samples."),
        _c("p_in_mean", "DOUBLE", "W", "Mean input power over steady samples."),
        _c("energy_in_wh", "DOUBLE", "Wh", "Input energy over all samples (p_in * period)."),
        _c("energy_out_wh", "DOUBLE", "Wh", "Output energy t_out*omega_out (only where t_out "
           "is logged).", False),
        _c("temp_mean", "DOUBLE", "degC", "Mean temperature.", False),
        _c("completeness", "DOUBLE", "-", "Samples received / samples expected."),
    ), key=("unit_id", "window_start"),
       written_by="analyze (sql/windows.sql)"),
    Table("events", "Discrete events per unit: gross slip, stall, ratio change while stopped, "
          "sensor flatline, data gap, clock jump.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("kind", "VARCHAR", "-", "gross_slip, stall, ratio_change_stopped, flatline, "
           "data_gap, clock_jump."),
        _c("start_ts", "TIMESTAMPTZ", "UTC", "Event start."),
        _c("end_ts", "TIMESTAMPTZ", "UTC", "Event end."),
        _c("day", "DATE", "UTC date", "UTC date of start_ts."),
        _c("samples", "BIGINT", "-", "Samples in the event."),
        _c("peak", "DOUBLE", "kind-specific", "Severity: peak slip (-), peak current (A), "
           "flatline/gap duration (s), clock step (s)."),
        _c("ratio_cmd", "DOUBLE", "-", "Commanded ratio at the event.", False),
        _c("signal", "VARCHAR", "-", "Signal involved (flatline: which column).", False),
        _c("description", "VARCHAR", "-", "Short plain-language description."),
    ), key=("unit_id", "kind", "start_ts"), written_by="analyze (sql/events.sql)"),
    Table("unit_days", "One row per unit and UTC day: the features the health models use.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("day", "DATE", "UTC date", "Day."),
        _c("samples", "BIGINT", "-", "Samples received."),
        _c("steady_samples", "BIGINT", "-", "Steady samples."),
        _c("completeness", "DOUBLE", "-", "Samples received / expected over the day."),
        _c("slip_mean", "DOUBLE", "-", "Mean steady slip."),
        _c("slip_p95", "DOUBLE", "-", "95th percentile of steady slip."),
        _c("slip_at_load", "DOUBLE", "-", "Steady slip at load_ref_nm from the day's robust "
           "creep fit a + b*load_ref (the main wear indicator)."),
        _c("creep_a", "DOUBLE", "-", "Load-independent slip offset of the day's fit."),
        _c("creep_b", "DOUBLE", "1/(N*m)", "Compliance: slip per unit load."),
        _c("ratio_error", "DOUBLE", "-", "Mean ratio tracking error."),
        _c("power_resid_pct", "DOUBLE", "%", "Mean input-power residual against the unit's "
           "reference model (100*(p_in - p_pred)/p_pred).", False),
        _c("efficiency", "DOUBLE", "-", "Measured efficiency t_out*omega_out/p_in (only "
           "instrumented units).", False),
        _c("temp_mean", "DOUBLE", "degC", "Mean temperature.", False),
        _c("energy_in_wh", "DOUBLE", "Wh", "Input energy."),
        _c("gross_slip_events", "BIGINT", "-", "Gross-slip events started that day."),
        _c("stall_events", "BIGINT", "-", "Stalls started that day."),
        _c("ratio_change_stopped_events", "BIGINT", "-", "Ratio changes commanded while "
           "stopped."),
        _c("flatline_events", "BIGINT", "-", "Sensor flatlines started that day."),
        _c("gap_events", "BIGINT", "-", "Data gaps started that day."),
        _c("clock_jump_events", "BIGINT", "-", "Clock jumps that day."),
    ), key=("unit_id", "day"), written_by="analyze (sql/unit_days.sql + fits)"),
    Table("motor_fits", "Motor constants per unit and ISO week from v_in = R*i_in + "
          "k_e*omega_in.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("week_start", "DATE", "UTC date", "Monday of the ISO week."),
        _c("r_ohm", "DOUBLE", "ohm", "Armature resistance."),
        _c("k_e", "DOUBLE", "V*s/rad", "Back-EMF constant (= torque constant in N*m/A)."),
        _c("resid_std_v", "DOUBLE", "V", "Residual spread of the fit."),
        _c("n", "BIGINT", "-", "Steady samples behind the fit."),
        _c("r_drift_pct", "DOUBLE", "%", "Change of R against the unit's reference weeks."),
        _c("k_e_drift_pct", "DOUBLE", "%", "Change of k_e against the unit's reference weeks."),
    ), key=("unit_id", "week_start"), written_by="analyze (fits)"),
    Table("creep_fits", "Creep versus load per unit, ISO week and ratio bin: slip = a + b*load "
          "(Theil-Sen).", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("week_start", "DATE", "UTC date", "Monday of the ISO week."),
        _c("ratio_bin", "DOUBLE", "-", "Lower edge of the ratio bin (width ratio_bin_width)."),
        _c("a", "DOUBLE", "-", "Load-independent slip offset (geometry, actuator)."),
        _c("b", "DOUBLE", "1/(N*m)", "Compliance (rises when roller preload is lost)."),
        _c("b_low", "DOUBLE", "1/(N*m)", "Lower confidence bound of b."),
        _c("b_high", "DOUBLE", "1/(N*m)", "Upper confidence bound of b."),
        _c("n", "BIGINT", "-", "Steady windows behind the fit."),
        _c("is_reference", "BOOLEAN", "-", "Week lies in the unit's reference period."),
    ), key=("unit_id", "week_start", "ratio_bin"), written_by="analyze (fits)"),
    Table("efficiency", "Per unit and window: measured efficiency where torque is logged, else "
          "the input-power residual against the unit's normal-behaviour model.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("window_start", "TIMESTAMPTZ", "UTC", "Window start."),
        _c("day", "DATE", "UTC date", "Day."),
        _c("method", "VARCHAR", "-", "measured (t_out logged) or residual_only."),
        _c("efficiency", "DOUBLE", "-", "t_out*omega_out/p_in (measured only).", False),
        _c("variator_efficiency", "DOUBLE", "-", "t_out*omega_out / estimated motor shaft "
           "power (measured only).", False),
        _c("p_in_pred", "DOUBLE", "W", "Input power predicted by the unit's reference model.",
           False),
        _c("power_resid_pct", "DOUBLE", "%", "100*(p_in - p_in_pred)/p_in_pred.", False),
    ), key=("unit_id", "window_start"), written_by="analyze (fits)"),
    Table("scores", "Isolation-forest anomaly score per unit and day, with the features that "
          "drove it.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("day", "DATE", "UTC date", "Day."),
        _c("score", "DOUBLE", "-", "Anomaly score on the paper's scale (0.5 = nothing distinct, "
           "towards 1 = anomalous)."),
        _c("is_reference", "BOOLEAN", "-", "Day lies in the unit's reference period."),
        _c("top_features", "VARCHAR", "-", "Features that drove the score, most first, with "
           "their robust z-scores (e.g. 'slip_at_load z=+6.1; creep_b z=+4.0')."),
    ), key=("unit_id", "day"), written_by="health (models/anomaly.py)"),
    Table("trends", "Theil-Sen trend of each wear indicator since the last wear reset, as of "
          "each day, with days to the limit.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("indicator", "VARCHAR", "-", "slip_at_load, creep_b or power_resid_pct."),
        _c("as_of", "DATE", "UTC date", "Last day of data behind the fit."),
        _c("since", "DATE", "UTC date", "First day of the fit (start of data or last wear "
           "reset)."),
        _c("n_days", "BIGINT", "-", "Days with data behind the fit."),
        _c("slope_per_day", "DOUBLE", "unit/d", "Theil-Sen slope."),
        _c("slope_low", "DOUBLE", "unit/d", "Lower confidence bound of the slope."),
        _c("slope_high", "DOUBLE", "unit/d", "Upper confidence bound of the slope."),
        _c("level_now", "DOUBLE", "unit", "Fitted level at as_of."),
        _c("limit", "DOUBLE", "unit", "Configured limit (null when the indicator has none).",
           False),
        _c("days_to_limit", "DOUBLE", "d", "Median days from as_of to the limit (null: no "
           "crossing predicted).", False),
        _c("days_to_limit_low", "DOUBLE", "d", "Earliest crossing (upper slope bound).", False),
        _c("days_to_limit_high", "DOUBLE", "d", "Latest crossing (lower slope bound; null: "
           "open).", False),
        _c("note", "VARCHAR", "-", "e.g. 'no crossing predicted', 'beyond forecast range'.",
           False),
    ), key=("unit_id", "indicator", "as_of"), written_by="health (models/trend.py)"),
    Table("health", "Status per unit and day (normal, watch, alert) with plain-language reasons "
          "pointing at the evidence.", (
        _c("unit_id", "VARCHAR", "-", "Drive."),
        _c("day", "DATE", "UTC date", "Day."),
        _c("status", "VARCHAR", "-", "normal, watch or alert."),
        _c("since", "DATE", "UTC date", "First day of the current status run."),
        _c("days_to_limit", "DOUBLE", "d", "Median days to the slip limit (null when none).",
           False),
        _c("reasons", "VARCHAR", "-", "Plain-language reasons separated by ' | ', each naming "
           "its evidence (table, dates)."),
        _c("causes", "VARCHAR", "-", "Likely causes, comma separated (wear, contamination, "
           "actuator, stall, sensor, motor, data).", False),
    ), key=("unit_id", "day"), written_by="health (models/health.py)"),
)

# Advisor tables (advisor.py / softsensor.py read these tuples; declared here, once).
_ADVICE_COLS = (
    ("unit_id", "VARCHAR", "-", "Drive."),
    ("line", "VARCHAR", "-", "Line (build) of the unit: unit_id up to the first '-'."),
    ("n_out_lo_rpm", "DOUBLE", "rpm", "Duty bin: lowest output speed (inclusive)."),
    ("n_out_hi_rpm", "DOUBLE", "rpm", "Duty bin: highest output speed (exclusive)."),
    ("t_out_lo_nm", "DOUBLE", "N*m", "Duty bin: lowest output torque (inclusive)."),
    ("t_out_hi_nm", "DOUBLE", "N*m", "Duty bin: highest output torque (exclusive)."),
    ("ratio_used", "DOUBLE", "-", "Typical ratio used: time-weighted median commanded ratio "
     "of the unit's windows in the bin."),
    ("ratio_advised", "DOUBLE", "-", "Ratio with the least modelled input power inside the "
     "limits (null when no advice)."),
    ("ratio_min_obs", "DOUBLE", "-", "Lowest ratio observed for this duty in the windows "
     "behind the advice (2nd percentile)."),
    ("ratio_max_obs", "DOUBLE", "-", "Highest ratio observed for this duty (98th "
     "percentile)."),
    ("saving_w", "DOUBLE", "W", "Expected input-power saving while running this duty "
     "(time-weighted mean over the unit's windows)."),
    ("saving_kwh_week", "DOUBLE", "kWh/week", "Expected energy saving per week of data."),
    ("saving_kwh_week_low", "DOUBLE", "kWh/week", "Lower end of the bootstrap interval."),
    ("saving_kwh_week_high", "DOUBLE", "kWh/week", "Upper end of the bootstrap interval."),
    ("windows", "BIGINT", "-", "Steady windows behind the advice (the unit's, or its line's "
     "when basis is 'line')."),
    ("unit_windows", "BIGINT", "-", "The unit's own steady windows in the bin."),
    ("hours_per_week", "DOUBLE", "h/week", "Steady running time of the unit in this duty per "
     "week of data."),
    ("basis", "VARCHAR", "-", "unit (own windows) or line (pooled with same-line units)."),
    ("starts_from_standstill", "BOOLEAN", "-", "The duty is entered from, or left into, "
     "standstill: the advice is capped at max_start_ratio."),
    ("limited_by", "VARCHAR", "-", "Limits that cut the search range, comma separated: "
     "model_range (ratios the unit's power model was fitted on), model_support (ratios "
     "run near this duty), start_ratio (max_start_ratio), model_speed (motor speeds the "
     "power model has data for), motor_speed, motor_voltage, motor_current."),
    ("torque_source", "VARCHAR", "-", "measured (the unit logs t_out) or estimated (soft "
     "sensor)."),
    ("status", "VARCHAR", "-", "change (advised ratio differs and the interval excludes no "
     "saving), keep (already at or near the best ratio, or saving not significant), "
     "no_advice (see note)."),
    ("note", "VARCHAR", "-", "Plain-language explanation."),
)

_TORQUE_ESTIMATE_COLS = (
    ("unit_id", "VARCHAR", "-", "Drive."),
    ("window_start", "TIMESTAMPTZ", "UTC", "Window start (as in `windows`)."),
    ("t_out_est", "DOUBLE", "N*m", "Output torque of the window: the logged mean where the unit "
     "measures it, else the soft-sensor estimate eta_T(i, T_shaft)*i*T_shaft."),
    ("t_out_est_std", "DOUBLE", "N*m", "One standard deviation of the estimate (leave-one-unit-"
     "out residual model); null where the torque is measured."),
    ("source", "VARCHAR", "-", "measured (t_out logged) or estimated (soft sensor)."),
)

ADVISOR_TABLES = (
    Table("advice", "Per unit and duty bin (output speed x output torque): the ratio with the "
          "least modelled input power inside the observed and allowed range, and the energy it "
          "would save.", tuple(_c(*c) for c in _ADVICE_COLS),
          key=("unit_id", "n_out_lo_rpm", "t_out_lo_nm"), written_by="advise (advisor.py)"),
    Table("torque_estimates", "Per unit and window: output torque, measured where logged, else "
          "estimated by the soft sensor, with its uncertainty.",
          tuple(_c(*c) for c in _TORQUE_ESTIMATE_COLS), key=("unit_id", "window_start"),
          written_by="advise (softsensor.py)"),
)

TABLES: dict[str, Table] = {t.name: t for t in BASE_TABLES + DERIVED_TABLES + ADVISOR_TABLES}


def table(name: str) -> Table:
    """The contract of one table; KeyError lists the known names."""
    try:
        return TABLES[name]
    except KeyError:
        raise KeyError(f"unknown table '{name}'; known: {', '.join(TABLES)}") from None


def tables_markdown(tables=None) -> str:
    """The README's table reference, generated from ``TABLES`` (paste it after a change)."""
    out = []
    for t in (tables or TABLES.values()):
        out.append(f"#### `{t.name}`\n\n{t.help} Written by {t.written_by}."
                   + (f" Key: ({', '.join(t.key)})." if t.key else "")
                   + (f" Partitioned by {', '.join(t.partition_by)}." if t.partition_by else ""))
        out.append("\n| column | type | unit | meaning |\n|---|---|---|---|")
        for c in t.columns:
            opt = "" if c.required else " (may be null)"
            out.append(f"| `{c.name}` | {c.type} | {c.unit} | {c.help}{opt} |")
        out.append("")
    return "\n".join(out)
