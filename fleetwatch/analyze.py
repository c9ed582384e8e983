"""Analyze: telemetry -> windows, events, unit_days and the fit tables, then the health models.

``analyze(settings, full=False, progress=None)`` takes the lake's writer lock, runs the SQL
models of ``fleetwatch/sql`` in DuckDB over the lake's views and the per-unit fits of
``fleetwatch.fits``, writes the derived tables (each write one atomic table commit: readers
see the old or the new version), and finally calls ``fleetwatch.models.run_models`` when
that stage is installed.

Incremental by default. A small state file in the lake (``_fleetwatch/analyze_state.json``)
records what the derived tables reflect: telemetry rows per UTC day, each unit's first
sample, the wear resets and a fingerprint of the analyze settings, the SQL files and
fits.py. The next run compares the rows per day (cheap: ``day`` is the partition column)
and recomputes from the Monday on or before the day before the earliest changed day (or
the unit's previous sample, so a pause that ends in new data is whole; or the start of a
reference period that the new data falls in, because everything after it leans on that
reference) up to the end of the data. Whole ISO weeks, so the weekly fits of the
affected weeks see all their samples. A change of the analyze settings or of the SQL files,
a missing derived table or ``full=True`` rebuilds everything.

Memory: the work runs in chunks of whole weeks (about ``CHUNK_ROWS`` telemetry rows each)
on a DuckDB connection with a memory limit (``DUCKDB_MEMORY_LIMIT``) and a spill folder;
per-sample data never leaves DuckDB; only window-level rows (steady windows for the creep
fits) and small aggregates come into Python.
"""
from __future__ import annotations

import datetime as dt
import gc
import hashlib
import json
import os
import shutil
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Optional

import polars as pl

from . import fits, physics
from .errors import ConfigError, LakeError
from .schema import TABLES
from .sqlmodels import load_models, run_model

__all__ = ["analyze", "AnalyzeReport", "AnalysisPlan", "run_analysis", "plan_analysis",
           "state_after",
           "ANALYZE_SETTINGS", "DERIVED", "CHUNK_ROWS", "STATE_FILE", "PARTITIONED"]

UTC = dt.timezone.utc

#: Tables analyze writes (the fit tables included).
DERIVED = ("windows", "events", "unit_days", "motor_fits", "creep_fits", "efficiency")
#: Telemetry rows per processing chunk (whole ISO weeks; bounds memory).
CHUNK_ROWS = 4_000_000
#: Steady windows per batch of units in the fit phase (bounds the Python-side frames).
FIT_BATCH_WINDOWS = 1_500_000
#: DuckDB memory limit of the analyze connection while it works through the samples (it
#: spills to a temp folder beyond) ...
DUCKDB_MEMORY_LIMIT = "2GB"
#: ... and afterwards, while the fits hold window-level frames in Python and the lake
#: writes Arrow copies of the derived tables.
DUCKDB_WRITE_MEMORY_LIMIT = "256MB"
#: Derived tables stored partitioned (``lake.overwrite(..., partition_by=...)``), as
#: declared in schema.TABLES; a change changes the fingerprint (one full rebuild). windows
#: and efficiency are NOT partitioned by day, although an incremental run would then swap
#: whole daily folders instead of rewriting the two tables: a year of daily files made the
#: dashboard's Fleet page first render 3.8 s instead of 2.1 s and its Unit page 3.0 s
#: instead of 2.2 s (24 units x 365 days, idle machine, 2026-12-02), a cost paid by people,
#: where the rewrite costs the scheduled job seconds.
PARTITIONED = {name: list(TABLES[name].partition_by) for name in DERIVED
               if TABLES[name].partition_by}
#: State file inside the lake folder.
STATE_FILE = "_analyze_state.json"
#: Settings whose change invalidates every derived row (a full rebuild follows).
ANALYZE_SETTINGS = ("window_min", "sample_period_s", "steady_n_in_min_rpm", "steady_settle_s",
                    "gross_slip_limit", "gross_slip_min_samples", "stall_i_a",
                    "stall_n_in_max_rpm", "stall_min_s", "flatline_min_s", "gap_min_s",
                    "clock_jump_s", "ratio_bin_width", "reference_days", "load_ref_nm",
                    "motor_i0_a")
