"""Read-side data functions shared by the weekly report and the dashboard.

Every function takes ``source``: a :class:`fleetwatch.lake.Lake` (anything with
``connect()`` returning a DuckDB connection with one view per lake table) or an open DuckDB
connection from ``lake.connect()``. Pass one connection to many calls when you need several
views of the same snapshot (the report does); pass the lake for one-off calls (the
dashboard may). Functions return polars DataFrames (or small dataclasses of them) ready for
:mod:`fleetwatch.charts`. All SQL lives here; dashboard pages must not hold SQL strings.

Time conventions: day-keyed tables (``unit_days``, ``health``, ``trends``, ...) use the UTC
``day`` column; an :class:`IsoWeek` covers the days Monday..Sunday of its ISO 8601 week.
Timestamped tables (``events``, ``maintenance``, ``windows``) are filtered on the week's
exact bounds in the plant's time zone (``IsoWeek.bounds_utc``). A table that is missing
from the lake reads as empty with its contract columns (``fleetwatch.schema``).
"""
from __future__ import annotations

import datetime as dt
import re
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, Iterable, Iterator, Sequence
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

import duckdb
import polars as pl

from .errors import UsageError
from .schema import STATUS_LEVELS, TABLES

__all__ = [
    "IsoWeek", "STATUS_ORDER", "CAUSE_ACTIONS", "suggested_action",
    "fleet_overview", "status_counts", "health_changes", "changes_summary",
    "unit_slip_series", "slip_series_for_units", "SlipSeries", "creep_week_vs_reference",
    "creep_for_units", "CreepComparison",
    "unit_events", "maintenance_markers", "motor_drift", "energy_summary",
    "data_quality", "DataQuality", "health_history", "anomaly_scores", "ratio_series",
    "power_series", "temperature_series", "fleet_slip_distribution", "known_units",
    "default_slip_limit",
]

#: Status words from least to most urgent ("unknown": a unit with data but no health row).
STATUS_ORDER = ("unknown",) + tuple(STATUS_LEVELS)
_STATUS_RANK_SQL = ("CASE status WHEN 'alert' THEN 3 WHEN 'watch' THEN 2 "
                    "WHEN 'normal' THEN 1 ELSE 0 END")

#: Likely cause (health.causes) -> suggested action for a work order.
CAUSE_ACTIONS: dict[str, str] = {
    "wear": "inspect roller and preload",
    "contamination": "clean contact surfaces and find the source",
    "actuator": "re-home the ratio actuator and check its steps",
    "sensor": "check the output speed sensor and wiring",
    "stall": "review start ratio and start logic",
    "motor": "check motor connections and brushes",
    "data": "check the logger",
}


def suggested_action(causes: str | Sequence[str] | None) -> str:
    """Actions for likely causes (comma-separated text or a list), joined with '; '.

    Unknown or empty causes give 'review the evidence in the report'.
    """
    if isinstance(causes, str):
        items = [c.strip().lower() for c in causes.split(",")]
    else:
        items = [str(c).strip().lower() for c in (causes or [])]
    acts = []
    for c in items:
        a = CAUSE_ACTIONS.get(c)
        if a and a not in acts:
            acts.append(a)
    return "; ".join(acts) if acts else "review the evidence in the report"


def default_slip_limit() -> float:
    """The documented default of the ``slip_limit`` setting (used when no trend carries one)."""
    from .config import SETTINGS

    return next(s.default for s in SETTINGS if s.name == "slip_limit")


# ----------------------------------------------------------------------------- ISO weeks
_WEEK_RE = re.compile(r"^(\d{4})-?W(\d{2})$")


@dataclass(frozen=True, order=True)
class IsoWeek:
    """An ISO 8601 week (weeks start on Monday; week 1 holds the year's first Thursday).

    ``IsoWeek.parse("2026-W53")``; ``str(week)`` gives back ``YYYY-Www``.
    """

    year: int
    week: int

    def __post_init__(self) -> None:
        try:
            dt.date.fromisocalendar(self.year, self.week, 1)
        except ValueError:
            raise UsageError(f"week {self.year}-W{self.week:02d} does not exist",
                             hint=f"ISO year {self.year} has "
                                  f"{IsoWeek.weeks_in_year(self.year)} weeks.") from None

    @staticmethod
    def weeks_in_year(year: int) -> int:
        """52 or 53: 28 December always lies in the year's last ISO week."""
        return dt.date(year, 12, 28).isocalendar().week

    @classmethod
    def parse(cls, text: str) -> "IsoWeek":
        """Parse ``YYYY-Www`` (or ``YYYYWww``); raises UsageError with the expected form."""
        m = _WEEK_RE.match(str(text).strip().upper())
        if not m:
            raise UsageError(f"week {text!r} is not an ISO 8601 week",
                             hint="Write it as YYYY-Www, for example 2026-W23.")
        return cls(int(m.group(1)), int(m.group(2)))

    @classmethod
    def containing(cls, day: dt.date) -> "IsoWeek":
        iso = day.isocalendar()
        return cls(iso.year, iso.week)

    @classmethod
    def last_complete(cls, timezone: str = "UTC", now: dt.datetime | None = None) -> "IsoWeek":
        """The last week that has fully ended in ``timezone`` (the plant's time zone)."""
        now = now or dt.datetime.now(dt.timezone.utc)
        if now.tzinfo is None:
            now = now.replace(tzinfo=dt.timezone.utc)
        local_today = now.astimezone(_zone(timezone)).date()
        return cls.containing(local_today).previous()

    @property
    def label(self) -> str:
        return f"{self.year}-W{self.week:02d}"

    def __str__(self) -> str:
        return self.label

    @property
    def monday(self) -> dt.date:
        return dt.date.fromisocalendar(self.year, self.week, 1)

    @property
    def sunday(self) -> dt.date:
        return dt.date.fromisocalendar(self.year, self.week, 7)

    def days(self) -> list[dt.date]:
        return [self.monday + dt.timedelta(days=i) for i in range(7)]

    def previous(self) -> "IsoWeek":
        return IsoWeek.containing(self.monday - dt.timedelta(days=7))

    def next(self) -> "IsoWeek":
        return IsoWeek.containing(self.monday + dt.timedelta(days=7))

    def bounds_utc(self, timezone: str = "UTC") -> tuple[dt.datetime, dt.datetime]:
        """[Monday 00:00, next Monday 00:00) local time in ``timezone``, as UTC instants."""
        tz = _zone(timezone)
        start = dt.datetime.combine(self.monday, dt.time(0), tzinfo=tz)
        end = dt.datetime.combine(self.monday + dt.timedelta(days=7), dt.time(0), tzinfo=tz)
        return start.astimezone(dt.timezone.utc), end.astimezone(dt.timezone.utc)


