"""Analyze: telemetry -> windows, events, unit_days and the fit tables, then the health models.

``analyze(settings, full=False, progress=None)`` takes the lake's writer lock, runs the SQL
models of ``fleetwatch/sql`` in DuckDB over the lake's views and the per-unit fits of
``fleetwatch.fits``, writes the derived tables (each write one atomic table commit: readers
see the old or the new version), and finally calls ``fleetwatch.models.run_models`` when
that stage is installed.

Incremental by default. A small state file in the lake (``_fleetwatch/_analyze_state.json``)
records what the derived tables reflect: telemetry rows per UTC day, each unit's first
sample, the wear resets and a fingerprint of the analyze settings, the SQL files, fits.py,
sqlmodels.py and this file. The next run compares the rows per day (cheap: ``day`` is the partition column)
and recomputes from the day before the earliest changed day (or before the unit's previous
sample, so a pause that ends in new data is whole; or the start of a reference period that
the new data falls in, because everything after it leans on that reference) up to the end
of the data. The weekly fits of that first week still see the whole week: the state keeps
the per unit-day motor least-squares sums of the last two weeks (they add up), the creep
fits read the week's earlier windows back from the lake, and a window's motor-model load
uses the motor constants of an earlier week (fits.motor_constants_for_load), which new data
does not move. Without the sums, after removed rows, or for a unit with new data and no
usable motor fit before that week, the run starts on the Monday. Reference fits (creep per
ratio bin, input-power models) of units whose reference periods are over are kept next to
the state (``analyze_ref_*.parquet``) and reused. A change of the analyze settings or of the
SQL files, a missing derived table or ``full=True`` rebuilds everything.

Memory: the work runs in chunks of about ``CHUNK_ROWS`` telemetry rows ending on Mondays
on a DuckDB connection with a memory limit (``DUCKDB_MEMORY_LIMIT``) and a spill folder;
a chunk's per-sample rows (samples.sql's columns) are computed by polars
(``sqlmodels.samples_frame``: one sort and shifts instead of the file's two window passes,
about half the CPU; samples.sql stays the reference and tests hold the two equal) and
registered as the DuckDB view ``samples`` for the other models, then released (one chunk's
Arrow table at a time; polars builds it a slice of whole units at a time). Each chunk's
window-level tables (``CHUNK_TABLES``) then leave DuckDB as Parquet parts in the run's temp
folder (``_park_chunk``) and come back as views over the parts after the last chunk, so
DuckDB's memory does not fill up chunk after chunk. The large derived tables stream from
DuckDB into the lake (``Lake.write_stream``) a batch at a time, stored month by month
(``MONTH_ORDERED``, sorted one month at a time); only window-level rows of a batch of units
(for the fits) and small aggregates come into Python.
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
import pyarrow as pa

from . import fits, physics, sqlmodels
from .errors import ConfigError, LakeError
from .schema import TABLES
from .sqlmodels import load_models, run_model, run_samples

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
#: Rows per Arrow batch when a derived table streams from DuckDB to the lake.
STREAM_BATCH_ROWS = 262_144
#: Derived tables stored partitioned (``lake.overwrite(..., partition_by=...)``), as
#: declared in schema.TABLES; a change changes the fingerprint (one full rebuild). windows
#: and efficiency are NOT partitioned by day, although an incremental run would then swap
#: whole daily folders instead of rewriting the two tables: a year of daily files made the
#: dashboard's Fleet page first render 3.8 s instead of 2.1 s and its Unit page 3.0 s
#: instead of 2.2 s (24 units x 365 days, idle machine, 2026-12-02), a cost paid by people.
#: They are stored month by month instead (MONTH_ORDERED), so an incremental run rewrites
#: only the files of the last month.
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
    #: per unit-day motor sums (motor_sums.sql rows) kept in the state: those of the days
    #: before from_day that the week of from_day needs come in, the state's next ones go out
    motor_day_sums: dict = field(default_factory=dict)
    #: per unit, the first week with a usable motor fit (ISO dates), kept in the state
    motor_first_usable: dict[str, str] = field(default_factory=dict)
    #: reference fits of the last run ({"segments": {unit: key}, "bins": frame, "power":
    #: frame}; files next to the state) for units whose reference periods are over
    ref_cache: dict = field(default_factory=dict)

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
    """Hash of the analyze settings, the SQL model files, fits.py, sqlmodels.py (its
    polars samples path replaces samples.sql in analyze) and this file (chunking, loads,
    what is kept between runs): a change forces a rebuild."""
    h = hashlib.sha256()
    for name in ANALYZE_SETTINGS:
        h.update(f"{name}={settings[name]!r};".encode())
    for m in load_models():
        h.update(m.sql.encode())
    h.update(Path(fits.__file__).read_bytes())
    h.update(Path(sqlmodels.__file__).read_bytes())
    h.update(Path(__file__).read_bytes())
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
    new_units = [r[0] for r in rows] if changed else []
    sums = state.get("motor_day_sums") or {}
    # rows removed from a day: the units they came from are not known here, so no unit can
    # be shown to keep its week's own motor fit (see _midweek_ok): whole weeks then
    removed = any(day_counts.get(d, 0) < old_counts.get(d, 0) for d in changed)
    if start > _monday(first_day) and not removed and \
            _midweek_ok(state, start, day_counts, new_units):
        from_day = start
    else:
        from_day = max(_monday(start), _monday(first_day))
    what = f"{len(changed)} day(s) with new or changed telemetry" if changed else \
        "wear resets changed"
    return AnalysisPlan(False, from_day, end_day, what + " since the last analyze",
                        day_counts, first, resets, fp, motor_day_sums=sums,
                        motor_first_usable=dict(state.get("motor_first_usable") or {}))


def _midweek_ok(state: dict, start: dt.date, day_counts: dict[dt.date, int],
                new_units: list[str]) -> bool:
    """Can a run start at ``start`` rather than at its Monday?

    The days of the week before ``start`` keep their derived rows; the week's weekly fits
    still see them through the state's per unit-day motor sums (needed for every such day
    with telemetry) and the stored windows (creep). Their windows' load used the motor
    constants of an earlier week (fits.motor_constants_for_load), which the new data does
    not change, except for a unit without a usable fit before this week: it uses the week's
    own fit, so new data of such a unit needs the whole week again.
    """
    if start.weekday() == 0:
        return True
    monday = _monday(start)
    covered = set((state.get("motor_day_sums") or {}).get("days", []))
    for i in range((start - monday).days):
        d = monday + dt.timedelta(days=i)
        if day_counts.get(d, 0) > 0 and d.isoformat() not in covered:
            return False
    first_usable = state.get("motor_first_usable") or {}
    return all(u in first_usable and first_usable[u] < monday.isoformat() for u in new_units)


def _chunks(plan: AnalysisPlan) -> list[tuple[dt.date, dt.date]]:
    """Consecutive chunks of about CHUNK_ROWS telemetry rows that end on a Monday (the first
    starts at from_day, which may lie inside a week)."""
    per_week: dict[dt.date, int] = {}
    for d, n in plan.day_counts.items():
        if d >= plan.from_day:
            per_week[_monday(d)] = per_week.get(_monday(d), 0) + n
    out: list[tuple[dt.date, dt.date]] = []
    a = plan.from_day
    wk = _monday(a)
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
#: Large derived tables stored month by month: rows ordered by (UTC month of ``day``, key)
#: in files of about STREAM_FILE_BYTES, so an incremental run's replacement of its recent
#: days rewrites the last month's file(s) instead of the whole table (a table sorted by
#: unit alone has every day in every file). Within a month the rows stay in key order and
#: row groups of STREAM_ROW_GROUP rows keep a unit's rows together for readers that filter
#: on unit_id (a unit's year is then about 12 row groups).
MONTH_ORDERED = ("windows", "efficiency")
STREAM_FILE_BYTES = 32 * 1024 * 1024
STREAM_ROW_GROUP = 131_072


def _schema_select(name: str, source: str, where: str = "") -> str:
    """SELECT of exactly the contract columns of table ``name`` with their types, in the
    order of the table's key (MONTH_ORDERED tables: month first)."""
    cols = ", ".join(f"CAST({c.name} AS {c.type}) AS {c.name}" for c in TABLES[name].columns)
    order = ", ".join(TABLES[name].key)
    if name in MONTH_ORDERED:
        order = "date_trunc('month', day), " + order
    return f"SELECT {cols} FROM {source} {where} ORDER BY {order}"