_EPOCH_MONDAY = dt.date(1970, 1, 5)


@dataclass
class AnalyzeReport:
    """What one analyze run did.

    ``tables``: rows written per table (rows of the recomputed range for an incremental
    run); ``days_recomputed``: UTC days whose derived rows were rebuilt; ``from_day`` /
    ``to_day``: the range (``to_day`` exclusive); ``full``: a full rebuild; ``reason``:
    why this range; ``models``: what the health stage did; ``elapsed_s``: wall time.
    """

    tables: dict[str, int] = field(default_factory=dict)
    days_recomputed: int = 0
    units: int = 0
    from_day: Optional[dt.date] = None
    to_day: Optional[dt.date] = None
    full: bool = False
    reason: str = ""
    models: str = ""
    elapsed_s: float = 0.0

    def as_dict(self) -> dict[str, Any]:
        return {"tables": dict(self.tables), "days_recomputed": self.days_recomputed,
                "units": self.units,
                "from_day": self.from_day.isoformat() if self.from_day else None,
                "to_day": self.to_day.isoformat() if self.to_day else None,
                "full": self.full, "reason": self.reason, "models": self.models,
                "elapsed_s": round(self.elapsed_s, 3)}


@dataclass
class AnalysisPlan:
    """The range one run recomputes: [from_day, to_day), whole ISO weeks.

    ``day_counts`` (telemetry rows per UTC day), ``first_ts`` (first sample per unit) and
    ``resets`` (wear resets) describe the lake as analyzed; they become the next state.
    """

    full: bool
    from_day: Optional[dt.date]
    to_day: Optional[dt.date]
    reason: str
    day_counts: dict[dt.date, int]
    first_ts: dict[str, dt.datetime]
    resets: list[list[str]]
    fingerprint: str
    chunks: list[tuple[dt.date, dt.date]] = field(default_factory=list)

    @property
    def empty(self) -> bool:
        return self.from_day is None


# ---------------------------------------------------------------- small helpers
def _monday(d: dt.date) -> dt.date:
    return d - dt.timedelta(days=d.weekday())


def _ts(d: dt.date) -> dt.datetime:
    return dt.datetime(d.year, d.month, d.day, tzinfo=UTC)


def _has_view(con, name: str) -> bool:
    q = ("SELECT count(*) FROM duckdb_views() WHERE view_name = $n AND database_name IN "
         "('memory', 'temp') UNION ALL SELECT count(*) FROM duckdb_tables() "
         "WHERE table_name = $n AND database_name IN ('memory', 'temp')")
    return sum(r[0] for r in con.execute(q, {"n": name}).fetchall()) > 0


def fingerprint(settings: Any) -> str:
    """Hash of the analyze settings and the SQL model files: a change forces a rebuild."""
    h = hashlib.sha256()
    for name in ANALYZE_SETTINGS:
        h.update(f"{name}={settings[name]!r};".encode())
    for m in load_models():
        h.update(m.sql.encode())
    h.update(Path(fits.__file__).read_bytes())
    h.update(f"partitioned={sorted(PARTITIONED.items())!r}".encode())
    return h.hexdigest()[:16]


def _check_settings(settings: Any) -> None:
    wm = settings["window_min"]
    if wm <= 0 or 1440 % wm:
        raise ConfigError(f"window_min = {wm} does not divide a day (1440 min)",
                          hint="Use a divisor of 1440, e.g. 5, 10, 15, 30 or 60.")
    if settings["sample_period_s"] <= 0:
        raise ConfigError("sample_period_s must be positive",
                          hint="Set it to the logging period of the drives, e.g. 60.")
    if settings["ratio_bin_width"] <= 0:
        raise ConfigError("ratio_bin_width must be positive", hint="E.g. 0.5.")


def _context_s(settings: Any) -> float:
    """Context read on both sides of a chunk: settle time, flatlines, pauses (>= 1 day)."""
    return float(max(86400.0, 2 * settings["flatline_min_s"], 2 * settings["steady_settle_s"],
                     2 * settings["gap_min_s"]))