def _zone(name: str) -> dt.tzinfo:
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise UsageError(f"unknown time zone {name!r}",
                         hint="Set plant_timezone to an IANA name such as Europe/Berlin.") \
            from None


# ----------------------------------------------------------------------------- plumbing
def _empty_view_sql(name: str) -> str:
    cols = ", ".join(f"CAST(NULL AS {c.type}) AS \"{c.name}\"" for c in TABLES[name].columns)
    return f"CREATE OR REPLACE TEMP VIEW \"{name}\" AS SELECT {cols} WHERE false"


def _prepare(con: duckdb.DuckDBPyConnection) -> None:
    """Missing lake tables read as empty; date casts use UTC."""
    try:
        con.execute("SET TimeZone = 'UTC'")
    except duckdb.Error:  # configuration locked by the caller: keep theirs
        pass
    have = {r[0] for r in con.sql(
        "SELECT view_name FROM duckdb_views() WHERE NOT internal "
        "UNION ALL SELECT table_name FROM duckdb_tables()").fetchall()}
    for name in TABLES:
        if name not in have:
            con.execute(_empty_view_sql(name))


@contextmanager
def _session(source: Any, tables: Sequence[str] | None = None
             ) -> Iterator[duckdb.DuckDBPyConnection]:
    """A connection: ``source`` itself when it is one, else a fresh ``source.connect()``
    (only ``tables`` registered when the lake supports it: opening fewer Delta tables
    keeps one-off dashboard calls quick), closed afterwards."""
    if isinstance(source, duckdb.DuckDBPyConnection):
        _prepare(source)
        yield source
        return
    if not hasattr(source, "connect"):
        raise TypeError("source must be a Lake or a DuckDB connection from lake.connect()")
    try:
        con = source.connect(tables=list(tables)) if tables is not None else source.connect()
    except TypeError:
        con = source.connect()
    try:
        if not getattr(con, "fleetwatch_prepared", False):  # a dashboard snapshot's: done
            _prepare(con)
        yield con
    finally:
        con.close()


def _tables_in(sql: str) -> list[str]:
    return [t for t in TABLES if re.search(rf"\b{t}\b", sql)]


def _q(source: Any, sql: str, **params: Any) -> pl.DataFrame:
    with _session(source, _tables_in(sql)) as con:
        return _fix_tz(con.sql(sql, params=params or None).pl())


def _fix_tz(df: pl.DataFrame) -> pl.DataFrame:
    """DuckDB hands UTC back as 'Etc/UTC'; use 'UTC' so frames compare and join cleanly."""
    fixes = [pl.col(n).dt.convert_time_zone("UTC") for n, t in df.schema.items()
             if isinstance(t, pl.Datetime) and t.time_zone not in (None, "UTC")]
    return df.with_columns(fixes) if fixes else df


def _as_date(value: dt.date | dt.datetime | str | None) -> dt.date | None:
    if value is None:
        return None
    if isinstance(value, str):
        value = dt.datetime.fromisoformat(value) if "T" in value else dt.date.fromisoformat(value)
    if isinstance(value, dt.datetime):
        if value.tzinfo is not None:
            value = value.astimezone(dt.timezone.utc)
        return value.date()
    return value


def _as_utc(value: dt.date | dt.datetime | str | None, end: bool = False) -> dt.datetime | None:
    """A UTC instant; a bare date means its start (or, with ``end``, the next day's start)."""
    if value is None:
        return None
    if isinstance(value, str):
        value = dt.datetime.fromisoformat(value) if "T" in value else dt.date.fromisoformat(value)
    if isinstance(value, dt.datetime):
        return value.replace(tzinfo=dt.timezone.utc) if value.tzinfo is None \
            else value.astimezone(dt.timezone.utc)
    d = value + dt.timedelta(days=1) if end else value
    return dt.datetime.combine(d, dt.time(0), tzinfo=dt.timezone.utc)


def _day_filter(col: str, start: Any, end: Any, params: dict) -> str:
    clauses = []
    s, e = _as_date(start), _as_date(end)
    if s is not None:
        params["d0"] = s
        clauses.append(f"{col} >= $d0")
    if e is not None:
        params["d1"] = e
        clauses.append(f"{col} <= $d1")
    return " AND ".join(clauses) or "true"


def _ts_filter(col: str, start: Any, end: Any, params: dict) -> str:
    clauses = []
    s, e = _as_utc(start), _as_utc(end, end=True)
    if s is not None:
        params["t0"] = s
        clauses.append(f"{col} >= $t0")
    if e is not None:
        params["t1"] = e
        clauses.append(f"{col} < $t1")
    return " AND ".join(clauses) or "true"


def _unit_filter(col: str, unit_id: str | Sequence[str] | None, params: dict) -> str:
    if unit_id is None:
        return "true"
    if isinstance(unit_id, str):
        params["u"] = unit_id
        return f"{col} = $u"
    params["us"] = list(unit_id)
    return f"list_contains($us, {col})"