def _month_reader(con, name: str, where: str, params: dict | None):
    """Rows of table ``name`` (a MONTH_ORDERED one) in its stored order as an Arrow
    reader: one query per month, each sorted on its own. The same order as one query
    ordered by month first, but DuckDB sorts a month (under 1 M windows at 200 units)
    at a time instead of the whole table within the write phase's small memory limit:
    about 20 % less CPU for windows (10 M rows) in a full run."""
    params = dict(params or {})
    where_sql = f"{where} AND" if where else "WHERE"
    months = [r[0] for r in con.execute(
        f"SELECT DISTINCT date_trunc('month', day)::DATE AS m FROM {name} {where} "
        "ORDER BY m", params or None).fetchall()]
    first = con.sql(_schema_select(name, name, f"{where_sql} false"), params=params or None)
    schema = first.to_arrow_table().schema

    def batches():
        for m in months:
            nxt = (m.replace(day=28) + dt.timedelta(days=4)).replace(day=1)
            rdr = con.sql(_schema_select(name, name, f"{where_sql} day >= $_m0 AND day < $_m1"),
                          params={**params, "_m0": m, "_m1": nxt}
                          ).to_arrow_reader(STREAM_BATCH_ROWS)
            yield from rdr
    return pa.RecordBatchReader.from_batches(schema, batches())


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
    ``write(name, data, from_day)`` stores one table: ``data`` is a pyarrow Table or a
    RecordBatchReader (large tables stream from DuckDB); ``from_day`` None means replace
    the whole table, else replace its rows with ``day >= from_day``. Returns rows written
    per table.
    """
    _check_settings(settings)
    models = {m.name: m for m in load_models()}
    tmp = tempfile.mkdtemp(prefix="fleetwatch-analyze-", dir=work_dir)
    try:
        return _run(con, prev, settings, plan, write, progress, models, tmp)
    finally:
        try:
            con.unregister("samples")
        except Exception:  # noqa: BLE001 - not registered
            pass
        for name in CHUNK_TABLES:
            try:
                con.execute(f"DROP VIEW IF EXISTS {name}")
            except Exception:  # noqa: BLE001 - a table of that name: dropped below
                pass
        for name in ("motor_sums", *CHUNK_TABLES, "efficiency", "unit_days"):
            try:
                con.execute(f"DROP TABLE IF EXISTS {name}")
            except Exception:  # noqa: BLE001 - best effort; the spill folder goes below
                pass
        shutil.rmtree(tmp, ignore_errors=True)


def _sql_text(value: Any) -> str:
    """``value`` as a SQL string literal (a folder name may hold a quote)."""
    return "'" + str(value).replace("'", "''") + "'"


#: The per-chunk SQL models (after samples and motor_sums), in run order.
CHUNK_TABLES = ("windows", "window_power", "events", "day_stats")


def _park_chunk(con, parts: Path, k: int) -> None:
    """Move chunk ``k``'s CHUNK_TABLES out of DuckDB into Parquet parts under ``parts``
    (sorted by the table's key, so a later filter on unit_id skips most row groups).
    Kept as tables, they piled up in DuckDB's memory chunk after chunk (about 0.25 GB per
    4 M telemetry rows at 60 s) and held it at its limit while the next chunk's samples
    were built: that was most of analyze's peak RSS. Parquet keeps every column type the
    models produce (checked in tests/test_analyze.py)."""
    for name in CHUNK_TABLES:
        d = parts / name
        d.mkdir(parents=True, exist_ok=True)
        order = ", ".join(TABLES[name].key) if name in TABLES else "unit_id"
        con.execute(f"COPY (SELECT * FROM {name} ORDER BY {order}) "
                    f"TO {_sql_text(d / f'part-{k:05d}.parquet')} (FORMAT parquet)")
        con.execute(f"DROP TABLE {name}")


def _release_memory(collect: bool = True) -> None:
    """Hand freed Python and Arrow memory back before a large allocation (``collect``: run
    the garbage collector too; it costs a few tenths of a second each time)."""
    if collect:
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
                   ref_days: tuple[dt.date, dt.date] | None = None,
                   ref_units: list[str] | None = None
                   ) -> tuple[pl.DataFrame, pl.DataFrame]:
    """Steady windows of ``units``: those just computed, and for ``ref_units`` (default: all)
    those plus the older windows of the units' reference periods (from the lake, for an
    incremental run; ``ref_days``: the first and last UTC day any reference period
    touches)."""
    cols = ", ".join(_WCOLS)
    con.register("_units", pl.DataFrame({"unit_id": units}).to_arrow())
    win_new = pl.from_arrow(con.sql(
        f"SELECT {cols} FROM windows WHERE steady_samples >= 2 "
        "AND unit_id IN (SELECT unit_id FROM _units)").to_arrow_table())
    con.unregister("_units")
    win_new = win_new.with_columns(pl.col("window_start").dt.convert_time_zone("UTC")
                                   .dt.cast_time_unit("us"))
    ref_new = win_new
    if ref_units is not None:
        ref_new = win_new.filter(pl.col("unit_id").is_in(ref_units))
        units = ref_units
    if prev is None or not units:
        return win_new, ref_new
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
    return win_new, pl.concat([old.cast(win_new.schema), ref_new])


_SUM_COLS = ("n", "n_temp", "s_ii", "s_iw", "s_ww", "s_vi", "s_vw", "s_vv")
_SUM_SCHEMA = {"unit_id": pl.String, "week_start": pl.Date, "day": pl.Date,
               **{c: (pl.Int64 if c.startswith("n") else pl.Float64) for c in _SUM_COLS}}


def _sums_from_state(saved: dict) -> pl.DataFrame:
    """The state's per unit-day motor sums as a frame (rows: unit_id, day, n, n_temp, s_*)."""
    rows = (saved or {}).get("rows") or []
    if not rows:
        return pl.DataFrame(schema=_SUM_SCHEMA)
    df = pl.DataFrame(rows, schema=["unit_id", "day", *_SUM_COLS], orient="row")
    df = df.with_columns(pl.col("day").str.to_date())
    return df.with_columns(week_start=pl.col("day").dt.truncate("1w")).select(
        list(_SUM_SCHEMA)).cast(_SUM_SCHEMA)