# ---------------------------------------------------------------- planning
def _first_ts(con, where: str = "", params: dict | None = None) -> dict[str, dt.datetime]:
    rows = con.execute(f"SELECT unit_id, min(ts) FROM telemetry {where} GROUP BY unit_id",
                       params or {}).fetchall()
    return {u: t.astimezone(UTC) for u, t in rows}


def plan_analysis(con, settings: Any, state: dict | None, full: bool,
                  have_derived: bool, day_counts: dict[dt.date, int] | None = None
                  ) -> AnalysisPlan:
    """Decide what to recompute from the lake views on ``con`` and the previous state.

    New telemetry is found by comparing rows per UTC day with the counts of the last run
    (``day_counts``, e.g. from the Delta log; counted on ``con`` when None); only the
    changed days are then read. Raises LakeError when there is no telemetry.
    """
    fp = fingerprint(settings)
    if not _has_view(con, "telemetry"):
        raise LakeError("the lake has no telemetry yet",
                        hint="Ingest drive logs first: fleetwatch ingest --mapping MAP LOGS...")
    if day_counts is None:
        day_counts = dict(con.execute(
            "SELECT day, count(*) FROM telemetry GROUP BY day").fetchall())
    if not day_counts:
        raise LakeError("the telemetry table is empty",
                        hint="Ingest drive logs first: fleetwatch ingest --mapping MAP LOGS...")
    first_day, last_day = min(day_counts), max(day_counts)
    end_day = _monday(last_day) + dt.timedelta(days=7)
    resets: list[list[str]] = []
    if _has_view(con, "maintenance"):
        resets = [[r[0], r[1].astimezone(UTC).isoformat()] for r in con.execute(
            "SELECT unit_id, ts FROM maintenance WHERE resets_wear ORDER BY unit_id, ts"
        ).fetchall()]

    def whole(reason: str) -> AnalysisPlan:
        return AnalysisPlan(True, _monday(first_day), end_day, reason, day_counts,
                            _first_ts(con), resets, fp)

    if full:
        return whole("full rebuild requested")
    if not state or not have_derived or "day_counts" not in state:
        return whole("first analyze of this lake")
    if state.get("fingerprint") != fp:
        return whole("analyze settings or SQL models changed since the last run")

    old_counts = {dt.date.fromisoformat(d): n for d, n in state["day_counts"].items()}
    changed = sorted(d for d in set(day_counts) | set(old_counts)
                     if day_counts.get(d) != old_counts.get(d))
    first = {u: dt.datetime.fromisoformat(t) for u, t in state.get("first_ts", {}).items()}
    starts: list[dt.datetime] = []
    if changed:
        con.execute("CREATE OR REPLACE TEMP TABLE _changed_days (day DATE)")
        con.executemany("INSERT INTO _changed_days VALUES (?)", [[d] for d in changed])
        # constant day bounds let the scans skip the other partitions
        con.execute("""
            CREATE OR REPLACE TEMP TABLE _nb AS
            SELECT unit_id, min(ts) AS first_new, min(day) AS first_new_day
            FROM telemetry
            WHERE day >= $lo AND day <= $hi AND day IN (SELECT day FROM _changed_days)
            GROUP BY unit_id""", {"lo": changed[0], "hi": changed[-1]})
        nb = con.execute("SELECT unit_id, first_new, first_new_day FROM _nb").fetchall()
        # each unit's previous sample, at most 31 days back: first in the day of its first
        # new sample and the day before (where it almost always is), then further back
        # for the units without one there
        prev: dict[str, Any] = {}
        for back in (1, 31):
            todo = [r for r in nb if r[0] not in prev]
            if not todo:
                break
            lo = min(r[2] for r in todo) - dt.timedelta(days=back)
            hi = max(r[2] for r in todo)
            prev.update(con.execute("""
                SELECT nb.unit_id, max(t.ts) FROM telemetry AS t JOIN _nb AS nb USING (unit_id)
                WHERE t.ts < nb.first_new AND t.day >= nb.first_new_day - $back
                  AND t.day <= nb.first_new_day AND t.day >= $lo AND t.day <= $hi
                GROUP BY nb.unit_id""", {"back": back, "lo": lo, "hi": hi}).fetchall())
        rows = [(u, first_new, prev.get(u)) for u, first_new, _ in nb]
        con.execute("DROP TABLE _changed_days")
        con.execute("DROP TABLE _nb")
        starts.append(_ts(changed[0]))      # rows gone from a day also change its results
        seg_starts: dict[str, list[dt.datetime]] = {}
        for u, t in resets:
            seg_starts.setdefault(u, []).append(dt.datetime.fromisoformat(t))
        ref_days = dt.timedelta(days=int(settings["reference_days"]))
        for unit_id, first_new, prev_ts in rows:
            first_new = first_new.astimezone(UTC)
            # a pause that ends in the new data starts at the unit's previous sample
            starts.append(prev_ts.astimezone(UTC) if prev_ts is not None else first_new)
            if unit_id not in first or first_new < first[unit_id]:
                first[unit_id] = first_new
            # new data inside a reference period: everything after that reference leans on it
            cands = [first[unit_id]] + [x for x in seg_starts.get(unit_id, [])
                                        if x > first[unit_id]]
            ref_start = max((x for x in cands if x <= first_new), default=first[unit_id])
            if first_new < ref_start + ref_days:
                starts.append(ref_start)
        if any(d < min(old_counts, default=first_day) for d in changed) or \
                any(day_counts.get(d, 0) < old_counts.get(d, 0) for d in changed):
            first = _first_ts(con)              # data before the old start, or rows removed
    old_resets = {tuple(r) for r in state.get("resets", [])}
    for u, t in {tuple(r) for r in resets} ^ old_resets:
        starts.append(dt.datetime.fromisoformat(t))
    if not starts:
        return AnalysisPlan(False, None, None, "no new telemetry or maintenance since the "
                            "last analyze", day_counts, first, resets, fp)
    start = min(starts).astimezone(UTC).date() - dt.timedelta(days=1)
    from_day = max(_monday(start), _monday(first_day))
    what = f"{len(changed)} day(s) with new or changed telemetry" if changed else \
        "wear resets changed"
    return AnalysisPlan(False, from_day, end_day, what + " since the last analyze",
                        day_counts, first, resets, fp)