_LINE_SQL = "CASE WHEN contains({c}, '-') THEN split_part({c}, '-', 1) ELSE '' END"


def _line(col: str = "unit_id") -> str:
    return _LINE_SQL.format(c=col)


# ----------------------------------------------------------------------------- fleet status
def known_units(source: Any) -> list[str]:
    """Every unit the lake knows (health, unit_days or maintenance), sorted."""
    df = _q(source, """
        SELECT DISTINCT unit_id FROM (
            SELECT unit_id FROM health UNION ALL SELECT unit_id FROM unit_days
            UNION ALL SELECT unit_id FROM maintenance)
        WHERE unit_id IS NOT NULL ORDER BY unit_id""")
    return df["unit_id"].to_list()


def fleet_overview(source: Any, as_of: dt.date | str | None = None) -> pl.DataFrame:
    """Latest status per unit on or before ``as_of`` (UTC day; default: latest day).

    Columns: unit_id, line (unit_id prefix before '-'), status (normal/watch/alert; 'unknown'
    for a unit with data but no health row), since, days_to_limit (d, null: none), reasons
    (' | '-separated), main_reason (first reason), causes, health_day (day of the status
    row), last_data (UTC timestamp of the unit's last sample up to as_of: from telemetry
    of the 7 days before as_of, else the start of its last window, else its last day with
    samples), urgency (1 = most urgent).
    Sorted most urgent first: alert, watch, normal, unknown; inside a status, units with no
    forecast (event- or score-based: act now) first, then by days to limit, then by since.
    """
    params: dict = {}
    d = _as_date(as_of)
    hf = wf = uf = "true"
    # telemetry: only the last week's day partitions are scanned (cheap on a big lake);
    # units silent for longer fall back to their last window, then their last day.
    d_recent = (d or dt.datetime.now(dt.timezone.utc).date()) - dt.timedelta(days=7)
    params["d_recent"] = d_recent
    tf = "day >= $d_recent"
    if d is not None:
        params["d1"] = d
        params["t1"] = _as_utc(d, end=True)
        hf = uf = "day <= $d1"
        tf += " AND ts < $t1"
        wf = "window_start < $t1"
    sql = f"""
        WITH h AS (
            SELECT unit_id, day AS health_day, status, since, days_to_limit, reasons, causes
            FROM health WHERE {hf}
            QUALIFY row_number() OVER (PARTITION BY unit_id ORDER BY day DESC) = 1),
        units AS (
            SELECT unit_id FROM h
            UNION SELECT DISTINCT unit_id FROM unit_days WHERE {uf}),
        tl AS (SELECT unit_id, max(ts) AS last_ts FROM telemetry WHERE {tf} GROUP BY unit_id),
        wl AS (SELECT unit_id, max(window_start) AS last_w FROM windows
               WHERE {wf} AND samples > 0 GROUP BY unit_id),
        ul AS (SELECT unit_id, max(day) AS last_d FROM unit_days
               WHERE {uf} AND samples > 0 GROUP BY unit_id)
        SELECT u.unit_id, {_line('u.unit_id')} AS line,
               coalesce(h.status, 'unknown') AS status, h.since, h.days_to_limit,
               coalesce(h.reasons, '') AS reasons,
               trim(split_part(coalesce(h.reasons, ''), ' | ', 1)) AS main_reason,
               coalesce(h.causes, '') AS causes, h.health_day,
               coalesce(tl.last_ts, wl.last_w, CAST(ul.last_d AS TIMESTAMPTZ)) AS last_data,
               CASE coalesce(h.status, 'unknown') WHEN 'alert' THEN 3 WHEN 'watch' THEN 2
                    WHEN 'normal' THEN 1 ELSE 0 END AS _rank
        FROM units u LEFT JOIN h USING (unit_id) LEFT JOIN tl USING (unit_id)
        LEFT JOIN wl USING (unit_id) LEFT JOIN ul USING (unit_id)
        ORDER BY _rank DESC, h.days_to_limit ASC NULLS FIRST, h.since ASC NULLS LAST,
                 u.unit_id"""
    df = _q(source, sql, **params)
    return (df.drop("_rank").with_row_index("urgency", offset=1)
            .select([c for c in df.columns if c != "_rank"] + ["urgency"]))


def status_counts(overview: pl.DataFrame) -> pl.DataFrame:
    """Units per status from :func:`fleet_overview`: every level present (0 when none),
    'unknown' only when some unit has it. Columns: status, count. Ordered normal..alert."""
    counts = dict(overview.group_by("status").len().iter_rows()) if overview.height else {}
    levels = [s for s in STATUS_ORDER if s != "unknown" or counts.get("unknown")]
    return pl.DataFrame({"status": levels, "count": [int(counts.get(s, 0)) for s in levels]},
                        schema={"status": pl.String, "count": pl.Int64})


