"""The dashboard: serve the Streamlit app, plus its own data functions and chart builders.

``serve_dashboard`` starts ``streamlit run`` on the app that ships inside this package
(``fleetwatch/dashboard_app/``), so it works after a plain ``pip install .``: the app is
found next to this module, not in a source checkout. The project folder reaches the app
through the ``FLEETWATCH_PROJECT`` environment variable.

The app's pages call only the functions here and in ``fleetwatch.views`` /
``fleetwatch.charts`` / ``fleetwatch.query`` / ``fleetwatch.report``: no SQL strings and no
chart code in pages. Every data call goes through :func:`cached`, which keys Streamlit's
data cache on the lake's table versions (``Lake.versions()``): a page shows the newest
committed snapshot, refreshes when ingest or analyze commit a new version, and never takes
the writer lock or opens a DuckDB file (readers use an in-memory DuckDB over Delta
snapshots), so the dashboard keeps working while those run.

Colours and status words come from ``fleetwatch.charts`` (one colour-blind-safe palette for
the report and the dashboard); a status colour always comes with its symbol and word.
"""
from __future__ import annotations

import datetime as dt
import functools
import importlib
import os
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from .errors import UsageError

__all__ = [
    "serve_dashboard", "DashboardServer", "app_path", "dashboard_command",
    "status_label", "status_colour", "status_text_colour", "SAFETY_CAPTION", "chart_spec",
    "chart_alt",
    "with_markers", "html_table", "html_tables", "HTML_TABLE_ROWS",
    "marker_layer", "page_spec", "stack_specs", "time_domain",
    "cached", "lake_versions", "lake_snapshot", "LakeSnapshot",
]

# ---------------------------------------------------------------- look
# Colours, symbols and words of statuses are fleetwatch.charts' (shared with the report):
# colour-blind-safe, and a status colour never appears without its symbol and word.
SAFETY_CAPTION = ("fleetwatch advises; it never authorises work on a machine. Isolate, lock "
                  "out and verify before any hands-on work on a drive; local codes and "
                  "qualified people decide.")

#: The theme colour of the app (buttons, focus): the 'normal' blue of the status palette.
PRIMARY_COLOUR = "#0072B2"


def status_label(status: str | None) -> str:
    """A status with its symbol, e.g. ``"▲ alert"`` (fleetwatch.charts.status_word)."""
    from .charts import status_word

    return status_word(status)


def status_colour(status: str | None) -> str:
    from .charts import status_colour as colour

    return colour(status)


def status_text_colour(status: str | None) -> str:
    """The darker shade of a status colour used for words (fleetwatch.charts)."""
    from .charts import status_text_colour as colour

    return colour(status)


# ---------------------------------------------------------------- serving
APP_DIR = Path(__file__).resolve().parent / "dashboard_app"


def app_path() -> Path:
    """The Streamlit entry script shipped inside the installed package."""
    return APP_DIR / "app.py"


def dashboard_command(host: str, port: int) -> list[str]:
    """The ``streamlit run`` command line for the packaged app (headless, no usage stats)."""
    return [
        sys.executable, "-m", "streamlit", "run", str(app_path()),
        "--server.headless", "true",
        "--server.address", host,
        "--server.port", str(port),
        "--server.runOnSave", "false",
        "--server.fileWatcherType", "none",
        "--browser.gatherUsageStats", "false",
        "--global.developmentMode", "false",
        # Streamlit runs a full gc.collect() after every script run by default: 0.1-0.4 s
        # with Altair, pandas and polars loaded, paid between the Fleet page's run that
        # switches page and the Unit page's run. Python's own generational GC still runs.
        "--runner.postScriptGC", "false",
        "--client.toolbarMode", "minimal",
        "--theme.base", "light",
        "--theme.primaryColor", PRIMARY_COLOUR,
    ]


