"""A synthetic lake of derived tables for report, view and chart tests and the benchmark.

``synthetic_tables(units, days, ...)`` builds polars frames that match ``fleetwatch.schema``
(every column, every dtype) for a fleet with planted statuses, so the expected content of a
report is known without running ingest and analyze. ``FrameLake`` serves those frames
through the same ``connect()`` interface as ``fleetwatch.lake.Lake``; ``write_lake`` writes
them into a real lake with ``Lake.overwrite`` once that module exists.

Scenario (unit index i, condition CONDITIONS[i % 16], days counted from ``start``):
wear (watch from day 35, alert from day 50), contamination (alert from day 58, new in the
last week), actuator (watch from day 40), sensor (watch from day 59), stall (alert days
45-57, then cleared), motor (watch from day 30), silent (no data from day 53, watch from
54) and healthy (normal throughout). With the default start 2026-06-01 and 63 days the
last complete week is 2026-W31 (days 56..62).
"""
from __future__ import annotations

import contextlib
import datetime as dt
from dataclasses import dataclass, field

import duckdb
import numpy as np
import polars as pl

from fleetwatch.schema import TABLES

START = dt.date(2026, 6, 1)
CONDITIONS = ("wear", "contamination", "actuator", "sensor", "stall", "motor", "silent") + \
    ("healthy",) * 9
_PL = {"VARCHAR": pl.String, "DOUBLE": pl.Float64, "BIGINT": pl.Int64, "BOOLEAN": pl.Boolean,
       "DATE": pl.Date, "TIMESTAMPTZ": pl.Datetime("us", "UTC")}
UTC = dt.timezone.utc


def schema_of(name: str) -> dict[str, pl.DataType]:
    return {c.name: _PL[c.type] for c in TABLES[name].columns}


def frame(name: str, data: dict | pl.DataFrame | None = None) -> pl.DataFrame:
    """A frame with exactly the contract columns and dtypes of table ``name``."""
    sch = schema_of(name)
    df = pl.DataFrame(data) if not isinstance(data, pl.DataFrame) else data
    if df.height == 0 and not df.columns:
        return pl.DataFrame(schema=sch)
    cols = []
    for col, t in sch.items():
        if col in df.columns:
            cols.append(df[col].cast(t).alias(col))
        else:
            cols.append(pl.repeat(None, df.height, dtype=t, eager=True).alias(col))
    return pl.DataFrame(cols)


def unit_ids(units: int) -> list[str]:
    return [f"L{i // 10 + 1}-U{i % 10 + 1:02d}" for i in range(units)]


@dataclass
class Truth:
    """Expected statuses of the synthetic fleet."""

    conditions: dict[str, str]
    status_end: dict[str, str]          # status on the last day
    status_prev_week_end: dict[str, str]
    report_week: str
    start: dt.date
    days: int
    instrumented: set[str] = field(default_factory=set)

    @property
    def needing_action(self) -> set[str]:
        return {u for u, s in self.status_end.items() if s in ("watch", "alert")}


def _status(cond: str, d: int) -> tuple[str, int | None, str, str]:
    """(status, since day, reason, causes) of a condition on day index d."""
    if cond == "wear":
        if d >= 50:
            return "alert", 50, "steady slip at load near the limit and rising (trends)", "wear"
        if d >= 35:
            return "watch", 35, "steady slip at load rising since the last reset (trends)", "wear"
    elif cond == "contamination" and d >= 58:
        return "alert", 58, "4 gross-slip events in one day (events)", "contamination"
    elif cond == "actuator" and d >= 40:
        return "watch", 40, "ratio tracking error 3.1 % (unit_days)", "actuator"
    elif cond == "sensor" and d >= 59:
        return "watch", 59, "output speed flatline 2.0 h (events)", "sensor"
    elif cond == "stall" and 45 <= d <= 57:
        return "alert", 45, "3 stalls in one day at ratio 3.4 (events)", "stall"
    elif cond == "motor" and d >= 30:
        return "watch", 30, "motor resistance up 18 % against reference weeks (motor_fits)", \
            "motor"
    elif cond == "silent" and d >= 54:
        return "watch", 54, "no data since day 53 (unit_days)", "data"
    return "normal", None, "", ""