def health_changes(source: Any, week: IsoWeek) -> pl.DataFrame:
    """Status at the end of ``week`` against the end of the week before, per unit.

    Columns: unit_id, status_prev, status (null: no row yet), change. ``change`` is 'new'
    (needs action now, did not last week), 'escalated' (watch -> alert), 'eased'
    (alert -> watch), 'still open' (same watch/alert), 'cleared' (needed action last week,
    not now) or 'none' (normal both weeks).
    """
    params = {"d_now": week.sunday, "d_prev": week.previous().sunday}
    sql = """
        WITH cur AS (SELECT unit_id, status FROM health WHERE day <= $d_now
                     QUALIFY row_number() OVER (PARTITION BY unit_id ORDER BY day DESC) = 1),
             prev AS (SELECT unit_id, status FROM health WHERE day <= $d_prev
                      QUALIFY row_number() OVER (PARTITION BY unit_id ORDER BY day DESC) = 1)
        SELECT coalesce(cur.unit_id, prev.unit_id) AS unit_id,
               prev.status AS status_prev, cur.status AS status
        FROM cur FULL OUTER JOIN prev USING (unit_id) ORDER BY unit_id"""
    df = _q(source, sql, **params)
    act = ("watch", "alert")
    now_act = pl.col("status").is_in(act).fill_null(False)
    prev_act = pl.col("status_prev").is_in(act).fill_null(False)
    change = (pl.when(now_act & ~prev_act).then(pl.lit("new"))
              .when(~now_act & prev_act).then(pl.lit("cleared"))
              .when(now_act & (pl.col("status") == "alert") & (pl.col("status_prev") == "watch"))
              .then(pl.lit("escalated"))
              .when(now_act & (pl.col("status") == "watch") & (pl.col("status_prev") == "alert"))
              .then(pl.lit("eased"))
              .when(now_act).then(pl.lit("still open"))
              .otherwise(pl.lit("none")))
    return df.with_columns(change.alias("change"))


def changes_summary(changes: pl.DataFrame) -> dict[str, Any]:
    """Counts and unit lists from :func:`health_changes` for the report and summary.json.

    Keys: new, new_alerts (units now in alert that were not last week), escalated, eased,
    still_open (includes escalated and eased), cleared; each maps to a sorted unit list.
    """
    def units(expr: pl.Expr) -> list[str]:
        return sorted(changes.filter(expr)["unit_id"].to_list()) if changes.height else []

    ch = pl.col("change")
    return {
        "new": units(ch == "new"),
        "new_alerts": units((pl.col("status") == "alert")
                            & (pl.col("status_prev").fill_null("") != "alert")),
        "escalated": units(ch == "escalated"),
        "eased": units(ch == "eased"),
        "still_open": units(ch.is_in(["still open", "escalated", "eased"])),
        "cleared": units(ch == "cleared"),
    }


# ----------------------------------------------------------------------------- slip evidence
@dataclass
class SlipSeries:
    """Daily steady slip at load for one unit, its trend and the days-to-limit band.

    points: day, slip_at_load (-). trend: day, level (-), part ('fit' since the last wear
    reset, 'forecast' beyond as_of). band: 0 or 1 row: as_of, low (earliest crossing day),
    mid (median crossing day, null: none), high (latest crossing day; open ranges stop at
    the chart's forecast end), high_open (bool). limit: the slip limit (-).
    """

    unit_id: str
    points: pl.DataFrame
    trend: pl.DataFrame
    band: pl.DataFrame
    limit: float
    as_of: dt.date | None = None
    days_to_limit: float | None = None
    note: str | None = None


def unit_slip_series(source: Any, unit_id: str, start: Any = None, end: Any = None,
                     limit: float | None = None, forecast_days_max: int = 90) -> SlipSeries:
    """Daily ``slip_at_load`` of one unit with its latest Theil-Sen trend (as of ``end``).

    ``limit`` defaults to the trend row's limit, else the slip_limit default. The forecast
    and band are cut at ``forecast_days_max`` days after as_of (domain.md 3.7: suppress
    forecasts far beyond the data span).
    """
    return slip_series_for_units(source, [unit_id], start, end, limit,
                                 forecast_days_max)[unit_id]


def slip_series_for_units(source: Any, unit_ids: Sequence[str], start: Any = None,
                          end: Any = None, limit: float | None = None,
                          forecast_days_max: int = 90) -> dict[str, SlipSeries]:
    """:func:`unit_slip_series` for many units with two queries (the report's path)."""
    unit_ids = list(unit_ids)
    params: dict = {}
    uf = _unit_filter("unit_id", unit_ids, params)
    df_ = _day_filter("day", start, end, params)
    tparams: dict = {}
    tuf = _unit_filter("unit_id", unit_ids, tparams)
    tdf = _day_filter("as_of", None, end, tparams)
    with _session(source, ["unit_days", "trends"]) as con:
        points = con.sql(f"""SELECT unit_id, day, slip_at_load FROM unit_days
                             WHERE {uf} AND {df_} AND slip_at_load IS NOT NULL
                             ORDER BY unit_id, day""", params=params).pl()
        trends = con.sql(f"""SELECT * FROM trends WHERE {tuf} AND {tdf}
                             AND indicator = 'slip_at_load'
                             QUALIFY row_number() OVER (PARTITION BY unit_id
                                                        ORDER BY as_of DESC) = 1""",
                         params=tparams).pl()
    by_unit = {k[0]: v.drop("unit_id") for k, v in points.partition_by(
        "unit_id", as_dict=True).items()} if points.height else {}
    trows = {r["unit_id"]: r for r in trends.iter_rows(named=True)}
    empty_points = pl.DataFrame(schema={"day": pl.Date, "slip_at_load": pl.Float64})
    return {u: _slip_series(u, by_unit.get(u, empty_points), trows.get(u), limit,
                            forecast_days_max) for u in unit_ids}