@dataclass
class DashboardServer:
    """A started dashboard: its process and address. ``stop()`` ends it (SIGTERM, then kill)."""

    process: subprocess.Popen
    url: str
    host: str
    port: int

    @property
    def pid(self) -> int:
        return self.process.pid

    def wait_ready(self, timeout_s: float = 30.0) -> bool:
        """Wait until Streamlit's health endpoint answers ``ok``; False on timeout or exit."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                return False
            try:
                with urllib.request.urlopen(self.url + "/_stcore/health", timeout=2) as r:
                    if r.status == 200:
                        return True
            except OSError:
                pass
            time.sleep(0.2)
        return False

    def stop(self, timeout_s: float = 10.0) -> int | None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=timeout_s)
        return self.process.returncode


def _port_free(host: str, port: int) -> bool:
    with socket.socket(socket.AF_INET6 if ":" in host else socket.AF_INET) as s:
        try:
            s.bind((host, port))
        except OSError:
            return False
    return True


def serve_dashboard(settings, host: str | None = None, port: int | None = None,
                    block: bool = True, echo: Callable[[str], None] | None = None
                    ) -> DashboardServer:
    """Start the Streamlit dashboard for ``settings.project``.

    ``host`` defaults to the ``dashboard_host`` setting (127.0.0.1: this machine only),
    ``port`` to ``dashboard_port``. With ``block`` the call waits until the server stops
    (Ctrl+C stops it); otherwise it returns at once with the running server, which the caller
    stops with ``server.stop()``. ``echo`` receives the address line.
    Raises UsageError when the project folder is missing or the port is taken or cannot be
    bound.
    """
    project = Path(settings.project).resolve()
    if not project.is_dir():
        raise UsageError(f"project folder {project} does not exist",
                         hint="Create one with `fleetwatch init DIR`, or pass --project.")
    host = host or settings.dashboard_host
    port = int(port if port is not None else settings.dashboard_port)
    if not 0 < port < 65536:
        raise UsageError(f"port {port} is not a TCP port", hint="Use --port 1024..65535.")
    if not _port_free(host, port):
        raise UsageError(f"cannot listen on {host}:{port}: the address is in use or not "
                         "available on this machine",
                         hint="Pick another one with --port (or the dashboard_port setting), "
                              "or stop the program that holds it.")
    env = dict(os.environ)
    env["FLEETWATCH_PROJECT"] = str(project)
    env.setdefault("PYTHONUNBUFFERED", "1")
    proc = subprocess.Popen(dashboard_command(host, port), env=env, cwd=str(project),
                            preexec_fn=_die_with_parent if block and sys.platform == "linux"
                            else None)
    url_host = f"[{host}]" if ":" in host else host
    server = DashboardServer(proc, f"http://{url_host}:{port}", host, port)
    if echo is not None:
        echo(f"Dashboard for {project} at {server.url} (Ctrl+C stops it)")
    if block:
        _stop_on_sigterm(server)
        try:
            proc.wait()
        except KeyboardInterrupt:
            server.stop()
    return server


def _die_with_parent() -> None:  # pragma: no cover - runs in the child before exec
    """Linux: the server gets SIGTERM when the process that started it dies."""
    import ctypes
    import signal

    try:
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG
    except OSError:
        pass


def _stop_on_sigterm(server: DashboardServer, kill_after_s: float = 10.0) -> None:
    """While blocking, SIGTERM to this process stops the server too: it is passed on, and the
    server is killed if it has not exited ``kill_after_s`` later. (The handler only signals:
    the main thread is inside ``wait()``, which reaps the server and returns.)"""
    import signal

    if threading.current_thread() is not threading.main_thread():
        return
    pid = server.process.pid

    def kill_if_alive() -> None:
        if server.process.returncode is None:
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass

    def handler(signum, frame):  # pragma: no cover - exercised by the browser test
        server.process.send_signal(signal.SIGTERM)
        timer = threading.Timer(kill_after_s, kill_if_alive)
        timer.daemon = True          # never keeps this process alive once the server is gone
        timer.start()

    signal.signal(signal.SIGTERM, handler)


# ---------------------------------------------------------------- caching
def lake_versions(settings) -> dict[str, int]:
    """Table name -> Delta version of the project's lake ({} when there is no lake yet).

    Reads only the tables' logs: no writer lock, no DuckDB file.
    """
    from .lake import Lake

    try:
        return dict(Lake.from_settings(settings).versions())
    except FileNotFoundError:
        return {}


def _settings_key(settings) -> str:
    """One short string for the project and its settings (Streamlit hashes cache keys on
    every call; a digest is much cheaper to hash than the settings themselves)."""
    import hashlib

    text = repr((str(settings.project), sorted(settings.as_dict().items())))
    return hashlib.sha256(text.encode()).hexdigest()


class LakeSnapshot:
    """A lake as of one set of table versions, shared by the dashboard's sessions.

    ``connect()`` hands out one in-memory DuckDB connection (``Lake.connect()``: views over
    the tables' Delta snapshots), opened on first use and lent to one caller at a time, so a
    page that misses the cache on ten queries registers the tables once, not ten times.
    Callers close what they borrow (``fleetwatch.views`` does); that returns it. ``read`` and
    ``versions`` go to the lake. It never takes the writer lock.
    """

    def __init__(self, lake, versions: dict[str, int]):
        self.lake = lake
        self._versions = dict(versions)
        self._lock = threading.RLock()
        self._con = None

    def versions(self) -> dict[str, int]:
        return dict(self._versions)

    def read(self, name: str, *args: Any, **kwargs: Any):
        return self.lake.read(name, *args, **kwargs)

    def connect(self) -> "_Borrowed":
        self._lock.acquire()
        try:
            if self._con is None:
                from .views import _prepare

                con = self.lake.connect()
                _scan_natively(con, self.lake, self._versions)
                _prepare(con)   # once per snapshot, not once per query (see _Borrowed)
                self._con = con
        except BaseException:
            self._lock.release()
            raise
        return _Borrowed(self._con, self._lock)

    def close(self) -> None:
        with self._lock:
            if self._con is not None:
                self._con.close()
                self._con = None


class _Borrowed:
    """The snapshot's connection, lent until ``close()`` (which gives it back)."""

    #: fleetwatch.views skips its per-session setup (time zone, empty views for missing
    #: tables): the snapshot did it when it opened the connection.
    fleetwatch_prepared = True

    def __init__(self, con, lock):
        self._con, self._lock, self._open = con, lock, True

    def __getattr__(self, name: str) -> Any:
        return getattr(self._con, name)

    def close(self) -> None:
        if self._open:
            self._open = False
            self._lock.release()

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


#: Window-level tables (one row per unit and 10-60 min window) that the Unit page reads one
#: unit at a time. Through an Arrow dataset DuckDB decodes every row group of a one-file
#: table in full (0.25-0.6 s for one unit of 24 units x 1 year); its own Parquet reader
#: skips rows whose unit_id does not match before decoding the other columns (0.03 s).
NATIVE_SCAN_TABLES = ("windows", "efficiency")


def _scan_natively(con, lake, versions: dict[str, int]) -> list[str]:
    """Re-point the views of :data:`NATIVE_SCAN_TABLES` on ``con`` (from ``Lake.connect``)
    at DuckDB's own Parquet reader over the files of the Delta snapshot at ``versions``.

    Only where that reads the same rows as the Arrow dataset (``Lake.snapshot_files`` says
    when) and whose columns (partition columns read back from the hive-style paths) come
    out with the view's names and types; any other table, or any error, keeps the lake's
    own view. Returns the tables changed.
    """
    done = []
    for name in NATIVE_SCAN_TABLES:
        if name not in versions:
            continue
        try:
            found = lake.snapshot_files(name, versions[name])
            if found is None:
                continue
            files, parts = found
            listed = ", ".join("'" + f.replace("'", "''") + "'" for f in files)
            # partition values live in the paths (col=value/), not in the files: DuckDB's
            # hive reading recovers them; the columns are listed in the lake view's order
            # and the type check below falls back if a value's type comes out different
            cols = ", ".join('"' + c.replace('"', '""') + '"' for c in con.table(name).columns)
            native = (f"SELECT {cols} FROM read_parquet([{listed}], union_by_name = true"
                      f"{', hive_partitioning = true' if parts else ''})")
            # same columns in the same order as the lake's view, or leave it alone
            new, old = con.sql(native), con.table(name)
            if (new.columns, new.types) != (old.columns, old.types):
                continue
            con.unregister(name)
            con.execute(f'CREATE OR REPLACE TEMP VIEW "{name}" AS {native}')
            done.append(name)
        except Exception:  # noqa: BLE001 - the Arrow view still answers, only slower
            continue
    return done


_SNAPSHOTS: dict[tuple, LakeSnapshot] = {}
_SNAPSHOTS_LOCK = threading.Lock()


def lake_snapshot(settings, versions_key: str) -> LakeSnapshot:
    """The shared snapshot of the project's lake at ``versions_key`` (the repr of the sorted
    versions); older snapshots of the same project are closed when a newer one is made."""
    import ast

    from .lake import Lake

    key = (str(settings.project), versions_key)
    with _SNAPSHOTS_LOCK:
        snap = _SNAPSHOTS.get(key)
        if snap is None:
            for old in [k for k in _SNAPSHOTS if k[0] == key[0]]:
                _SNAPSHOTS.pop(old).close()
            snap = _SNAPSHOTS[key] = LakeSnapshot(Lake.from_settings(settings),
                                                  dict(ast.literal_eval(versions_key)))
        return snap


@functools.lru_cache(maxsize=None)
def _st_caches():
    """Streamlit caches, built on first use so importing this module needs no Streamlit."""
    import streamlit as st

    @st.cache_data(ttl=2.0, show_spinner=False, max_entries=16)
    def versions(settings_key: str, _settings) -> str:
        return repr(sorted(lake_versions(_settings).items()))

    @st.cache_data(show_spinner=False, max_entries=512)
    def call(module: str, name: str, settings_key: str, versions_key: str,
             kwargs: tuple, _settings) -> Any:
        fn = getattr(importlib.import_module(module), name)
        return fn(lake_snapshot(_settings, versions_key), **dict(kwargs))

    return versions, call


def cached(fn: Callable[..., Any], settings, /, **kwargs: Any) -> Any:
    """``fn(lake, **kwargs)`` through Streamlit's data cache, keyed on the project, its
    settings and the lake's table versions; ``lake`` is the shared :class:`LakeSnapshot`.

    The versions are re-read at most every 2 s, so a new commit by ingest or analyze shows
    within about 2 s and unchanged tables are never re-read. ``fn`` must be a module-level
    function taking the lake first (as every ``fleetwatch.views`` function does); keyword
    values must be hashable (dates, strings, numbers, tuples, ISO weeks).
    """
    versions, call = _st_caches()
    skey = _settings_key(settings)
    return call(fn.__module__, fn.__qualname__, skey, versions(skey, settings),
                tuple(sorted(kwargs.items())), settings)


# ---------------------------------------------------------------- settings for the app
def app_settings(strict: bool = False):
    """Settings of the project the app serves ($FLEETWATCH_PROJECT, else the current folder).

    Returns None on a configuration error unless ``strict`` (then ConfigError propagates).
    """
    from .config import load_settings
    from .errors import FleetwatchError

    try:
        return load_settings()
    except FleetwatchError:
        if strict:
            raise
        return None


@functools.lru_cache(maxsize=1)
def advisor_available() -> bool:
    """True when this build has the energy advisor (``fleetwatch.advisor.advise``)."""
    try:
        return callable(getattr(importlib.import_module(".advisor", __package__), "advise",
                                None))
    except Exception:  # a missing or broken optional module just hides the Energy page
        return False


# ---------------------------------------------------------------- data for the pages
# The read-side functions live in fleetwatch.views (shared with the report); these few
# combine or reshape their results for the pages. Like the views functions they take a
# ``source`` (a Lake) first, so :func:`cached` can call both alike.

def unit_span(source, unit_id: str) -> tuple[dt.date, dt.date] | None:
    """First and last UTC day with health results (else scores) for the unit; None if none."""
    from . import views

    for fn in (views.health_history, views.anomaly_scores):
        days = fn(source, unit_id)["day"]
        if len(days):
            return days.min(), days.max()
    return None


def unit_markers(source, unit_id: str, start: dt.date | None = None,
                 end: dt.date | None = None):
    """Events and maintenance of one unit in [start, end] (UTC days) on one time axis.

    Columns: ts, end_ts (UTC), source ('event' or 'maintenance'), kind (event kind or
    maintenance action), detail. Sorted by ts.
    """
    import polars as pl

    from . import views

    ev = views.unit_events(source, unit_id, start=start, end=end).select(
        "start_ts", "end_ts", pl.lit("event").alias("source"), "kind",
        pl.col("description").alias("detail")).rename({"start_ts": "ts"})
    mt = views.maintenance_markers(source, unit_id, start=start, end=end).select(
        "ts", pl.col("ts").alias("end_ts"), pl.lit("maintenance").alias("source"),
        pl.col("action").alias("kind"),
        pl.concat_str([pl.col("note").fill_null(""),
                       pl.when(pl.col("resets_wear")).then(pl.lit(" (wear reset)"))
                       .otherwise(pl.lit(""))]).str.strip_chars().alias("detail"))
    tz = pl.Datetime("us", "UTC")
    ev = ev.with_columns(pl.col("ts").cast(tz), pl.col("end_ts").cast(tz))
    mt = mt.with_columns(pl.col("ts").cast(tz), pl.col("end_ts").cast(tz))
    return pl.concat([ev, mt], how="vertical").sort("ts")


def fleet_events(source, start: dt.date | None = None, end: dt.date | None = None):
    """All events of the fleet in [start, end] (UTC days), newest first (views.unit_events)."""
    from . import views

    return views.unit_events(source, None, start=start, end=end).sort(
        "start_ts", descending=True)


def events_span(source) -> tuple[dt.date, dt.date] | None:
    """First and last UTC day with events; None when there are none."""
    from . import views

    ev = views.unit_events(source)
    if ev.is_empty():
        return None
    return (ev["start_ts"].min().date(), ev["start_ts"].max().date())


def filter_events(events, units=(), kinds=()):
    import polars as pl

    out = events
    if units:
        out = out.filter(pl.col("unit_id").is_in(list(units)))
    if kinds:
        out = out.filter(pl.col("kind").is_in(list(kinds)))
    return out


def advice_table(source):
    """The advisor's ``advice`` table, changes first, largest saving first (empty frame when
    ``fleetwatch advise`` has not run)."""
    import polars as pl

    if "advice" not in source.versions():
        return pl.DataFrame()
    df = source.read("advice")
    order = {"change": 0, "keep": 1, "no_advice": 2}
    return df.with_columns(_o=pl.col("status").replace_strict(order, default=3,
                                                             return_dtype=pl.Int8)).sort(
        ["_o", "saving_kwh_week"], descending=[False, True], nulls_last=True).drop("_o")


# ----- fleet table helpers (pure, on views.fleet_overview's frame)
FLEET_SORTS = {
    "Urgency": (["urgency"], [False]),
    "Days to limit": (["days_to_limit", "unit_id"], [False, False]),
    "Unit": (["unit_id"], [False]),
    "Last data (oldest first)": (["last_data", "unit_id"], [False, False]),
}


def lines_of(overview) -> list[str]:
    return sorted({x for x in overview["line"].to_list() if x})


def filter_fleet(overview, lines=(), statuses=(), sort: str = "Urgency"):
    """The unit table filtered by line and status and sorted (see FLEET_SORTS)."""
    import polars as pl

    out = overview
    if lines:
        out = out.filter(pl.col("line").is_in(list(lines)))
    if statuses:
        out = out.filter(pl.col("status").is_in(list(statuses)))
    by, desc = FLEET_SORTS.get(sort, FLEET_SORTS["Urgency"])
    return out.sort(by, descending=desc, nulls_last=True)


#: Status words (with symbols) in the fleet table's order of urgency, and their colours.
_TABLE_STATUSES = ("alert", "watch", "normal", None)


def fleet_display(overview):
    """The unit table as shown: status as a one-item list holding its symbol and word
    (drawn as a label in the status colour by :func:`fleet_column_config`; no pandas
    Styler, whose first use costs 0.3-1 s of imports and every rerun 0.04 s); the page
    shows missing values as '–'."""
    import polars as pl

    return overview.with_columns(
        pl.col("status").map_elements(lambda s: [status_label(s)],
                                      return_dtype=pl.List(pl.String)),
        pl.col("since").cast(pl.String),
        pl.col("days_to_limit").round(0),
    ).select("unit_id", "line", "status", "since", "days_to_limit", "main_reason", "last_data")


def fleet_column_config() -> dict:
    """Column labels and formats of the unit table; the status column shows each word
    as a label in its status colour (colour always with its symbol and word)."""
    import streamlit as st

    return {
        "unit_id": st.column_config.TextColumn("Unit"),
        "line": st.column_config.TextColumn("Line"),
        "status": st.column_config.MultiselectColumn(
            "Status", options=[status_label(s) for s in _TABLE_STATUSES],
            color=[status_text_colour(s) for s in _TABLE_STATUSES]),
        "since": st.column_config.TextColumn("Since (UTC day)"),
        "days_to_limit": st.column_config.NumberColumn(
            "Days to limit", format="%d", help="Median days until steady slip reaches the "
            "wear limit; – when no crossing is predicted."),
        "main_reason": st.column_config.TextColumn("Main reason", width="large"),
        "last_data": st.column_config.DatetimeColumn("Last data received (UTC)",
                                                     format="YYYY-MM-DD HH:mm"),
    }


# ----- time ranges
RANGE_PRESETS = {"30 days": 30, "90 days": 90, "1 year": 365, "All": None, "Custom": None}


def preset_range(preset: str, first: dt.date, last: dt.date) -> tuple[dt.date, dt.date]:
    """(start, end) of a preset ending on the unit's last day, clipped to its data."""
    days = RANGE_PRESETS.get(preset)
    if days is None:
        return first, last
    return max(first, last - dt.timedelta(days=days - 1)), last


def date_range(value, start: dt.date, end: dt.date) -> tuple[dt.date, dt.date]:
    """A date_input value as (start, end); while only one end is picked, that day."""
    if isinstance(value, (tuple, list)):
        if len(value) == 2:
            return value[0], value[1]
        if len(value) == 1:
            return value[0], value[0]
        return start, end
    if isinstance(value, dt.date):
        return value, value
    return start, end


def weeks_in(start: dt.date, end: dt.date) -> list:
    """ISO weeks overlapping [start, end], newest first (views.IsoWeek)."""
    from .views import IsoWeek

    out, w = [], IsoWeek.containing(end)
    while w.sunday >= start:
        out.append(w)
        w = w.previous()
    return out


def fmt_days(days: float | None) -> str:
    if days is None or days != days:
        return "none predicted"
    return f"{days:.0f} d"


# ----- unit tables
def _days_text(col: str):
    import polars as pl

    return pl.col(col).round(0).cast(pl.Int64).cast(pl.String).fill_null("–")


def health_changes(health):
    """The days a unit's status changed, with the reasons given then (newest first)."""
    import polars as pl

    ch = health.filter(pl.col("status") != pl.col("status").shift(1).fill_null(""))
    return ch.sort("day", descending=True).select(
        pl.col("day").cast(pl.String),
        pl.col("status").map_elements(status_label, return_dtype=pl.String),
        _days_text("days_to_limit").alias("days to limit"), "reasons")


def top_scores(scores, threshold: float, n: int = 10):
    """The highest-scoring days with the features that drove them."""
    import polars as pl

    return scores.sort("score", descending=True).head(n).select(
        pl.col("day").cast(pl.String), pl.col("score").round(3),
        (pl.col("score") >= threshold).alias("anomalous"), "top_features")


def markers_display(markers):
    import polars as pl

    return markers.sort("ts", descending=True).select(
        pl.col("ts").dt.strftime("%Y-%m-%d %H:%M").alias("time (UTC)"), "source", "kind",
        "detail")


#: Rows up to which the Unit page shows a table as static HTML (one light element: about a
#: quarter of an interactive grid's browser time); longer tables stay interactive grids.
HTML_TABLE_ROWS = 25

_TABLE_CSS = (
    "<style>.fw-tables{display:grid;grid-template-columns:repeat(auto-fit,minmax(360px,1fr));"
    "gap:0.5rem 1.5rem}.fw-tables p{margin:0 0 0.3rem;font-weight:600}"
    ".fw-table{border-collapse:collapse;font-size:0.85rem;width:100%}"
    ".fw-table th,.fw-table td{border-bottom:1px solid rgba(128,128,128,0.3);"
    "padding:0.2rem 0.5rem;text-align:left;vertical-align:top}"
    ".fw-table th{font-weight:600}.fw-table td.num{text-align:right;"
    "font-variant-numeric:tabular-nums}</style>")


def html_table(df, status_col: str | None = None) -> str:
    """A small polars frame as a static HTML table (values escaped; nulls as "–").

    ``status_col``: a column of status labels (:func:`status_label`), drawn in their status
    colour next to their word. Numbers are right-aligned."""
    import html

    colours = {status_label(s): status_text_colour(s)
               for s in ("alert", "watch", "normal", None)}
    head = "".join(f"<th>{html.escape(str(c))}</th>" for c in df.columns)
    numeric = {c for c, t in df.schema.items() if t.is_numeric()}
    rows = []
    for row in df.iter_rows(named=True):
        cells = []
        for c, v in row.items():
            text = "–" if v is None else html.escape(
                str(v).lower() if isinstance(v, bool) else str(v))
            if c == status_col and v in colours:
                text = f'<span style="color:{colours[v]};font-weight:600">{text}</span>'
            cells.append(f'<td class="num">{text}</td>' if c in numeric else f"<td>{text}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return (f'<table class="fw-table"><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(rows)}</tbody></table>')


def html_tables(parts: list[tuple[str, str]]) -> str:
    """Titled HTML tables (``(title, html_table(...))``) side by side where the page is wide
    enough, one below the other where not, as one element (st.html)."""
    import html

    body = "".join(f"<div><p>{html.escape(title)}</p>{table}</div>" for title, table in parts)
    return f'{_TABLE_CSS}<div class="fw-tables">{body}</div>'


def to_csv_bytes(df) -> bytes:
    """A polars frame as UTF-8 CSV (timestamps ISO 8601 UTC)."""
    return df.write_csv().encode("utf-8")


def display_frame(df):
    """A query result made safe for st.dataframe (durations, lists, structs as text)."""
    import polars as pl

    odd = [n for n, t in df.schema.items()
           if isinstance(t, (pl.Duration, pl.Object, pl.List, pl.Struct, pl.Array, pl.Binary))]
    if not odd:
        return df
    return df.with_columns(pl.col(n).map_elements(str, return_dtype=pl.String) for n in odd)


# ---------------------------------------------------------------- SQL console
EXAMPLE_QUERIES: dict[str, str] = {
    "Latest status per unit, worst first": """\
SELECT unit_id, status, since, round(days_to_limit, 1) AS days_to_limit, reasons
FROM health
QUALIFY row_number() OVER (PARTITION BY unit_id ORDER BY day DESC) = 1
ORDER BY CASE status WHEN 'alert' THEN 0 WHEN 'watch' THEN 1 ELSE 2 END,
         days_to_limit NULLS LAST""",
    "Units closest to the slip limit (latest trend)": """\
SELECT unit_id, as_of, since, round(level_now, 4) AS slip_now, round(slope_per_day, 6) AS
       slope_per_day, round(days_to_limit) AS days_to_limit,
       round(days_to_limit_low) AS earliest, round(days_to_limit_high) AS latest, note
FROM trends
WHERE indicator = 'slip_at_load'
QUALIFY row_number() OVER (PARTITION BY unit_id ORDER BY as_of DESC) = 1
ORDER BY days_to_limit NULLS LAST""",
    "Events per kind over the last 30 days": """\
SELECT kind, count(*) AS events, count(DISTINCT unit_id) AS units, max(start_ts) AS latest
FROM events
WHERE day > (SELECT max(day) FROM events) - INTERVAL 30 DAY
GROUP BY kind ORDER BY events DESC""",
    "Weekly steady slip at rated load per unit": """\
SELECT unit_id, date_trunc('week', day)::DATE AS week_start,
       round(median(slip_at_load), 4) AS slip_at_load, round(median(creep_b), 5) AS creep_b
FROM unit_days
GROUP BY ALL ORDER BY unit_id, week_start""",
    "Highest anomaly scores and what drove them": """\
SELECT unit_id, day, round(score, 3) AS score, top_features
FROM scores ORDER BY score DESC LIMIT 20""",
    "Motor constant drift per unit (latest week)": """\
SELECT unit_id, week_start, round(r_ohm, 3) AS r_ohm, round(k_e, 4) AS k_e,
       round(r_drift_pct, 1) AS r_drift_pct, round(k_e_drift_pct, 1) AS k_e_drift_pct
FROM motor_fits
QUALIFY row_number() OVER (PARTITION BY unit_id ORDER BY week_start DESC) = 1
ORDER BY abs(k_e_drift_pct) DESC NULLS LAST""",
    "Row accounting per ingest batch": """\
SELECT started_at, kind, source_file, rows_read, accepted, quarantined, duplicates, status
FROM batches ORDER BY started_at DESC""",
    "Quarantined rows by rule": """\
SELECT rule, kind, count(*) AS rows, any_value(message) AS example
FROM quarantine GROUP BY ALL ORDER BY rows DESC""",
}


@dataclass
class ConsoleOutcome:
    """What the SQL page shows: a result, or an error message with a hint."""

    result: Any = None
    error: str | None = None
    hint: str | None = None


def run_console_query(settings, sql: str, row_cap: int | None = None,
                      time_limit_s: float | None = None) -> ConsoleOutcome:
    """Run console SQL through the guarded ``fleetwatch.query.run_query`` (read only, one
    statement, time limit, row cap). Refused or failed queries come back as ``error``."""
    from .errors import FleetwatchError
    from .query import run_query

    if not sql or not sql.strip():
        return ConsoleOutcome(error="The query is empty.",
                              hint="Write a SELECT, or choose an example.")
    try:
        return ConsoleOutcome(result=run_query(sql, settings=settings, row_cap=row_cap,
                                               time_limit_s=time_limit_s))
    except FleetwatchError as exc:
        return ConsoleOutcome(error=exc.message, hint=exc.hint)


def views_reference():
    """The views the console can read, one row per column (from the schema registry)."""
    import polars as pl

    from .schema import TABLES

    rows = [{"view": t.name, "column": c.name, "type": c.type, "unit": c.unit, "meaning": c.help}
            for t in TABLES.values() for c in t.columns]
    return pl.DataFrame(rows)


# ---------------------------------------------------------------- reports
@dataclass
class ReportEntry:
    """One weekly report folder (reports/YYYY-Www/)."""

    week: str
    folder: Path
    summary: dict | None

    @property
    def html(self) -> Path:
        return self.folder / "report.html"

    @property
    def actions(self) -> Path:
        return self.folder / "actions.csv"

    @property
    def summary_path(self) -> Path:
        return self.folder / "summary.json"

    def files(self) -> list[tuple[str, Path, str]]:
        return [("HTML", self.html, "text/html"), ("CSV", self.actions, "text/csv"),
                ("JSON", self.summary_path, "application/json")]


def list_reports(settings) -> list[ReportEntry]:
    """Weekly reports in the reports folder, newest week first."""
    import json
    import re

    root = Path(settings.reports_path)
    if not root.is_dir():
        return []
    out = []
    for d in root.iterdir():
        if d.is_dir() and re.fullmatch(r"\d{4}-W\d{2}", d.name):
            summary = None
            if (d / "summary.json").is_file():
                try:
                    summary = json.loads((d / "summary.json").read_text(encoding="utf-8"))
                except (OSError, ValueError):
                    summary = None
            out.append(ReportEntry(d.name, d, summary))
    return sorted(out, key=lambda r: r.week, reverse=True)


def reports_display(reports: list[ReportEntry]):
    import polars as pl

    def built(r: ReportEntry):
        p = r.html if r.html.is_file() else r.folder
        return dt.datetime.fromtimestamp(p.stat().st_mtime, dt.timezone.utc)

    return pl.DataFrame({
        "week": [r.week for r in reports],
        "built (UTC)": [built(r) for r in reports],
        "files": [", ".join(label for label, p, _ in r.files() if p.is_file()) for r in reports],
    })


def report_headline(rep: ReportEntry) -> list[tuple[str, str]]:
    """Up to four headline figures from a report's summary.json (status counts first)."""
    s = rep.summary or {}
    out: list[tuple[str, str]] = []
    counts = s.get("status_counts") or s.get("counts") or {}
    if isinstance(counts, dict):
        for k in ("alert", "watch", "normal"):
            if k in counts:
                out.append((status_label(k), str(counts[k])))
    for k, v in s.items():
        if len(out) >= 4:
            break
        if isinstance(v, (int, float)) and not isinstance(v, bool):
            out.append((k.replace("_", " "), f"{v:,}" if isinstance(v, int) else f"{v:.3g}"))
    return out[:4]


def read_actions(path: Path):
    import polars as pl

    try:
        return pl.read_csv(path, infer_schema_length=0)
    except Exception:  # an empty or odd file is shown as empty, never breaks the page
        return pl.DataFrame()


@dataclass
class BuildOutcome:
    week: str | None = None
    path: Path | None = None
    error: str | None = None
    hint: str | None = None


def report_weeks(source, timezone: str = "UTC", n: int = 12) -> tuple[list[str], int]:
    """Weeks a report can be built for, newest first: the ``n`` ISO weeks up to the latest
    day with health results; and the index of the default, the last complete week by the
    plant's clock when it has data, else the newest week with data."""
    from . import views

    days = views.fleet_overview(source)["health_day"].drop_nulls()
    if not len(days):
        return [], 0
    weeks = [views.IsoWeek.containing(days.max())]
    while len(weeks) < n and weeks[-1].monday > days.min():
        weeks.append(weeks[-1].previous())
    labels = [w.label for w in weeks]
    clock = views.IsoWeek.last_complete(timezone).label
    return labels, labels.index(clock) if clock in labels else 0


def build_week_report(settings, week: str | None = None) -> BuildOutcome:
    """Build the weekly report for ``week`` (YYYY-Www; default the last complete week) with
    ``fleetwatch.report.build_report``; refused or failed builds come back as ``error``."""
    from .errors import FleetwatchError
    from .report import build_report

    try:
        res = build_report(settings, week=week)
    except FleetwatchError as exc:
        return BuildOutcome(error=exc.message, hint=exc.hint)
    paths = getattr(res, "paths", {}) or {}
    html = Path(paths.get("html")) if paths.get("html") else None
    week = getattr(res, "week", None) or (html.parent.name if html else None)
    return BuildOutcome(week=str(week), path=html)


# ---------------------------------------------------------------- charts
# The chart builders are fleetwatch.charts' (shared with the report: one palette, status
# colour always with its symbol and word). The dashboard adds event markers on time axes and
# turns charts into Vega-Lite JSON inside the cached functions below: building and
# validating Altair objects costs 0.1-0.3 s per chart, so a page rerun must not redo it.

def chart_spec(chart) -> dict:
    """Vega-Lite JSON of a fleetwatch.charts chart with the dashboard's look (set on the JSON:
    each Altair ``configure_*`` call would copy the whole chart, data included)."""
    from .charts import FONT

    spec = chart.to_dict(validate=False)
    # fit the width to the page column, keep the chart's own plot height (Streamlit's
    # default "fit" squeezes legends and axes into that height)
    spec.setdefault("autosize", {"type": "fit-x", "contains": "padding"})
    # Draw on a canvas: Streamlit's default for small charts is SVG, one DOM node per
    # point, rule and label (200-550 per chart here) for the browser to style and lay out.
    # A canvas has no per-mark accessibility tree, so Vega-Lite's per-mark ARIA
    # descriptions (an expression evaluated for every point) are switched off too; the
    # chart's accessible name comes from its titles (chart_alt, passed as Streamlit's alt).
    spec.setdefault("usermeta", {}).setdefault("embedOptions", {}).setdefault(
        "renderer", "canvas")
    cfg = spec.setdefault("config", {})
    cfg.setdefault("aria", False)
    cfg.setdefault("font", FONT)
    cfg.setdefault("view", {"stroke": "#d0d0d0"})
    cfg.setdefault("title", {"anchor": "start", "fontSize": 13})
    return spec


def chart_alt(spec: dict | None) -> str | None:
    """A short text alternative for a chart: its titles (stacked panels and layers
    included), joined with '; '; None when it has none."""
    titles: list[str] = []

    def walk(node: Any) -> None:
        if not isinstance(node, dict):
            return
        t = node.get("title")
        if isinstance(t, dict):
            t = t.get("text")
        if isinstance(t, list):
            t = " ".join(map(str, t))
        if t and str(t) not in titles:
            titles.append(str(t))
        for key in ("layer", "vconcat", "hconcat", "concat"):
            for sub in node.get(key) or ():
                walk(sub)

    walk(spec)
    return "; ".join(titles) or None


def _marker_layer(markers):
    """Vertical rules at events (solid) and maintenance (dashed), colour and dash by source."""
    import altair as alt

    from . import charts

    data = charts._prep(markers.select("ts", "source", "kind", "detail"))
    sources = ["event", "maintenance"]
    return alt.Chart(data).mark_rule(strokeWidth=1.2, opacity=0.6).encode(
        x=alt.X("ts:T", scale=alt.Scale(type="utc")),
        color=alt.Color("source:N", title="marker", scale=alt.Scale(
            domain=sources, range=["#CC79A7", charts.SERIES_COLOURS["maintenance"]]),
            legend=alt.Legend(orient="top")),
        strokeDash=alt.StrokeDash("source:N", legend=None, scale=alt.Scale(
            domain=sources, range=[[1, 0], [4, 3]])),
        tooltip=[alt.Tooltip("ts:T", title="time (UTC)", format="%Y-%m-%d %H:%M"),
                 "source:N", "kind:N", "detail:N"])


def marker_layer(markers) -> dict | None:
    """Vega-Lite JSON of the event/maintenance rules (its rows under ``datasets``); None
    when there are none. Built once per page and added to each time-axis chart."""
    if markers is None or markers.is_empty():
        return None
    layer = _marker_layer(markers).to_dict(validate=False)
    for key in ("$schema", "config"):
        layer.pop(key, None)
    return layer


def with_markers(spec: dict, layer: dict | None) -> dict:
    """A time-axis chart's Vega-Lite JSON (``chart_spec``) with the marker ``layer`` added
    (to the top chart of a vertical stack). Works on the JSON: layering Altair objects copies
    every chart with its data."""
    if layer is None:
        return spec
    layer = dict(layer)
    spec.setdefault("datasets", {}).update(layer.pop("datasets", {}))
    target = spec["vconcat"][0] if "vconcat" in spec else spec
    if "layer" not in target:
        unit_keys = ("data", "mark", "encoding", "transform", "params")
        target["layer"] = [{k: target.pop(k) for k in unit_keys if k in target}]
    target["layer"].append(layer)
    scale = target.setdefault("resolve", {}).setdefault("scale", {})
    scale.update(color="independent", strokeDash="independent")
    return spec


# ---------------------------------------------------------------- page bundles (cached)
#: Points per time series on the Unit page (at most; views.bucket_seconds picks round
#: buckets: 90 days -> 8-hour means, 270 points). Points cost the browser time to parse
#: and draw (measured: 7 charts of 700 points took 0.35 s more main-thread CPU, 1.4 s more
#: wall at load 12 on 2 cores, than of 300), and past about a point per 2 pixels the eye
#: gains nothing.
CHART_POINTS = 300


@dataclass
class UnitView:
    """Everything the Unit page draws for one unit and time range.

    ``charts``: name -> Vega-Lite spec, or None when there is nothing to draw:
    ``slip`` (steady slip with trend, forecast and limit), ``operation`` (one stack on a
    shared time axis: commanded against actual ratio with the tracking error, input power
    with efficiency or the power residual, temperature) and ``health`` (status by day
    above the anomaly scores, on one day axis). The stacks' time panels have their x
    domain pinned to the chosen range (:func:`time_domain`), so they still line up when the
    page draws every chart in one view (:func:`page_spec`). Event and maintenance markers
    are drawn on the time-axis panels. ``missing``: what the stacks leave out for lack of
    data, as sentences for the page. The tables are polars frames.
    """

    charts: dict[str, dict | None]
    health_changes: Any
    top_scores: Any
    markers: Any
    missing: list[str] = field(default_factory=list)


def stack_specs(specs: list[dict]) -> dict | None:
    """One Vega-Lite vertical stack of ``chart_spec`` outputs (None when none): the browser
    sets up one chart (a Streamlit element, a Vega view) instead of several. The panels
    share one x (time) scale, and only the bottom panel draws the axis labels and title. With the
    smaller point budget this took the Unit page's browser main-thread CPU from about
    2.4 s to 1.2-1.9 s (measured at load 9-16 on 2 cores)."""
    specs = [s for s in specs if s is not None]
    if not specs:
        return None
    if len(specs) == 1 and "vconcat" not in specs[0]:
        return specs[0]
    out: dict[str, Any] = {"$schema": specs[0].get("$schema"), "config": specs[0]["config"],
                           "usermeta": specs[0].get("usermeta", {}),
                           "datasets": {}, "vconcat": [], "spacing": 12,
                           # one time scale for every panel: the panels line up, and
                           # only the bottom one needs its axis labels
                           "resolve": {"scale": {"x": "shared"}}}
    for spec in specs:
        spec = dict(spec)
        out["datasets"].update(spec.pop("datasets", {}))
        for key in ("$schema", "config", "autosize", "spacing", "usermeta"):
            spec.pop(key, None)
        if "vconcat" in spec and set(spec) <= {"vconcat", "data"}:
            # a stack itself: lift its panels (with the data they inherit), so that every
            # panel gets the same (page) width
            shared = {"data": spec["data"]} if "data" in spec else {}
            out["vconcat"] += [{**shared, **panel} for panel in spec["vconcat"]]
        else:
            out["vconcat"].append(spec)
    for panel in out["vconcat"][:-1]:
        _hide_x_labels(panel)
    if out["$schema"] is None:
        out.pop("$schema")
    return out


def _hide_x_labels(node: dict) -> None:
    """Drop the time axis' labels, ticks and title of a stacked panel (and its layers);
    the bottom panel, on the same x scale, carries them. Grid lines stay."""
    enc = node.get("encoding") or {}
    x = enc.get("x")
    if isinstance(x, dict) and x.get("axis", {}) is not None:
        # new dicts, not edits: the marker layer's encoding is shared by every panel
        node["encoding"] = {**enc, "x": {**x, "axis": {**(x.get("axis") or {}),
                                                       "labels": False, "ticks": False,
                                                       "title": None}}}
    for sub in node.get("layer") or ():
        _hide_x_labels(sub)


def _pin_x(node: dict, domain: list) -> dict:
    """A copy of a time-axis panel (and its layers) with every temporal x scale fixed to
    ``domain`` (:func:`time_domain`): panels in one view with independent scales still line up.
    New dicts, not edits: layers may share their encoding with other panels."""
    out = dict(node)
    enc = node.get("encoding") or {}
    x = enc.get("x")
    if isinstance(x, dict) and x.get("type") == "temporal":
        out["encoding"] = {**enc, "x": {**x, "scale": {**(x.get("scale") or {}),
                                                       "domain": list(domain)}}}
    if "layer" in node:
        out["layer"] = [_pin_x(sub, domain) for sub in node["layer"]]
    if "vconcat" in node:
        out["vconcat"] = [_pin_x(sub, domain) for sub in node["vconcat"]]
    return out


def time_domain(start: dt.date, end: dt.date) -> list[dict]:
    """[start 00:00, end + 1 day 00:00] UTC as Vega-Lite DateTime objects: the x range of
    every time-axis panel of a Unit page. (Not epoch numbers: Vega-Lite turns a number in
    a temporal domain into ``datetime(n)``, which reads it as a year.)"""
    def at(day: dt.date) -> dict:
        return {"year": day.year, "month": day.month, "date": day.day, "utc": True}
    return [at(start), at(end + dt.timedelta(days=1))]


#: Channels each panel of :func:`page_spec` keeps to itself (its own scale and legend).
_OWN_CHANNELS = ("x", "y", "color", "shape", "strokeDash", "opacity", "size")


def page_spec(specs: list[dict | None]) -> dict | None:
    """One Vega-Lite view for a whole page: the ``chart_spec`` / :func:`stack_specs` outputs
    given, their panels in one vertical stack (a stack's panels lifted out), each panel
    with its own scales and legends (time panels line up through their pinned x domain,
    see :func:`unit_view`); None when there is nothing to draw.

    The browser pays a chart's fixed costs (a Streamlit element, vega-embed, a Vega view,
    its layout and resize runs) once instead of once per chart: on the Unit page (4 charts
    before) this took 0.2-0.4 s of main-thread CPU off a first open (measured at load 6-11
    on 2 cores, with the time-range select box). The whole view fits the page width,
    axes included (Vega-Lite's fit-x over the stack; measured at no extra browser CPU)."""
    specs = [s for s in specs if s is not None]
    if not specs:
        return None
    first = specs[0]
    out: dict[str, Any] = {"$schema": first.get("$schema"), "config": first["config"],
                           "usermeta": first.get("usermeta", {}), "datasets": {},
                           "vconcat": [], "spacing": 18,
                           # Streamlit sets every panel's plot width to the page's; fitting
                           # shrinks them to leave room for the y axes, where a plain stack
                           # ran past the page's right edge by its axis width
                           "autosize": {"type": "fit-x", "contains": "padding"},
                           "resolve": {
                               "scale": {c: "independent" for c in _OWN_CHANNELS},
                               "axis": {"x": "independent", "y": "independent"},
                               "legend": {c: "independent" for c in _OWN_CHANNELS
                                          if c not in ("x", "y")}}}
    for spec in specs:
        spec = dict(spec)
        out["datasets"].update(spec.pop("datasets", {}))
        for key in ("$schema", "config", "autosize", "spacing", "usermeta"):
            spec.pop(key, None)
        # a stack's panels are lifted out (its own resolve, the shared x, goes: the panels
        # line up through their pinned domain); a single chart keeps its resolve, which
        # keeps its layers' scales apart (the event markers' colours, see with_markers)
        if "vconcat" in spec and set(spec) <= {"vconcat", "data", "resolve"}:
            shared = {"data": spec["data"]} if "data" in spec else {}
            out["vconcat"] += [{**shared, **panel} for panel in spec["vconcat"]]
        else:
            out["vconcat"].append(spec)
    if out["$schema"] is None:
        out.pop("$schema")
    return out


def unit_view(source, unit_id: str, start: dt.date, end: dt.date, limit: float,
              threshold: float) -> UnitView:
    """Data and charts of the Unit page (views + charts, one lake snapshot).

    ``limit``: slip limit (-); ``threshold``: anomaly score at which a day counts (-).
    Time series are averaged to at most :data:`CHART_POINTS` points (round buckets).
    """
    from . import charts, views

    kw = dict(start=start, end=end)
    pts = dict(max_points=CHART_POINTS, **kw)
    markers = unit_markers(source, unit_id, **kw)
    rules = marker_layer(markers)
    slip = views.unit_slip_series(source, unit_id, limit=limit, **kw)
    with _unit_windows(source, unit_id, start, end) as win:
        ratio = views.ratio_series(win, unit_id, **pts)
        power = views.power_series(win, unit_id, **pts)
        temp = views.temperature_series(win, unit_id, **pts)
    health = views.health_history(source, unit_id, **kw)
    scores = views.anomaly_scores(source, unit_id, **kw)

    def spec(empty: bool, build, marked: bool = True):
        if empty:
            return None
        out = chart_spec(build())
        return with_markers(out, rules) if marked else out

    missing = [text for empty, text in (
        (ratio.is_empty(), "No steady-state ratio data in this range."),
        (power.is_empty(), "No input power data in this range."),
        (temp.is_empty(), "No temperature logged for this unit in this range."),
        (health.is_empty(), "No health results in this range."),
        (scores.is_empty(), "No anomaly scores in this range.")) if empty]
    # the time-axis panels' x range is the chosen range, written out: they line up on
    # the page whether their stack shares one x scale or the page's view (page_spec)
    # gives each panel its own
    domain = time_domain(start, end)

    def pinned(stack: dict | None) -> dict | None:
        return None if stack is None else _pin_x(stack, domain)

    out = {
        "slip": spec(slip.points.is_empty(), lambda: charts.unit_slip_chart(slip)),
        "operation": pinned(stack_specs([
            spec(ratio.is_empty(), lambda: charts.ratio_chart(ratio)),
            spec(power.is_empty(), lambda: charts.power_chart(power)),
            spec(temp.is_empty(), lambda: charts.temperature_chart(temp))])),
        "health": pinned(stack_specs([
            spec(health.is_empty(), lambda: charts.health_history_chart(health),
                 marked=False),
            spec(scores.is_empty(),
                 lambda: charts.anomaly_scores_chart(scores, threshold=threshold),
                 marked=False)])),
    }
    return UnitView(out, health_changes(health), top_scores(scores, threshold),
                    markers_display(markers), missing)


#: Columns the time-series views (ratio, power, temperature) read; copying only these is
#: about twice as fast as whole rows. A view reading another column fails loudly in tests.
_SERIES_COLUMNS = {
    "windows": ("unit_id", "window_start", "day", "samples", "steady_samples",
                "ratio_cmd_mean", "ratio_act_mean", "ratio_error", "p_in_mean", "temp_mean"),
    "efficiency": ("unit_id", "window_start", "day", "method", "efficiency",
                   "power_resid_pct"),
}


def _unit_windows(source, unit_id: str, start: dt.date, end: dt.date):
    """An in-memory DuckDB holding only this unit's ``windows`` and ``efficiency`` rows of
    [start, end] (UTC days): the three time-series views then scan a few thousand rows
    instead of the fleet's table six times (two queries each)."""
    import duckdb

    sub = duckdb.connect(":memory:")
    with source.connect() as con:
        have = {r[0] for r in con.sql("SELECT view_name FROM duckdb_views()").fetchall()}
        for name, cols in _SERIES_COLUMNS.items():
            if name in have:
                sub.register(name, con.sql(
                    f"SELECT {', '.join(cols)} FROM {name} "
                    "WHERE unit_id = $u AND day BETWEEN $a AND $b",
                    params={"u": unit_id, "a": start, "b": end}).to_arrow_table())
    return _Prepared(sub)


class _Prepared:
    """A private DuckDB connection as a views ``source``: prepared for fleetwatch.views once
    (time zone, empty views for missing tables) instead of once per query; closed with
    ``with`` like a connection."""

    def __init__(self, con):
        from .views import _prepare

        _prepare(con)
        self._con, self._lock = con, threading.RLock()

    def connect(self) -> _Borrowed:
        self._lock.acquire()
        return _Borrowed(self._con, self._lock)

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self._con.close()


def creep_spec(source, unit_id: str, week, timezone: str = "UTC") -> dict | None:
    """Creep versus load chart for one ISO week against the reference weeks (None: no data)."""
    from . import charts, views

    cmp = views.creep_week_vs_reference(source, unit_id, week, timezone=timezone)
    if cmp.points.is_empty() and cmp.lines.is_empty():
        return None
    return chart_spec(charts.creep_chart(cmp))


def fleet_slip_spec(source, limit: float) -> dict | None:
    """The fleet's weekly slip distribution chart (None: no slip at load yet)."""
    from . import charts, views

    dist = views.fleet_slip_distribution(source)
    return None if dist.is_empty() else chart_spec(
        charts.fleet_slip_distribution_chart(dist, limit=limit))


def events_spec(source, start: dt.date, end: dt.date, units: tuple = (),
                kinds: tuple = ()) -> dict | None:
    """Events timeline by unit for the filtered events (None: none, or too many to draw)."""
    from . import charts

    ev = filter_events(fleet_events(source, start=start, end=end), units=units, kinds=kinds)
    if not 0 < ev.height <= 5000:   # Altair embeds the rows; past that, the table only
        return None
    return chart_spec(charts.events_timeline_chart(ev, start=start, end=end, by="unit_id",
                                                   title="Events by unit"))


def energy_spec(source) -> dict | None:
    from . import charts, views

    energy = views.energy_summary(source)
    return None if energy.is_empty() else chart_spec(charts.energy_chart(energy))