def _chunks(plan: AnalysisPlan) -> list[tuple[dt.date, dt.date]]:
    """Consecutive whole-week chunks of about CHUNK_ROWS telemetry rows."""
    per_week: dict[dt.date, int] = {}
    for d, n in plan.day_counts.items():
        per_week[_monday(d)] = per_week.get(_monday(d), 0) + n
    out: list[tuple[dt.date, dt.date]] = []
    a = wk = plan.from_day
    rows = 0
    while wk < plan.to_day:
        rows += per_week.get(wk, 0)
        nxt = wk + dt.timedelta(days=7)
        if rows >= CHUNK_ROWS or nxt >= plan.to_day:
            out.append((a, nxt))
            a, rows = nxt, 0
        wk = nxt
    return out


# ---------------------------------------------------------------- the work
def _schema_select(name: str, source: str, where: str = "") -> str:
    """SELECT of exactly the contract columns of table ``name`` with their types, in the
    order of the table's key (the lake's write then finds the rows sorted and keeps them
    as they are instead of sorting a copy)."""
    cols = ", ".join(f"CAST({c.name} AS {c.type}) AS {c.name}" for c in TABLES[name].columns)
    order = ", ".join(TABLES[name].key)
    return f"SELECT {cols} FROM {source} {where} ORDER BY {order}"