def _slip_series(unit_id: str, points: pl.DataFrame, r: dict | None, limit: float | None,
                 forecast_days_max: int) -> SlipSeries:
    trend_schema = {"day": pl.Date, "level": pl.Float64, "part": pl.String}
    band_schema = {"as_of": pl.Date, "low": pl.Date, "mid": pl.Date, "high": pl.Date,
                   "high_open": pl.Boolean}
    trend = pl.DataFrame(schema=trend_schema)
    band = pl.DataFrame(schema=band_schema)
    if limit is None:
        limit = r["limit"] if r is not None and r["limit"] is not None else default_slip_limit()
    if r is None:
        return SlipSeries(unit_id, points, trend, band, float(limit))
    as_of, since, slope, level = r["as_of"], r["since"], r["slope_per_day"], r["level_now"]
    dtl, lo, hi = r["days_to_limit"], r["days_to_limit_low"], r["days_to_limit_high"]
    fmax = float(forecast_days_max)
    if slope is not None and level is not None:
        first = max(since, points["day"].min()) if points.height and since else since or as_of
        rows = [(d, level + slope * (d - as_of).days, part)
                for d, part in ((first, "fit"), (as_of, "fit"), (as_of, "forecast"))]
        horizon = min(fmax, dtl if dtl is not None else fmax)
        end_d = as_of + dt.timedelta(days=max(1, int(round(horizon))))
        rows.append((end_d, level + slope * (end_d - as_of).days, "forecast"))
        trend = pl.DataFrame(rows, schema=trend_schema, orient="row")
    if dtl is not None or lo is not None:
        def day_at(x: float | None) -> dt.date | None:
            return None if x is None else as_of + dt.timedelta(days=int(round(min(x, fmax))))
        band = pl.DataFrame([{
            "as_of": as_of, "low": day_at(lo if lo is not None else dtl), "mid": day_at(dtl),
            "high": day_at(hi if hi is not None else fmax),
            "high_open": hi is None or hi > fmax}], schema=band_schema)
    return SlipSeries(unit_id, points, trend, band, float(limit), as_of, dtl, r.get("note"))


@dataclass
class CreepComparison:
    """Creep (steady slip) versus load: this week against the unit's reference weeks.

    points: load (N*m), slip (-), period ('this week' / 'reference'), ratio_bin.
    lines: load, slip, period, ratio_bin, series (fitted s = a + b*load per week and bin;
    reference weeks pooled by their median a and b). fits: period, ratio_bin, a, b, n.
    """

    unit_id: str
    week: IsoWeek
    points: pl.DataFrame
    lines: pl.DataFrame
    fits: pl.DataFrame

    @property
    def b_ratio(self) -> float | None:
        """Median compliance b this week over the reference median (None when either is
        missing): above 1 means slip grows faster with load than it used to (preload loss,
        domain.md 2.6)."""
        f = self.fits
        cur = f.filter(pl.col("period") == "this week")["b"].drop_nulls()
        ref = f.filter(pl.col("period") == "reference")["b"].drop_nulls()
        if not len(cur) or not len(ref) or ref.median() in (None, 0):
            return None
        return float(cur.median() / ref.median())


def creep_week_vs_reference(source: Any, unit_id: str, week: IsoWeek,
                            timezone: str = "UTC", max_points: int = 150) -> CreepComparison:
    """Steady windows (load_mean, slip_mean) of ``week`` and of the unit's reference weeks
    (creep_fits.is_reference), with the weekly fits s = a + b*load drawn over the observed
    load range. At most ``max_points`` points per period (evenly thinned)."""
    return creep_for_units(source, [unit_id], week, timezone, max_points)[unit_id]


def creep_for_units(source: Any, unit_ids: Sequence[str], week: IsoWeek,
                    timezone: str = "UTC", max_points: int = 150
                    ) -> dict[str, CreepComparison]:
    """:func:`creep_week_vs_reference` for many units with two queries (one windows scan)."""
    unit_ids = list(unit_ids)
    t0, t1 = week.bounds_utc(timezone)
    with _session(source, ["creep_fits", "windows"]) as con:
        fits = con.sql("""
            SELECT unit_id,
                   CASE WHEN week_start = $w THEN 'this week' ELSE 'reference' END AS period,
                   week_start, ratio_bin, a, b, n
            FROM creep_fits
            WHERE list_contains($us, unit_id)
              AND (week_start = $w OR (is_reference AND week_start < $w))
            ORDER BY unit_id, period, week_start, ratio_bin""",
                       params={"us": unit_ids, "w": week.monday}).pl()
        refs = fits.filter(pl.col("period") == "reference").select(
            "unit_id", "week_start").unique()
        first_day = min([week.monday - dt.timedelta(days=1)] + refs["week_start"].to_list())
        con.register("_fw_refs", refs.to_arrow())
        try:
            points = con.sql("""
                SELECT w.unit_id, w.load_mean AS load, w.slip_mean AS slip,
                       CASE WHEN w.window_start >= $t0 AND w.window_start < $t1
                            THEN 'this week' ELSE 'reference' END AS period,
                       w.ratio_cmd_mean AS ratio_cmd
                FROM windows w
                LEFT JOIN _fw_refs r ON r.unit_id = w.unit_id
                     AND r.week_start = CAST(date_trunc('week', w.day) AS DATE)
                WHERE list_contains($us, w.unit_id) AND w.day >= $d0 AND w.day <= $d1
                  AND w.steady_samples > 0 AND w.load_mean IS NOT NULL
                  AND w.slip_mean IS NOT NULL
                  AND ((w.window_start >= $t0 AND w.window_start < $t1)
                       OR r.week_start IS NOT NULL)
                ORDER BY w.unit_id, w.window_start""",
                             params={"us": unit_ids, "t0": t0, "t1": t1, "d0": first_day,
                                     "d1": week.sunday + dt.timedelta(days=1)}).pl()
        finally:
            con.unregister("_fw_refs")
    pts = {k[0]: v for k, v in points.partition_by("unit_id", as_dict=True).items()} \
        if points.height else {}
    fts = {k[0]: v for k, v in fits.partition_by("unit_id", as_dict=True).items()} \
        if fits.height else {}
    return {u: _creep(u, week, pts.get(u, points.clear()), fts.get(u, fits.clear()),
                      max_points) for u in unit_ids}