def synthetic_tables(units: int = 16, days: int = 63, start: dt.date = START,
                     window_min: int = 60, seed: int = 3) -> tuple[dict[str, pl.DataFrame], Truth]:
    """Frames for every derived table (and maintenance/quarantine/batches) plus the truth."""
    rng = np.random.default_rng(seed)
    ids = unit_ids(units)
    cond = {u: CONDITIONS[i % len(CONDITIONS)] for i, u in enumerate(ids)}
    instrumented = {u for i, u in enumerate(ids) if i % 3 == 0}
    day_list = [start + dt.timedelta(days=k) for k in range(days)]
    per_day = 24 * 60 // window_min
    t_start = dt.datetime.combine(start, dt.time(0), tzinfo=UTC)

    def slip_level(c: str, d: np.ndarray) -> np.ndarray:
        base = np.full(d.shape, 0.020)
        if c == "wear":
            base = base + np.clip(d - 20, 0, None) * 0.0002
        return base

    def compliance(c: str, d: np.ndarray) -> np.ndarray:
        b = np.full(d.shape, 0.010)
        if c == "wear":
            b = b + np.clip(d - 20, 0, None) * 0.0004
        return b

    # -- windows and efficiency (vectorised per unit)
    w_parts, e_parts, ud_parts = [], [], []
    for u in ids:
        c = cond[u]
        ndays = 53 if c == "silent" else days
        n = ndays * per_day
        k = np.arange(n)
        dayidx = k // per_day
        load = rng.uniform(0.2, 2.0, n)
        ratio = np.where((k // 6) % 2 == 0, 1.2, 2.7)
        slip = slip_level(c, dayidx) - 0.01 + compliance(c, dayidx) * load \
            + rng.normal(0, 0.001, n)
        if c == "contamination":
            slip = slip + np.where(dayidx >= 58, 0.03, 0.0)
        ratio_err = np.where((c == "actuator") & (dayidx >= 40), 0.031, 0.0) \
            + rng.normal(0, 0.001, n)
        samples = np.full(n, window_min, dtype=np.int64)
        if u == ids[-1]:                       # one patchy logger
            samples = np.where(dayidx % 5 == 0, window_min // 2, samples)
        p_in = 150 + 60 * load + rng.normal(0, 2, n)
        temp = 35 + 8 * load + rng.normal(0, 0.5, n)
        ws = [t_start + dt.timedelta(minutes=window_min * int(j)) for j in k]
        w_parts.append(pl.DataFrame({
            "unit_id": [u] * n, "window_start": ws,
            "day": [day_list[j] for j in dayidx], "samples": samples,
            "steady_samples": (samples * 0.8).astype(np.int64), "slip_mean": slip,
            "slip_p95": slip + 0.004, "load_mean": load,
            "load_source": ["measured" if u in instrumented else "motor_model"] * n,
            "ratio_cmd_mean": ratio, "ratio_act_mean": ratio * (1 + ratio_err),
            "ratio_error": ratio_err, "n_in_mean": np.full(n, 1450.0),
            "n_out_mean": 1450.0 / ratio * (1 - slip), "i_in_mean": p_in / 24.0,
            "p_in_mean": p_in, "energy_in_wh": p_in * window_min / 60.0,
            "energy_out_wh": (p_in * 0.8 * window_min / 60.0) if u in instrumented else None,
            "temp_mean": temp, "completeness": samples / window_min,
        }))
        eff = 0.82 - np.clip(slip - 0.02, 0, None) if u in instrumented else None
        e_parts.append(pl.DataFrame({
            "unit_id": [u] * n, "window_start": ws, "day": [day_list[j] for j in dayidx],
            "method": ["measured" if u in instrumented else "residual_only"] * n,
            "efficiency": eff, "variator_efficiency": None if eff is None else eff + 0.05,
            "p_in_pred": p_in - rng.normal(0, 2, n),
            "power_resid_pct": rng.normal(0, 1.0, n),
        }))
        dd = np.arange(ndays)
        sal = slip_level(c, dd) - 0.01 + compliance(c, dd) * 1.0 + rng.normal(0, 0.0005, ndays)
        if c == "contamination":
            sal = sal + np.where(dd >= 58, 0.03, 0.0)
        comp = (samples.reshape(ndays, per_day).sum(axis=1) / (window_min * per_day))
        ud_parts.append(pl.DataFrame({
            "unit_id": [u] * ndays, "day": day_list[:ndays],
            "samples": (comp * 1440).astype(np.int64),
            "steady_samples": (comp * 1440 * 0.8).astype(np.int64), "completeness": comp,
            "slip_mean": sal, "slip_p95": sal + 0.004, "slip_at_load": sal,
            "creep_a": np.full(ndays, 0.01), "creep_b": compliance(c, dd),
            "ratio_error": np.where((c == "actuator") & (dd >= 40), 0.031, 0.0),
            "power_resid_pct": rng.normal(0, 1.0, ndays),
            "efficiency": (0.82 - (sal - 0.02)) if u in instrumented else None,
            "temp_mean": rng.normal(45, 1, ndays),
            "energy_in_wh": rng.normal(4500, 200, ndays),
            "gross_slip_events": np.where((c == "contamination") & (dd >= 58), 4, 0),
            "stall_events": np.where((c == "stall") & (dd >= 45) & (dd <= 57), 3, 0),
            "ratio_change_stopped_events": np.zeros(ndays, dtype=np.int64),
            "flatline_events": np.where((c == "sensor") & (dd >= 59), 1, 0),
            "gap_events": np.zeros(ndays, dtype=np.int64),
            "clock_jump_events": np.zeros(ndays, dtype=np.int64),
        }))
    tables: dict[str, pl.DataFrame] = {
        "windows": frame("windows", pl.concat(w_parts)),
        "efficiency": frame("efficiency", pl.concat(e_parts)),
        "unit_days": frame("unit_days", pl.concat(ud_parts)),
    }

    # -- events
    ev = []
    for u in ids:
        c = cond[u]
        if c == "contamination":
            for d in range(58, days):
                for j in range(4):
                    t = dt.datetime.combine(day_list[d], dt.time(6 + 3 * j), tzinfo=UTC)
                    ev.append((u, "gross_slip", t, t + dt.timedelta(minutes=3), 3, 0.14, 1.2,
                               "slip", "gross slip 14 % for 3 min"))
        if c == "stall":
            for d in range(45, min(58, days)):
                for j in range(3):
                    t = dt.datetime.combine(day_list[d], dt.time(7 + 4 * j), tzinfo=UTC)
                    ev.append((u, "stall", t, t + dt.timedelta(seconds=60), 1, 11.5, 3.4,
                               "i_in", "stall: 11.5 A at standstill, ratio 3.4"))
        if c == "sensor":
            for d in range(59, days):
                t = dt.datetime.combine(day_list[d], dt.time(10), tzinfo=UTC)
                ev.append((u, "flatline", t, t + dt.timedelta(hours=2), 120, 7200.0, None,
                           "n_out", "n_out unchanged for 2.0 h while running"))
        if c == "silent":
            t = dt.datetime.combine(day_list[52], dt.time(23, 59), tzinfo=UTC)
            ev.append((u, "data_gap", t, t + dt.timedelta(days=days - 53), 0,
                       (days - 53) * 86400.0, None, None, "no data"))
    tables["events"] = frame("events", pl.DataFrame(ev, orient="row", schema={
        "unit_id": pl.String, "kind": pl.String, "start_ts": pl.Datetime("us", "UTC"),
        "end_ts": pl.Datetime("us", "UTC"), "samples": pl.Int64, "peak": pl.Float64,
        "ratio_cmd": pl.Float64, "signal": pl.String, "description": pl.String,
    }).with_columns(day=pl.col("start_ts").dt.date()))

    # -- maintenance: one wear reset early on the first healthy unit, one inspection
    healthy = [u for u in ids if cond[u] == "healthy"]
    mrows = []
    if healthy:
        mrows.append((healthy[0], dt.datetime.combine(day_list[10], dt.time(9), tzinfo=UTC),
                      "roller replaced", "new roller, preload set", True))
    mrows.append((ids[0], dt.datetime.combine(day_list[min(days - 3, 60)], dt.time(13),
                                              tzinfo=UTC),
                  "inspection", "roller glazed, replacement ordered", False))
    tables["maintenance"] = frame("maintenance", pl.DataFrame(mrows, orient="row", schema={
        "unit_id": pl.String, "ts": pl.Datetime("us", "UTC"), "action": pl.String,
        "note": pl.String, "resets_wear": pl.Boolean}).with_columns(batch_id=pl.lit("b-m1")))

    # -- motor fits (weekly), creep fits (weekly x 2 ratio bins)
    weeks = sorted({d - dt.timedelta(days=d.weekday()) for d in day_list})
    mf, cf = [], []
    for u in ids:
        c = cond[u]
        for wi, w in enumerate(weeks):
            if c == "silent" and w > day_list[52]:
                continue
            drift_r = 18.0 if (c == "motor" and wi >= 4) else float(rng.normal(0, 1.0))
            drift_k = -6.0 if (c == "motor" and wi >= 4) else float(rng.normal(0, 0.5))
            mf.append((u, w, 1.5 * (1 + drift_r / 100), 0.10 * (1 + drift_k / 100), 0.2,
                       5000, drift_r, drift_k))
            dmid = np.array([float(np.clip((w - start).days + 3, 0, days - 1))])
            b = float(compliance(c, dmid)[0])
            a = float(slip_level(c, dmid)[0]) - 0.01
            if c == "contamination" and (w - start).days + 3 >= 58:
                a += 0.03
            for rb in (1.0, 2.5):
                cf.append((u, w, rb, a, b, b * 0.9, b * 1.1, 300, wi < 2))
    tables["motor_fits"] = frame("motor_fits", pl.DataFrame(mf, orient="row", schema={
        "unit_id": pl.String, "week_start": pl.Date, "r_ohm": pl.Float64, "k_e": pl.Float64,
        "resid_std_v": pl.Float64, "n": pl.Int64, "r_drift_pct": pl.Float64,
        "k_e_drift_pct": pl.Float64}))
    tables["creep_fits"] = frame("creep_fits", pl.DataFrame(cf, orient="row", schema={
        "unit_id": pl.String, "week_start": pl.Date, "ratio_bin": pl.Float64, "a": pl.Float64,
        "b": pl.Float64, "b_low": pl.Float64, "b_high": pl.Float64, "n": pl.Int64,
        "is_reference": pl.Boolean}))

    # -- scores, trends, health (per unit-day)
    sc, tr, he = [], [], []
    limit = 0.05
    status_end, status_prev = {}, {}
    last = days - 1
    prev_end = last - 7
    for u in ids:
        c = cond[u]
        ndays = 53 if c == "silent" else days
        for d in range(days):
            day = day_list[d]
            if d < ndays:
                score = 0.7 if (c in ("contamination", "wear") and d >= 50) else \
                    float(rng.uniform(0.40, 0.55))
                sc.append((u, day, score, d < 14,
                           "slip_at_load z=+6.1; creep_b z=+4.0" if score > 0.6 else
                           "temp_mean z=+0.4"))
                if d >= 7:
                    since = 21 if (c == "wear" and d > 21) else 0
                    slope = 0.0006 if c == "wear" and d > 21 else 0.000005
                    level = float(slip_level(c, np.array([d]))[0]) - 0.01 + \
                        float(compliance(c, np.array([d]))[0])
                    if slope > 1e-4:
                        dtl = max(0.0, (limit - level) / slope)
                        lo, hi = dtl * 0.7, dtl * 1.5
                        note = None
                    else:
                        dtl = lo = hi = None
                        note = "no crossing predicted"
                    tr.append((u, "slip_at_load", day, day_list[since], d - since + 1, slope,
                               slope * 0.7, slope * 1.4, level, limit, dtl, lo, hi, note))
            status, since_d, reason, causes = _status(c, d)
            dtl_h = None
            if c == "wear" and status != "normal":
                level = float(slip_level(c, np.array([d]))[0]) - 0.01 + \
                    float(compliance(c, np.array([d]))[0])
                dtl_h = max(0.0, (limit - level) / 0.0006)
            if status == "normal":
                # since = start of the current normal run
                since_d = 0 if c == "healthy" else {"stall": 58}.get(c, 0)
            he.append((u, day, status, day_list[since_d], dtl_h, reason, causes or None))
            if d == last:
                status_end[u] = status
            if d == prev_end:
                status_prev[u] = status
    tables["scores"] = frame("scores", pl.DataFrame(sc, orient="row", schema={
        "unit_id": pl.String, "day": pl.Date, "score": pl.Float64, "is_reference": pl.Boolean,
        "top_features": pl.String}))
    tables["trends"] = frame("trends", pl.DataFrame(tr, orient="row", schema={
        "unit_id": pl.String, "indicator": pl.String, "as_of": pl.Date, "since": pl.Date,
        "n_days": pl.Int64, "slope_per_day": pl.Float64, "slope_low": pl.Float64,
        "slope_high": pl.Float64, "level_now": pl.Float64, "limit": pl.Float64,
        "days_to_limit": pl.Float64, "days_to_limit_low": pl.Float64,
        "days_to_limit_high": pl.Float64, "note": pl.String}))
    tables["health"] = frame("health", pl.DataFrame(he, orient="row", schema={
        "unit_id": pl.String, "day": pl.Date, "status": pl.String, "since": pl.Date,
        "days_to_limit": pl.Float64, "reasons": pl.String, "causes": pl.String}))

    # -- quarantine and batches: 3 rows ingested in the last week, 2 earlier
    last_week_t = dt.datetime.combine(day_list[last - 2], dt.time(3), tzinfo=UTC)
    early_t = dt.datetime.combine(day_list[5], dt.time(3), tzinfo=UTC)
    q = [("b-1", "plant-a.csv", 17, "n_out", "not_numeric", "n_out 'x' is not a number",
          '{"n_out": "x"}', "telemetry", last_week_t),
         ("b-1", "plant-a.csv", 18, "n_out", "not_numeric", "n_out '?' is not a number",
          '{"n_out": "?"}', "telemetry", last_week_t),
         ("b-1", "plant-a.csv", 40, "ratio_cmd", "out_of_range", "ratio_cmd 9.0 above 5.0",
          '{"ratio_cmd": "9.0"}', "telemetry", last_week_t),
         ("b-0", "plant-a-old.csv", 3, "ts", "bad_timestamp", "ts 'yesterday' unreadable",
          '{"ts": "yesterday"}', "telemetry", early_t),
         ("b-0", "plant-a-old.csv", 4, "ts", "bad_timestamp", "ts '' unreadable",
          '{"ts": ""}', "telemetry", early_t)]
    tables["quarantine"] = frame("quarantine", pl.DataFrame(q, orient="row", schema={
        "batch_id": pl.String, "source_file": pl.String, "line": pl.Int64, "column": pl.String,
        "rule": pl.String, "message": pl.String, "raw": pl.String, "kind": pl.String,
        "ingested_at": pl.Datetime("us", "UTC")}))
    tables["batches"] = frame("batches", pl.DataFrame([
        ("b-0", "telemetry", "plant-a-old.csv", "aa", 1000, 998, 2, 0, "ok", None, early_t,
         early_t),
        ("b-1", "telemetry", "plant-a.csv", "bb", 1000, 997, 3, 0, "ok", None, last_week_t,
         last_week_t)], orient="row", schema={
        "batch_id": pl.String, "kind": pl.String, "source_file": pl.String,
        "content_sha256": pl.String, "rows_read": pl.Int64, "accepted": pl.Int64,
        "quarantined": pl.Int64, "duplicates": pl.Int64, "status": pl.String,
        "message": pl.String, "started_at": pl.Datetime("us", "UTC"),
        "finished_at": pl.Datetime("us", "UTC")}))
    report_week = day_list[last].isocalendar()
    truth = Truth(cond, status_end, status_prev,
                  f"{report_week.year}-W{report_week.week:02d}", start, days, instrumented)
    return tables, truth


class FrameLake:
    """In-memory stand-in for ``fleetwatch.lake.Lake``: same ``connect()`` contract."""

    def __init__(self, tables: dict[str, pl.DataFrame]):
        self.tables = tables
        self._arrow = {k: v.to_arrow() for k, v in tables.items()}
        self.lock_requests: list[str] = []

    def connect(self, tables: list[str] | None = None) -> duckdb.DuckDBPyConnection:
        con = duckdb.connect(":memory:")
        for name, tbl in self._arrow.items():
            if tables is None or name in tables:
                con.register(name, tbl)
        return con

    def read(self, name, columns=None, filter_sql=None):
        return self.tables.get(name, pl.DataFrame(schema=schema_of(name)))

    @contextlib.contextmanager
    def writer(self, purpose: str):
        self.lock_requests.append(purpose)
        yield self

    def versions(self) -> dict[str, int]:
        return {k: 0 for k in self.tables}


def write_lake(path, tables: dict[str, pl.DataFrame], layout: str = "overwrite"):
    """Write the frames into a real lake at ``path`` (needs fleetwatch.lake).

    ``layout="analyze"``: the tables analyze streams (``fleetwatch.analyze.MONTH_ORDERED``:
    windows, efficiency) are written as analyze writes them, through ``Lake.write_stream``
    with rows ordered by month, then key, in files and row groups of analyze's sizes, so
    readers (the dashboard's bench) see the layout users get; the other tables, and every
    table with the default ``"overwrite"``, through ``Lake.overwrite`` (sorted by key).
    """
    from fleetwatch.lake import Lake

    streamed: tuple = ()
    if layout == "analyze":
        from fleetwatch import analyze
        streamed = tuple(getattr(analyze, "MONTH_ORDERED", ()))
    elif layout != "overwrite":
        raise ValueError(f"layout: 'overwrite' or 'analyze', not {layout!r}")
    lake = Lake(path)
    with lake.writer("test-setup"):
        for name, df in tables.items():
            if name in streamed:
                _write_month_ordered(lake, name, df)
            else:
                lake.overwrite(name, df)
    return lake


def _write_month_ordered(lake, name: str, df: pl.DataFrame) -> None:
    """``df`` as analyze stores ``name``: ORDER BY month of day, then the table's key,
    through ``Lake.write_stream`` with analyze's file and row-group sizes."""
    from fleetwatch import analyze
    from fleetwatch.schema import TABLES

    cols = ", ".join(f"CAST({c.name} AS {c.type}) AS {c.name}" for c in TABLES[name].columns)
    order = ", ".join(["date_trunc('month', day)", *TABLES[name].key])
    con = duckdb.connect(":memory:")
    try:
        con.register("src", df.to_arrow())
        reader = con.sql(f"SELECT {cols} FROM src ORDER BY {order}").to_arrow_reader(100_000)
        lake.write_stream(name, reader, None,
                          target_file_size=getattr(analyze, "STREAM_FILE_BYTES", None),
                          max_row_group_size=getattr(analyze, "STREAM_ROW_GROUP", None))
    finally:
        con.close()