def _sums_for_state(sums: pl.DataFrame, days: list[str]) -> dict:
    return {"days": sorted(set(days)),
            "rows": [[r[0], r[1].isoformat(), *r[2:]] for r in
                     sums.sort("unit_id", "day").select("unit_id", "day", *_SUM_COLS).rows()]}


def _head_windows(prev, units: list[str], monday: dt.date, from_day: dt.date) -> pl.DataFrame:
    """Stored steady windows of ``units`` in [monday, from_day): the days of the first week
    that an incremental run does not recompute (its weekly creep fits need them)."""
    cols = ", ".join(_WCOLS)
    prev.register("_units", pl.DataFrame({"unit_id": units}).to_arrow())
    old = pl.from_arrow(prev.sql(
        f"SELECT {cols} FROM windows WHERE steady_samples >= 2 AND day >= $a AND day < $b "
        "AND unit_id IN (SELECT unit_id FROM _units)",
        params={"a": monday, "b": from_day}).to_arrow_table())
    prev.unregister("_units")
    return old.with_columns(pl.col("window_start").dt.convert_time_zone("UTC")
                            .dt.cast_time_unit("us"))


def _seg_key(segments: pl.DataFrame) -> dict[str, str]:
    """Per unit, its maintenance segments and reference periods as one comparable string."""
    if segments.height == 0:
        return {}
    g = (segments.sort("unit_id", "seg_start")
         .with_columns(k=pl.concat_str([pl.col(c).dt.timestamp("us").cast(pl.String) for c in
                                        ("seg_start", "ref_start", "ref_end")],
                                       separator="/"))
         .group_by("unit_id", maintain_order=True).agg(pl.col("k").str.join(";")))
    return dict(zip(g["unit_id"].to_list(), g["k"].to_list()))