def run_analysis(con, settings: Any, plan: AnalysisPlan,
                 write: Callable[[str, Any, Optional[dt.date]], int],
                 progress: Optional[Callable[[int, Optional[int]], None]] = None,
                 prev=None, work_dir: str | os.PathLike | None = None) -> dict[str, int]:
    """Compute the derived tables for ``plan`` on ``con`` and hand each to ``write``.

    ``con``: DuckDB connection with views ``telemetry`` and ``maintenance`` (optional) and
    no other names the models use (they create their tables on it; they spill to a
    temporary folder beyond the memory limit and are dropped at the end).
    ``prev``: connection with the previous ``windows``, ``events``, ``motor_fits`` and
    ``creep_fits`` (needed for an incremental plan: reference windows, old flatlines and the
    weeks before the range).
    ``write(name, arrow_table, from_day)`` stores one table: ``from_day`` None means replace
    the whole table, else replace its rows with ``day >= from_day``. Returns rows written
    per table.
    """
    _check_settings(settings)
    models = {m.name: m for m in load_models()}
    tmp = tempfile.mkdtemp(prefix="fleetwatch-analyze-", dir=work_dir)
    try:
        return _run(con, prev, settings, plan, write, progress, models, tmp)
    finally:
        for name in ("samples", "motor_sums", "windows", "window_power", "events",
                     "day_stats", "efficiency", "unit_days"):
            try:
                con.execute(f"DROP TABLE IF EXISTS {name}")
            except Exception:  # noqa: BLE001 - best effort; the spill folder goes below
                pass
        shutil.rmtree(tmp, ignore_errors=True)


def _release_memory() -> None:
    """Hand freed Python and Arrow memory back before a large allocation."""
    import pyarrow as pa

    gc.collect()
    pa.default_memory_pool().release_unused()


_WCOLS = ("unit_id", "window_start", "day", "steady_samples", "slip_mean", "load_mean",
          "load_source", "ratio_cmd_mean", "n_out_mean", "p_in_mean")


def _unit_batches(per_unit: dict[str, int], budget: int) -> list[list[str]]:
    """Units grouped so that each group holds about ``budget`` windows."""
    out: list[list[str]] = [[]]
    n = 0
    for u in sorted(per_unit):
        if out[-1] and n + per_unit[u] > budget:
            out.append([])
            n = 0
        out[-1].append(u)
        n += per_unit[u]
    return [b for b in out if b]