def _creep(unit_id: str, week: IsoWeek, points: pl.DataFrame, fits: pl.DataFrame,
           max_points: int) -> CreepComparison:
    points = points.drop("unit_id")
    fits = fits.drop("unit_id")
    parts = []
    for period in ("this week", "reference"):
        p = points.filter(pl.col("period") == period)
        if p.height > max_points:
            p = p.gather_every(-(-p.height // max_points))
        parts.append(p)
    points = pl.concat(parts)
    pooled = (fits.group_by("period", "ratio_bin")
              .agg(pl.col("a").median(), pl.col("b").median(), pl.col("n").sum())
              .sort("period", "ratio_bin"))
    lo = float(points["load"].min()) if points.height else 0.0
    hi = float(points["load"].max()) if points.height else 1.0
    lo, hi = min(lo, 0.0), max(hi, lo + 1e-9)
    line_rows = []
    for r in pooled.iter_rows(named=True):
        if r["a"] is None or r["b"] is None:
            continue
        for x in (lo, hi):
            line_rows.append((x, r["a"] + r["b"] * x, r["period"], r["ratio_bin"],
                              f"{r['period']}, ratio {r['ratio_bin']:g}"))
    lines = pl.DataFrame(line_rows, orient="row", schema={
        "load": pl.Float64, "slip": pl.Float64, "period": pl.String,
        "ratio_bin": pl.Float64, "series": pl.String})
    return CreepComparison(unit_id, week, points, lines, pooled)


# ----------------------------------------------------------------------------- events
def unit_events(source: Any, unit_id: str | Sequence[str] | None = None,
                kinds: Iterable[str] | None = None, start: Any = None,
                end: Any = None) -> pl.DataFrame:
    """Events (gross_slip, stall, ...) starting in [start, end) for one unit, some or all.

    A bare date ``end`` includes that whole day. Columns: unit_id, line, kind, start_ts,
    end_ts, duration_s, samples, peak, ratio_cmd, signal, description. Sorted by start_ts.
    """
    params: dict = {}
    uf = _unit_filter("unit_id", unit_id, params)
    tf = _ts_filter("start_ts", start, end, params)
    kf = "true"
    if kinds is not None:
        params["kinds"] = list(kinds)
        kf = "list_contains($kinds, kind)"
    return _q(source, f"""
        SELECT unit_id, {_line()} AS line, kind, start_ts, end_ts,
               epoch(end_ts - start_ts) AS duration_s, samples, peak, ratio_cmd, signal,
               description
        FROM events WHERE {uf} AND {tf} AND {kf} ORDER BY start_ts, unit_id""", **params)


def maintenance_markers(source: Any, unit_id: str | Sequence[str] | None = None,
                        start: Any = None, end: Any = None) -> pl.DataFrame:
    """Maintenance log entries: unit_id, ts, day (UTC), action, note, resets_wear."""
    params: dict = {}
    uf = _unit_filter("unit_id", unit_id, params)
    tf = _ts_filter("ts", start, end, params)
    return _q(source, f"""
        SELECT unit_id, ts, CAST(ts AS DATE) AS day, action, note, resets_wear
        FROM maintenance WHERE {uf} AND {tf} ORDER BY ts, unit_id""", **params)


# ----------------------------------------------------------------------------- motor, energy
def motor_drift(source: Any, unit_id: str | Sequence[str] | None = None, start: Any = None,
                end: Any = None) -> pl.DataFrame:
    """Weekly motor constants (motor_fits) with week_start in [start, end].

    Columns: unit_id, line, week_start, r_ohm, k_e, r_drift_pct, k_e_drift_pct, n.
    Rising R points at connections or brushes; falling k_e at the motor (domain.md 1.4).
    """
    params: dict = {}
    uf = _unit_filter("unit_id", unit_id, params)
    df_ = _day_filter("week_start", start, end, params)
    return _q(source, f"""
        SELECT unit_id, {_line()} AS line, week_start, r_ohm, k_e, r_drift_pct,
               k_e_drift_pct, n
        FROM motor_fits WHERE {uf} AND {df_} ORDER BY unit_id, week_start""", **params)


def energy_summary(source: Any, start: Any = None, end: Any = None) -> pl.DataFrame:
    """Input energy and efficiency per unit over the days [start, end] (UTC days).

    Columns: unit_id, line, days, energy_in_kwh, efficiency_mean (measured, only units
    logging output torque; null elsewhere), power_resid_pct_mean (input-power residual
    against the unit's own reference model). Sorted by energy, largest first.
    """
    params: dict = {}
    df_ = _day_filter("day", start, end, params)
    return _q(source, f"""
        SELECT unit_id, {_line()} AS line, count(*) FILTER (WHERE samples > 0) AS days,
               sum(energy_in_wh) / 1000.0 AS energy_in_kwh,
               avg(efficiency) AS efficiency_mean,
               avg(power_resid_pct) AS power_resid_pct_mean
        FROM unit_days WHERE {df_}
        GROUP BY unit_id ORDER BY energy_in_kwh DESC NULLS LAST, unit_id""", **params)


def advice_top(source: Any, limit: int = 10) -> pl.DataFrame:
    """Ratio advice worth acting on: the `advice` rows with status 'change', largest weekly
    saving first (at most ``limit``). Empty when `fleetwatch advise` has not run.

    Columns: unit_id, n_out_lo_rpm, n_out_hi_rpm, t_out_lo_nm, t_out_hi_nm, ratio_used,
    ratio_advised, saving_kwh_week, saving_kwh_week_low, saving_kwh_week_high, windows,
    torque_source, limited_by.
    """
    return _q(source, f"""
        SELECT unit_id, n_out_lo_rpm, n_out_hi_rpm, t_out_lo_nm, t_out_hi_nm, ratio_used,
               ratio_advised, saving_kwh_week, saving_kwh_week_low, saving_kwh_week_high,
               windows, torque_source, limited_by
        FROM advice WHERE status = 'change'
        ORDER BY saving_kwh_week DESC NULLS LAST, unit_id LIMIT {int(limit)}""")


def advice_totals(source: Any) -> dict:
    """Fleet totals of the `advice` table: rows by status and the summed weekly saving of
    the 'change' rows (kWh/week; the advisor's own fleet interval is in `fleetwatch advise`)."""
    df = _q(source, """
        SELECT count(*) AS bins, count(*) FILTER (WHERE status = 'change') AS change,
               sum(saving_kwh_week) FILTER (WHERE status = 'change') AS saving_kwh_week,
               count(DISTINCT unit_id) FILTER (WHERE status = 'change') AS units
        FROM advice""")
    row = df.row(0, named=True) if df.height else {}
    return {k: row.get(k) for k in ("bins", "change", "saving_kwh_week", "units")}


# ----------------------------------------------------------------------------- data quality
@dataclass
class DataQuality:
    """Data quality over a period of UTC days.

    completeness: unit_id, line, days_with_data, samples, completeness (mean of the daily
    completeness over every day of the period; a day without a row counts 0).
    quarantine: rule, kind, rows_in_period (ingested during the period), rows_total.
    silent_units: known units that sent no sample in the period.
    batches: files ingested in the period by status (ok/refused/skipped).
    """

    completeness: pl.DataFrame
    quarantine: pl.DataFrame
    silent_units: list[str]
    batches: pl.DataFrame
    days: int

    def totals(self) -> dict[str, Any]:
        c = self.completeness["completeness"]
        return {
            "units": self.completeness.height,
            "mean_completeness": None if not len(c) else round(float(c.mean()), 4),
            "units_below_90pct": int((c < 0.9).sum()) if len(c) else 0,
            "units_silent": len(self.silent_units),
            "silent_units": list(self.silent_units),
            "quarantined_rows_in_period": int(self.quarantine["rows_in_period"].sum() or 0),
            "quarantined_rows_total": int(self.quarantine["rows_total"].sum() or 0),
            "files_refused_in_period": int(self.batches.filter(pl.col("status") == "refused")
                                           ["files"].sum() or 0),
        }


def data_quality(source: Any, start: Any, end: Any) -> DataQuality:
    """Completeness per unit, quarantined rows by rule and silent units over [start, end].

    ``start``/``end`` are UTC days (inclusive). Quarantine rows are counted by the time they
    were ingested (the raw row may hold any time or none).
    """
    d0, d1 = _as_date(start), _as_date(end)
    ndays = (d1 - d0).days + 1
    t0, t1 = _as_utc(d0), _as_utc(d1, end=True)
    with _session(source, ["health", "unit_days", "maintenance", "quarantine",
                           "batches"]) as con:
        units = con.sql("""SELECT DISTINCT unit_id FROM (
                SELECT unit_id FROM health UNION ALL SELECT unit_id FROM unit_days
                UNION ALL SELECT unit_id FROM maintenance) WHERE unit_id IS NOT NULL""").pl()
        con.register("_fw_units", units.to_arrow())
        comp = con.sql(f"""
            SELECT u.unit_id, {_line('u.unit_id')} AS line,
                   count(d.day) FILTER (WHERE d.samples > 0) AS days_with_data,
                   CAST(coalesce(sum(d.samples), 0) AS BIGINT) AS samples,
                   coalesce(sum(d.completeness), 0) / $nd AS completeness
            FROM _fw_units u LEFT JOIN unit_days d
              ON d.unit_id = u.unit_id AND d.day >= $d0 AND d.day <= $d1
            GROUP BY u.unit_id ORDER BY completeness, u.unit_id""",
                       params={"d0": d0, "d1": d1, "nd": float(ndays)}).pl()
        con.unregister("_fw_units")
        quar = con.sql("""
            SELECT coalesce(rule, '(none)') AS rule, coalesce(kind, '') AS kind,
                   count(*) FILTER (WHERE ingested_at >= $t0 AND ingested_at < $t1)
                       AS rows_in_period,
                   count(*) AS rows_total
            FROM quarantine GROUP BY ALL ORDER BY rows_in_period DESC, rows_total DESC, rule""",
                       params={"t0": t0, "t1": t1}).pl()
        batches = con.sql("""
            SELECT status, count(*) AS files, CAST(sum(rows_read) AS BIGINT) AS rows_read,
                   CAST(sum(quarantined) AS BIGINT) AS quarantined
            FROM batches WHERE started_at >= $t0 AND started_at < $t1
            GROUP BY status ORDER BY status""", params={"t0": t0, "t1": t1}).pl()
    silent = sorted(comp.filter(pl.col("samples") == 0)["unit_id"].to_list())
    return DataQuality(comp, quar, silent, batches, ndays)


# ----------------------------------------------------------------------------- unit history
def health_history(source: Any, unit_id: str, start: Any = None, end: Any = None
                   ) -> pl.DataFrame:
    """Daily status of one unit: day, status, since, days_to_limit, reasons, causes."""
    params: dict = {}
    uf = _unit_filter("unit_id", unit_id, params)
    df_ = _day_filter("day", start, end, params)
    return _q(source, f"""SELECT day, status, since, days_to_limit, reasons, causes
                          FROM health WHERE {uf} AND {df_} ORDER BY day""", **params)


def anomaly_scores(source: Any, unit_id: str | Sequence[str] | None = None, start: Any = None,
                   end: Any = None) -> pl.DataFrame:
    """Isolation-forest scores (paper scale, 0.5 = nothing distinct): unit_id, day, score,
    is_reference, top_features."""
    params: dict = {}
    uf = _unit_filter("unit_id", unit_id, params)
    df_ = _day_filter("day", start, end, params)
    return _q(source, f"""SELECT unit_id, day, score, is_reference, top_features FROM scores
                          WHERE {uf} AND {df_} ORDER BY unit_id, day""", **params)


#: Bucket lengths (s) for downsampled series: whole minutes, hours or days that divide a
#: day (or are whole days), so buckets start at round UTC times and read as "3-hour means".
NICE_BUCKETS_S = (60, 120, 300, 600, 900, 1200, 1800, 3600, 7200, 10800, 14400, 21600,
                  28800, 43200, 86400, 2 * 86400, 3 * 86400, 7 * 86400, 14 * 86400)


def bucket_seconds(span_s: float, max_points: int) -> int:
    """The shortest bucket of :data:`NICE_BUCKETS_S` that cuts ``span_s`` seconds into at
    most ``max_points`` buckets (beyond the list: the exact length needed)."""
    need = max(1, int(-(-span_s // max(1, max_points))))
    return next((b for b in NICE_BUCKETS_S if b >= need), need)


def _bucketed(source: Any, unit_id: str, start: Any, end: Any, select: str,
              max_points: int, from_sql: str = "windows w", where: str = "true"
              ) -> pl.DataFrame:
    """Window-level series of one unit averaged into time buckets so that at most about
    ``max_points`` rows come back (charts stay light; Altair's row cap is 5000). Buckets
    are round lengths (:func:`bucket_seconds`: 1 h, 3 h, 6 h, 1 day...) aligned on UTC
    midnight; ``ts`` is the bucket's start."""
    params: dict = {}
    uf = _unit_filter("w.unit_id", unit_id, params)
    tf = _ts_filter("w.window_start", start, end, params)
    with _session(source, ["windows", "efficiency"]) as con:
        lo, hi, n = con.sql(f"""SELECT min(w.window_start), max(w.window_start), count(*)
                                FROM windows w WHERE {uf} AND {tf} AND {where}""",
                            params=params).fetchall()[0]
        ts_expr = "w.window_start"
        if n and n > max_points and lo is not None:
            params["b"] = bucket_seconds((hi - lo).total_seconds(), max_points)
            ts_expr = "to_timestamp(floor(epoch(w.window_start) / $b) * $b)"
        sql = f"""SELECT {ts_expr} AS ts, {select}
                  FROM {from_sql} WHERE {uf} AND {tf} AND {where}
                  GROUP BY ALL ORDER BY ts"""
        return _fix_tz(con.sql(sql, params=params).pl())


def ratio_series(source: Any, unit_id: str, start: Any = None, end: Any = None,
                 max_points: int = 2000) -> pl.DataFrame:
    """Commanded against actual ratio over steady windows: ts, ratio_cmd, ratio_cmd_lo,
    ratio_cmd_hi, ratio_act, ratio_error (-, (act - cmd)/cmd).

    Where a bucket holds several windows, ratio_cmd is the median of their commanded
    ratios taken as one of them (``quantile_disc``): a set point that was commanded, not an
    average of two set points that never was; ratio_cmd_lo and ratio_cmd_hi give the range
    commanded in the bucket. The actual ratio and the tracking error are means."""
    return _bucketed(source, unit_id, start, end,
                     "quantile_disc(w.ratio_cmd_mean, 0.5) AS ratio_cmd, "
                     "min(w.ratio_cmd_mean) AS ratio_cmd_lo, "
                     "max(w.ratio_cmd_mean) AS ratio_cmd_hi, "
                     "avg(w.ratio_act_mean) AS ratio_act, "
                     "avg(w.ratio_error) AS ratio_error", max_points,
                     where="w.steady_samples > 0")


def power_series(source: Any, unit_id: str, start: Any = None, end: Any = None,
                 max_points: int = 2000) -> pl.DataFrame:
    """Input power with efficiency (measured units) or the input-power residual:
    ts, p_in_w, efficiency (-, null unless measured), power_resid_pct (%), method."""
    return _bucketed(
        source, unit_id, start, end,
        "avg(w.p_in_mean) AS p_in_w, avg(e.efficiency) AS efficiency, "
        "avg(e.power_resid_pct) AS power_resid_pct, any_value(e.method) AS method",
        max_points,
        from_sql="windows w LEFT JOIN efficiency e "
                 "ON e.unit_id = w.unit_id AND e.window_start = w.window_start",
        where="w.steady_samples > 0")


def temperature_series(source: Any, unit_id: str, start: Any = None, end: Any = None,
                       max_points: int = 2000) -> pl.DataFrame:
    """Mean temperature (degC) over time: ts, temp_c. Empty when the unit logs none."""
    return _bucketed(source, unit_id, start, end, "avg(w.temp_mean) AS temp_c", max_points,
                     where="w.temp_mean IS NOT NULL")


# ----------------------------------------------------------------------------- fleet trends
def fleet_slip_distribution(source: Any, start: Any = None, end: Any = None) -> pl.DataFrame:
    """Per ISO week (Monday, UTC days): quantiles of the units' weekly median slip_at_load.

    Each unit counts once per week (its median day), so a chatty unit cannot dominate.
    Columns: week_start, units, p10, p25, p50, p75, p90, max (all slip, -).
    """
    params: dict = {}
    df_ = _day_filter("day", start, end, params)
    return _q(source, f"""
        WITH uw AS (
            SELECT CAST(date_trunc('week', day) AS DATE) AS week_start, unit_id,
                   median(slip_at_load) AS slip
            FROM unit_days WHERE {df_} AND slip_at_load IS NOT NULL GROUP BY ALL)
        SELECT week_start, count(*) AS units,
               quantile_cont(slip, 0.10) AS p10, quantile_cont(slip, 0.25) AS p25,
               quantile_cont(slip, 0.50) AS p50, quantile_cont(slip, 0.75) AS p75,
               quantile_cont(slip, 0.90) AS p90, max(slip) AS max
        FROM uw GROUP BY week_start ORDER BY week_start""", **params)