def _ref_cache_valid(cache: dict, segments: pl.DataFrame, from_ts: dt.datetime
                     ) -> dict[str, str]:
    """Units whose cached reference fits still hold: the same segments as when cached and
    every reference period over before ``from_ts`` (so none of its windows is recomputed)."""
    if not cache or not cache.get("segments"):
        return {}
    done = segments.group_by("unit_id").agg(pl.col("ref_end").max())
    over = set(done.filter(pl.col("ref_end") <= from_ts)["unit_id"].to_list())
    now = _seg_key(segments)
    return {u: k for u, k in cache["segments"].items()
            if u in over and now.get(u) == k}


def _ref_cache_new(bins: pl.DataFrame, pm: pl.DataFrame, segments: pl.DataFrame,
                   old: dict, units: set[str]) -> dict:
    """The reference fits to keep for the next run: this run's, and the old cache's for the
    units this run did not see."""
    keep_old = [u for u in (old.get("segments") or {}) if u not in units]
    if keep_old:
        bins = pl.concat([bins, old["bins"].filter(pl.col("unit_id").is_in(keep_old))
                          .cast(bins.schema)])
        pm = pl.concat([pm, old["power"].filter(pl.col("unit_id").is_in(keep_old))
                        .cast(pm.schema)])
    seg = _seg_key(segments)
    kept = {u: seg[u] for u in set(units) | set(keep_old) if u in seg}
    return {"segments": kept, "bins": bins, "power": pm}