def _batch_windows(con, prev, units: list[str], from_ts: dt.datetime,
                   ref_days: tuple[dt.date, dt.date] | None = None
                   ) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Steady windows of ``units``: those just computed, and those plus the older windows of
    the units' reference periods (from the lake, for an incremental run; ``ref_days``: the
    first and last UTC day any reference period touches)."""
    cols = ", ".join(_WCOLS)
    con.register("_units", pl.DataFrame({"unit_id": units}).to_arrow())
    win_new = pl.from_arrow(con.sql(
        f"SELECT {cols} FROM windows WHERE steady_samples >= 2 "
        "AND unit_id IN (SELECT unit_id FROM _units)").to_arrow_table())
    con.unregister("_units")
    win_new = win_new.with_columns(pl.col("window_start").dt.convert_time_zone("UTC")
                                   .dt.cast_time_unit("us"))
    if prev is None:
        return win_new, win_new
    lo, hi = ref_days or (dt.date(1970, 1, 1), dt.date(9999, 12, 31))
    prev.register("_units", pl.DataFrame({"unit_id": units}).to_arrow())
    old = pl.from_arrow(prev.sql(
        f"SELECT {', '.join('w.' + c for c in _WCOLS)} "
        "FROM windows AS w JOIN _ref_periods AS r "
        "ON w.unit_id = r.unit_id AND w.window_start >= r.ref_start "
        "AND w.window_start < r.ref_end "
        "WHERE w.steady_samples >= 2 AND w.window_start < $f "
        # constant day bounds of all reference periods: the scan skips the other partitions
        "AND w.day >= $lo AND w.day <= $hi "
        "AND w.unit_id IN (SELECT unit_id FROM _units)",
        params={"f": from_ts, "lo": lo, "hi": hi}
    ).to_arrow_table())
    prev.unregister("_units")
    old = old.with_columns(pl.col("window_start").dt.convert_time_zone("UTC")
                           .dt.cast_time_unit("us"))
    return win_new, pl.concat([old.cast(win_new.schema), win_new])


def _run(con, prev, settings, plan: AnalysisPlan, write, progress, models, tmp
         ) -> dict[str, int]:
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"SET memory_limit = '{DUCKDB_MEMORY_LIMIT}'")
    con.execute(f"SET temp_directory = '{Path(tmp) / 'spill'}'")
    con.execute("SET preserve_insertion_order = false")

    chunks = _chunks(plan)
    plan.chunks = chunks
    total = len(chunks) + 4
    step = 0

    def tick() -> None:
        nonlocal step
        step += 1
        if progress:
            progress(step, total)

    full = plan.full
    first_ts = pl.DataFrame({"unit_id": list(plan.first_ts),
                             "first_ts": list(plan.first_ts.values())},
                            schema={"unit_id": pl.String, "first_ts": pl.Datetime("us", "UTC")})
    maint = None
    if _has_view(con, "maintenance"):
        maint = pl.from_arrow(con.sql(
            "SELECT unit_id, ts, resets_wear FROM maintenance").to_arrow_table())
        maint = maint.with_columns(pl.col("ts").dt.convert_time_zone("UTC")
                                   .dt.cast_time_unit("us"))
    segments = fits.unit_segments(first_ts, maint, int(settings["reference_days"]))
    old_motor = None
    if not full and prev is not None and _has_view(prev, "motor_fits"):
        old_motor = pl.from_arrow(prev.sql("SELECT * FROM motor_fits").to_arrow_table())

    ctx = _context_s(settings)
    motor_weeks: list[pl.DataFrame] = []
    for k, (a, b) in enumerate(chunks):
        rt = {"from_ts": _ts(a), "to_ts": _ts(b), "context_s": ctx,
              "alpha_per_k": physics.ALPHA_COPPER_PER_K}
        run_model(con, models["samples"], settings, rt)
        run_model(con, models["motor_sums"], settings, rt)
        sums = pl.from_arrow(con.sql("SELECT * FROM motor_sums").to_arrow_table())
        week_fits = fits.solve_motor_sums(sums)
        motor_weeks.append(week_fits.select("unit_id", "week_start", "n", "r_ohm", "k_e",
                                            "resid_std_v"))
        mc = fits.motor_constants_for_load(week_fits, old_motor, settings["motor_i0_a"])
        con.register("motor_constants", mc.to_arrow())
        first = k == 0
        for name in ("windows", "window_power", "events", "day_stats"):
            run_model(con, models[name], settings, rt, replace=first)
        con.execute("DROP TABLE samples")
        con.execute("DROP TABLE motor_sums")
        tick()

    # the per-sample work is done: DuckDB keeps (or spills) only window-level tables now
    con.execute(f"SET memory_limit = '{DUCKDB_WRITE_MEMORY_LIMIT}'")
    from_day = None if full else plan.from_day
    from_ts = _ts(plan.from_day)
    written: dict[str, int] = {}

    def store(name: str, where: str = "") -> None:
        """Hand table ``name`` (exactly its contract columns) to ``write``: one commit."""
        params = {"from_day": plan.from_day} if where else None
        tbl = con.sql(_schema_select(name, name, where), params=params).to_arrow_table()
        written[name] = write(name, tbl, from_day)
        del tbl
        _release_memory()

    # windows and events are final now: write them while Python holds little else (the
    # lake's write needs about 1.5 times the table on top of it). The windows move out of
    # DuckDB into one Arrow table that is both written and, as a view, read by the fits.
    win_tbl = con.sql(_schema_select("windows", "windows")).to_arrow_table()
    con.execute("DROP TABLE windows")
    con.register("windows", win_tbl)
    _release_memory()
    written["windows"] = write("windows", win_tbl, from_day)
    _release_memory()
    store("events", "" if full else "WHERE day >= $from_day")

    # -- motor fits: the new weeks, the untouched old weeks, drift against the reference
    new_motor = (pl.concat(motor_weeks) if motor_weeks else
                 pl.DataFrame(schema={"unit_id": pl.String, "week_start": pl.Date,
                                      "n": pl.Int64, "r_ohm": pl.Float64, "k_e": pl.Float64,
                                      "resid_std_v": pl.Float64}))
    if old_motor is not None and old_motor.height:
        keep = old_motor.filter(pl.col("week_start") < plan.from_day).select(
            new_motor.columns).cast(new_motor.schema)
        new_motor = pl.concat([keep, new_motor])
    motor_table = fits.motor_fits_with_drift(new_motor, first_ts, int(settings["reference_days"]))
    tick()

    # -- creep and power models, a batch of units at a time (window-level frames stay small)
    flat_sql = "SELECT unit_id, start_ts, end_ts, signal FROM events WHERE kind = 'flatline'"
    flat = pl.from_arrow(con.sql(flat_sql).to_arrow_table())
    if not full and prev is not None and _has_view(prev, "events"):
        old_flat = pl.from_arrow(prev.sql(flat_sql + " AND day < $d", params={
            "d": plan.from_day}).to_arrow_table())
        flat = pl.concat([old_flat.cast(flat.schema), flat])
    old_windows = not full and prev is not None and _has_view(prev, "windows")
    ref_days = None
    if old_windows:
        prev.register("_ref_periods", segments.select("unit_id", "ref_start", "ref_end")
                      .to_arrow())
        if segments.height:
            ref_days = (segments["ref_start"].min().date() - dt.timedelta(days=1),
                        segments["ref_end"].max().date() + dt.timedelta(days=1))
    per_unit = dict(con.execute("SELECT unit_id, count(*) FROM windows "
                                "WHERE steady_samples >= 2 GROUP BY unit_id").fetchall())
    creep_parts, daily_parts, pm_parts = [], [], []
    for units in _unit_batches(per_unit, FIT_BATCH_WINDOWS):
        win_new, ref_windows = _batch_windows(con, prev if old_windows else None, units,
                                              from_ts, ref_days)
        fl = flat.filter(pl.col("unit_id").is_in(units))
        cw_new = fits.drop_flatlined(fits.creep_windows(win_new, settings), fl,
                                     settings["window_min"])
        creep_parts.append(fits.creep_fits_weekly(cw_new, segments))
        ref_bins = fits.creep_reference_bins(
            fits.drop_flatlined(fits.creep_windows(ref_windows, settings), fl,
                                settings["window_min"]), segments)
        daily_parts.append(fits.creep_daily(cw_new, segments, ref_bins,
                                            settings["load_ref_nm"]))
        pm_parts.append(fits.power_models(ref_windows, segments))
        del win_new, ref_windows, cw_new
    creep_new = pl.concat(creep_parts) if creep_parts else fits.creep_fits_weekly(
        pl.DataFrame(), segments)
    daily = pl.concat(daily_parts) if daily_parts else fits.creep_daily(
        pl.DataFrame(), segments, pl.DataFrame(), 1.0)
    pm = pl.concat(pm_parts) if pm_parts else fits.power_models(pl.DataFrame(), segments)
    if not full and prev is not None and _has_view(prev, "creep_fits"):
        old = pl.from_arrow(prev.sql("SELECT * FROM creep_fits "
                                    "WHERE week_start < $f", params={"f": plan.from_day}
                                    ).to_arrow_table())
        creep_table = pl.concat([old.select(creep_new.columns).cast(creep_new.schema),
                                 creep_new])
    else:
        creep_table = creep_new
    con.register("creep_daily", daily.to_arrow())
    tick()

    # -- efficiency (normal-behaviour power model) and unit_days
    con.register("power_models", pm.to_arrow())
    run_model(con, models["efficiency"], settings, {})
    run_model(con, models["unit_days"], settings, {})
    tick()

    # -- write the rest (each table one atomic commit)
    for view in ("motor_constants", "creep_daily", "power_models"):
        con.unregister(view)
    del flat, daily
    con.unregister("windows")
    del win_tbl
    for name in ("window_power", "events", "day_stats"):
        con.execute(f"DROP TABLE {name}")
    store("efficiency")
    store("unit_days")
    for name, df in (("motor_fits", motor_table), ("creep_fits", creep_table)):
        cols = [c.name for c in TABLES[name].columns]
        written[name] = write(name, df.select(cols).sort(list(TABLES[name].key)).to_arrow(),
                              None)
    tick()
    return written


# ---------------------------------------------------------------- state and the lake
def _state_path(lake) -> Path:
    return Path(lake.path) / "_fleetwatch" / STATE_FILE


def _read_state(lake) -> dict | None:
    try:
        return json.loads(_state_path(lake).read_text(encoding="utf-8"))
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return None   # unreadable state: rebuild everything


def state_after(plan: AnalysisPlan) -> dict:
    """The state a run of ``plan`` leaves for the next run (JSON-ready)."""
    return {
        "fingerprint": plan.fingerprint,
        "day_counts": {d.isoformat(): n for d, n in sorted(plan.day_counts.items())},
        "first_ts": {u: t.isoformat() for u, t in sorted(plan.first_ts.items())},
        "resets": plan.resets,
        "from_day": plan.from_day.isoformat() if plan.from_day else None,
        "finished_at": dt.datetime.now(UTC).isoformat(),
    }


def _write_state(lake, plan: AnalysisPlan) -> None:
    p = _state_path(lake)
    p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(p.name + ".tmp")
    tmp.write_text(json.dumps(state_after(plan), indent=1), encoding="utf-8")
    os.replace(tmp, p)


def _run_health(lake, settings, full: bool = False) -> str:
    """Call fleetwatch.models.run_models when that stage is installed (``full``: over all
    days; else it starts from its saved state where that is still valid)."""
    try:
        from . import models as health_models
    except ModuleNotFoundError as exc:
        if exc.name and exc.name.startswith("fleetwatch.models"):
            return "health models not installed"
        raise
    run = getattr(health_models, "run_models", None)
    if run is None:
        return "health models not installed"
    res = run(lake, settings, full=full)
    counts = res.get("status_counts") if isinstance(res, dict) else None
    start = res.get("from_day") if isinstance(res, dict) else None
    what = "health models ran" + (f" from {start}" if start else "")
    if counts:
        return what + " (" + ", ".join(f"{k} {v}" for k, v in counts.items()) + ")"
    return what


def analyze(settings: Any, full: bool = False,
            progress: Optional[Callable[[int, Optional[int]], None]] = None) -> AnalyzeReport:
    """Compute the derived tables of the lake in ``settings.lake_path``, then the health stage.

    ``full``: rebuild every derived row (default: only the days with new telemetry, see
    the module docstring). ``progress``: optional callable ``(done, total)`` per step.
    Returns an AnalyzeReport. Raises LakeError when the lake has no telemetry,
    LockHeldError when another writer holds the lake, ConfigError for unusable settings.
    """
    from .lake import Lake

    t0 = time.perf_counter()
    _check_settings(settings)
    lake = Lake.from_settings(settings)
    report = AnalyzeReport()
    with lake.writer("analyze"):
        lake.recover()     # rows of an ingest batch killed half way must not be analyzed
        con = lake.connect(["telemetry", "maintenance"])
        prev = lake.connect(["windows", "events", "motor_fits", "creep_fits"])
        try:
            have = all(lake.has_table(t) for t in DERIVED)
            plan = plan_analysis(con, settings, _read_state(lake), full, have,
                                 lake.rows_per_partition("telemetry", "day"))
            report.full, report.reason = plan.full, plan.reason
            if not plan.empty:
                def write(name: str, data: Any, from_day: Optional[dt.date]) -> int:
                    part = PARTITIONED.get(name)
                    if from_day is None:
                        lake.overwrite(name, data, partition_by=part)
                    else:
                        lake.replace_where(name, data, f"day >= '{from_day.isoformat()}'",
                                           partition_by=part)
                    return data.num_rows

                report.tables = run_analysis(con, settings, plan, write, progress, prev)
                report.from_day, report.to_day = plan.from_day, plan.to_day
                end = min(plan.to_day, max(plan.day_counts) + dt.timedelta(days=1))
                report.days_recomputed = max(0, (end - plan.from_day).days)
                report.units = con.execute(
                    "SELECT count(DISTINCT unit_id) FROM telemetry WHERE day >= $d",
                    {"d": plan.from_day}).fetchall()[0][0]
                _write_state(lake, plan)
        finally:
            con.close()
            prev.close()
        report.models = _run_health(lake, settings, full=report.full)
    report.elapsed_s = time.perf_counter() - t0
    return report