def _run(con, prev, settings, plan: AnalysisPlan, write, progress, models, tmp
         ) -> dict[str, int]:
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"SET memory_limit = '{DUCKDB_MEMORY_LIMIT}'")
    con.execute(f"SET temp_directory = {_sql_text(Path(tmp) / 'spill')}")
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
    monday0 = _monday(plan.from_day)
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
    # motor fits of the weeks before this run (their constants give the first weeks' load)
    # and the state's day sums of the first week's days before from_day
    earlier = None
    if old_motor is not None:
        earlier = old_motor.filter(pl.col("week_start") < monday0).select(
            "unit_id", "week_start", "n", "r_ohm", "k_e").cast(
            {"n": pl.Int64, "r_ohm": pl.Float64, "k_e": pl.Float64})
    old_sums = pl.DataFrame(schema=_SUM_SCHEMA) if full else \
        _sums_from_state(plan.motor_day_sums)
    head_sums = old_sums.filter((pl.col("day") >= monday0) & (pl.col("day") < plan.from_day))

    ctx = _context_s(settings)
    parts = Path(tmp) / "parts"
    motor_weeks: list[pl.DataFrame] = []
    day_sums: list[pl.DataFrame] = []
    sum_cols = ", ".join(_SUM_SCHEMA)
    for k, (a, b) in enumerate(chunks):
        rt = {"from_ts": _ts(a), "to_ts": _ts(b), "context_s": ctx,
              "alpha_per_k": physics.ALPHA_COPPER_PER_K}
        # samples.sql's rows, computed by polars (sqlmodels.samples_frame; the SQL file is
        # the reference and the tests hold the two equal): a view over an Arrow table
        samples_tbl = run_samples(con, settings, rt)
        run_model(con, models["motor_sums"], settings, rt)
        sums = pl.from_arrow(con.sql(f"SELECT {sum_cols} FROM motor_sums").to_arrow_table()
                             ).cast(_SUM_SCHEMA)
        day_sums.append(sums)
        if k == 0 and head_sums.height:
            sums = pl.concat([head_sums, sums])
        week_fits = fits.solve_motor_sums(fits.motor_week_sums(sums))
        week_fits = week_fits.select("unit_id", "week_start", "n", "r_ohm", "k_e",
                                     "resid_std_v")
        motor_weeks.append(week_fits)
        mc = fits.motor_constants_for_load(week_fits, earlier, settings["motor_i0_a"])
        new_fits = week_fits.select("unit_id", "week_start", "n", "r_ohm", "k_e")
        earlier = new_fits if earlier is None else pl.concat([earlier, new_fits])
        con.register("motor_constants", mc.to_arrow())
        for name in CHUNK_TABLES:
            run_model(con, models[name], settings, rt)
        con.unregister("samples")
        del samples_tbl
        con.execute("DROP TABLE motor_sums")
        con.unregister("motor_constants")
        _park_chunk(con, parts, k)
        tick()
    # the chunks' tables, from their Parquet parts, under the same names
    for name in CHUNK_TABLES:
        con.execute(f"CREATE VIEW {name} AS SELECT * FROM "
                    f"read_parquet({_sql_text(parts / name / '*.parquet')})")

    # the day sums the next run may need: the days from the Monday a week before the last
    # day's (a run that starts inside a week adds them up with its new days)
    last_day = max(plan.day_counts)
    keep_from = _monday(last_day) - dt.timedelta(days=7)
    kept = [d for d in (plan.motor_day_sums or {}).get("days", [])
            if keep_from.isoformat() <= d < plan.from_day.isoformat()] if not full else []
    kept += [(plan.from_day + dt.timedelta(days=i)).isoformat()
             for i in range((last_day - plan.from_day).days + 1)
             if plan.from_day + dt.timedelta(days=i) >= keep_from]
    all_sums = pl.concat([old_sums.filter(pl.col("day") < plan.from_day), *day_sums])
    plan.motor_day_sums = _sums_for_state(
        all_sums.filter(pl.col("day") >= keep_from), kept)
    del all_sums, day_sums, old_sums

    # the per-sample work is done: DuckDB keeps (or spills) only window-level tables now
    con.execute(f"SET memory_limit = '{DUCKDB_WRITE_MEMORY_LIMIT}'")
    from_day = None if full else plan.from_day
    from_ts = _ts(plan.from_day)
    written: dict[str, int] = {}

    def store(name: str, where: str = "") -> None:
        """Stream table ``name`` (exactly its contract columns, in key order) from DuckDB
        to ``write``: one commit, about one batch in Python at a time."""
        params = {"from_day": plan.from_day} if where else None
        if name in MONTH_ORDERED:
            reader = _month_reader(con, name, where, params)
        else:
            reader = con.sql(_schema_select(name, name, where), params=params
                             ).to_arrow_reader(STREAM_BATCH_ROWS)
        written[name] = write(name, reader, from_day)
        del reader
        _release_memory(collect=full)

    # windows and events are final now; windows stays in DuckDB (spilled as needed), where
    # the fits below read it a batch of units at a time
    store("windows")
    store("events", "" if full else "WHERE day >= $from_day")

    # -- motor fits: the new weeks, the untouched old weeks, drift against the reference
    new_motor = pl.concat(motor_weeks) if motor_weeks else pl.DataFrame(schema={
        "unit_id": pl.String, "week_start": pl.Date, "n": pl.Int64, "r_ohm": pl.Float64,
        "k_e": pl.Float64, "resid_std_v": pl.Float64})
    if old_motor is not None and old_motor.height:
        keep = old_motor.filter(pl.col("week_start") < monday0).select(
            new_motor.columns).cast(new_motor.schema)
        new_motor = pl.concat([keep, new_motor])
    plan.motor_first_usable = {u: d.isoformat()
                               for u, d in fits.first_usable_week(new_motor).items()}
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
    head = old_windows and plan.from_day > monday0
    ref_days = None
    if old_windows:
        prev.register("_ref_periods", segments.select("unit_id", "ref_start", "ref_end")
                      .to_arrow())
        if segments.height:
            ref_days = (segments["ref_start"].min().date() - dt.timedelta(days=1),
                        segments["ref_end"].max().date() + dt.timedelta(days=1))
    per_unit = dict(con.execute("SELECT unit_id, count(*) FROM windows "
                                "WHERE steady_samples >= 2 GROUP BY unit_id").fetchall())
    # reference fits (ratio-bin creep lines, power models) of units whose reference periods
    # all ended before this run come from the last run: their reference windows are as then
    cache = _ref_cache_valid(plan.ref_cache, segments, from_ts) if old_windows else {}
    bins_cached = plan.ref_cache.get("bins") if cache else None
    pm_cached = plan.ref_cache.get("power") if cache else None
    creep_parts, daily_parts, pm_parts, bin_parts = [], [], [], []
    for units in _unit_batches(per_unit, FIT_BATCH_WINDOWS):
        ref_units = [u for u in units if u not in cache]
        win_new, ref_windows = _batch_windows(con, prev if old_windows else None, units,
                                              from_ts, ref_days, ref_units)
        fl = flat.filter(pl.col("unit_id").is_in(units))
        cw_new = fits.drop_flatlined(fits.creep_windows(win_new, settings), fl,
                                     settings["window_min"])
        cw_week = cw_new
        if head:
            # the week's days before from_day, from the lake: the weekly fit sees them all
            old_head = _head_windows(prev, units, monday0, plan.from_day)
            cw_week = fits.drop_flatlined(fits.creep_windows(
                pl.concat([old_head.cast(win_new.schema), win_new]), settings), fl,
                settings["window_min"])
        creep_parts.append(fits.creep_fits_weekly(cw_week, segments))
        ref_bins = fits.creep_reference_bins(
            fits.drop_flatlined(fits.creep_windows(ref_windows, settings), fl,
                                settings["window_min"]), segments)
        pm_b = fits.power_models(ref_windows, segments)
        done = [u for u in units if u in cache]
        if done:
            ref_bins = pl.concat([ref_bins, bins_cached.filter(
                pl.col("unit_id").is_in(done)).cast(ref_bins.schema)])
            pm_b = pl.concat([pm_b, pm_cached.filter(
                pl.col("unit_id").is_in(done)).cast(pm_b.schema)])
        daily_parts.append(fits.creep_daily(cw_new, segments, ref_bins,
                                            settings["load_ref_nm"]))
        pm_parts.append(pm_b)
        bin_parts.append(ref_bins)
        del win_new, ref_windows, cw_new, cw_week
    creep_new = pl.concat(creep_parts) if creep_parts else fits.creep_fits_weekly(
        pl.DataFrame(), segments)
    daily = pl.concat(daily_parts) if daily_parts else fits.creep_daily(
        pl.DataFrame(), segments, pl.DataFrame(), 1.0)
    pm = pl.concat(pm_parts) if pm_parts else fits.power_models(pl.DataFrame(), segments)
    plan.ref_cache = _ref_cache_new(
        pl.concat(bin_parts) if bin_parts else fits.creep_reference_bins(pl.DataFrame(),
                                                                         segments),
        pm, segments, plan.ref_cache if cache else {}, set(per_unit))
    if not full and prev is not None and _has_view(prev, "creep_fits"):
        old = pl.from_arrow(prev.sql("SELECT * FROM creep_fits "
                                    "WHERE week_start < $f", params={"f": monday0}
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
    for view in ("creep_daily", "power_models"):
        con.unregister(view)
    del flat, daily
    for name in CHUNK_TABLES:
        con.execute(f"DROP VIEW {name}")
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
        "motor_day_sums": plan.motor_day_sums,
        "motor_first_usable": plan.motor_first_usable,
        "finished_at": dt.datetime.now(UTC).isoformat(),
    }


_REF_FILES = ("bins", "power")


def _write_state(lake, plan: AnalysisPlan) -> None:
    """Write the state file (the commit point of the run's bookkeeping) and the reference
    fits it names (parquet files with a fresh token, so an older state never names them)."""
    p = _state_path(lake)
    p.parent.mkdir(parents=True, exist_ok=True)
    state = state_after(plan)
    cache = plan.ref_cache or {}
    token = None
    if cache.get("segments"):
        token = os.urandom(6).hex()
        for kind in _REF_FILES:
            cache[kind].write_parquet(p.parent / f"analyze_ref_{kind}_{token}.parquet")
        state["ref_cache"] = {"token": token, "segments": cache["segments"]}
    tmp = p.with_name(p.name + ".tmp")
    tmp.write_text(json.dumps(state, indent=1), encoding="utf-8")
    os.replace(tmp, p)
    for f in p.parent.glob("analyze_ref_*.parquet"):
        if token is None or not f.name.endswith(f"_{token}.parquet"):
            f.unlink(missing_ok=True)


def _read_ref_cache(lake, state: dict | None) -> dict:
    """The reference fits the state names ({} when missing or unreadable)."""
    info = (state or {}).get("ref_cache") or {}
    if not info.get("token"):
        return {}
    out = {"segments": dict(info.get("segments") or {})}
    try:
        for kind in _REF_FILES:
            out[kind] = pl.read_parquet(_state_path(lake).parent /
                                        f"analyze_ref_{kind}_{info['token']}.parquet")
    except (OSError, pl.exceptions.PolarsError):
        return {}
    return out


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
            state = _read_state(lake)
            plan = plan_analysis(con, settings, state, full, have,
                                 lake.rows_per_partition("telemetry", "day"))
            if not plan.full:
                plan.ref_cache = _read_ref_cache(lake, state)
            report.full, report.reason = plan.full, plan.reason
            if not plan.empty:
                def write(name: str, data: Any, from_day: Optional[dt.date]) -> int:
                    part = PARTITIONED.get(name)
                    if isinstance(data, pa.RecordBatchReader):
                        rows = [0]

                        def counted():
                            for b in data:
                                rows[0] += b.num_rows
                                yield b
                        sized = {"target_file_size": STREAM_FILE_BYTES,
                                 "max_row_group_size": STREAM_ROW_GROUP} \
                            if name in MONTH_ORDERED else {}
                        lake.write_stream(
                            name, pa.RecordBatchReader.from_batches(data.schema, counted()),
                            None if from_day is None else f"day >= '{from_day.isoformat()}'",
                            partition_by=part, **sized)
                        return rows[0]
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
