"""Weekly wear report: report.html (self-contained, offline), actions.csv, summary.json.

``build_report(settings, week=None, out_dir=None, pdf=False)`` writes the three files (and
report.pdf with ``pdf=True``) into ``<reports_dir>/<YYYY-Www>/``. The week is an ISO 8601
week; by default the last complete week in the plant's time zone (``plant_timezone``).

Consistency: the report takes the lake's writer lock just long enough to open its DuckDB
connection (each table's Delta snapshot is pinned when the connection registers it), so it
never reads half of an ingest or analyze run (say, new ``windows`` with old ``health``);
then it releases the lock and renders from that snapshot. When a writer holds the lock the
report waits up to ``lock_timeout_s`` and then refuses with ReportError (exit 1).

Replacement is atomic: files are written into a temporary folder next to the target and
swapped in with one rename (Linux ``renameat2(RENAME_EXCHANGE)``; elsewhere two renames).
"""
from __future__ import annotations

import csv
import ctypes
import datetime as dt
import io
import math
import os
import re
import shutil
import subprocess
import tempfile
import time
import uuid
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import polars as pl

from . import __version__, _json
from . import charts as ch
from . import views as vw
from .errors import FleetwatchError, ReportError
from .views import IsoWeek

__all__ = ["build_report", "ReportResult", "resolve_week", "plan_by", "unit_anchor",
           "find_chromium", "print_pdf", "ACTIONS_COLUMNS", "SCHEMA_VERSION", "SECTIONS"]

SCHEMA_VERSION = 1
ACTIONS_COLUMNS = ("unit_id", "status", "since", "reasons", "suggested_action", "plan_by",
                   "link")
#: Section ids of report.html, in order.
SECTIONS = ("summary", "actions", "evidence", "events", "motor", "energy", "data-quality",
            "method", "safety")
CHROMIUM_CANDIDATES = ("/usr/lib/chromium/chromium", "/usr/bin/chromium",
                       "/usr/bin/chromium-browser", "/usr/bin/google-chrome")
_TEMPLATES = Path(__file__).parent / "templates"


@dataclass
class ReportResult:
    """What ``build_report`` wrote: ``paths`` (keys dir, html, actions, summary and, with
    pdf, pdf), the ISO ``week`` label and the ``summary`` dict written to summary.json."""

    paths: dict[str, Path]
    week: str
    summary: dict[str, Any]
    timings_s: dict[str, float] = field(default_factory=dict)


def resolve_week(week: str | IsoWeek | None, timezone: str = "UTC",
                 now: dt.datetime | None = None) -> IsoWeek:
    """``week`` parsed (YYYY-Www), or the last complete ISO week in ``timezone``."""
    if isinstance(week, IsoWeek):
        return week
    if week:
        return IsoWeek.parse(week)
    return IsoWeek.last_complete(timezone, now)


def unit_anchor(unit_id: str) -> str:
    """HTML id of a unit's section: 'unit-' + the id with unsafe characters as '_'."""
    return "unit-" + re.sub(r"[^A-Za-z0-9_-]", "_", unit_id)


def plan_by(status: str, health_day: dt.date | None, days_to_limit: float | None,
            report_date: dt.date, margin_days: int) -> dt.date:
    """Date by which to do the work (always a date, ISO in the files).

    With a forecast: the day of the health row + days to limit - margin, but never before
    the report date. Without one (event- or score-based): alert -> the report date
    (immediate); watch -> report date + margin.
    """
    if days_to_limit is not None and not math.isnan(days_to_limit) and health_day is not None:
        d = health_day + dt.timedelta(days=math.floor(days_to_limit) - int(margin_days))
        return max(report_date, d)
    if status == "alert":
        return report_date
    return report_date + dt.timedelta(days=int(margin_days))


def _split_reasons(text: str | None) -> list[str]:
    return [r.strip() for r in (text or "").split(" | ") if r.strip()]


def _split_causes(text: str | None) -> list[str]:
    return [c.strip() for c in (text or "").split(",") if c.strip()]


# ----------------------------------------------------------------------------- data
def _collect(con: Any, wk: IsoWeek, settings: Any, report_date: dt.date) -> dict[str, Any]:
    """Everything the report shows, from one DuckDB connection (one lake snapshot)."""
    tz = settings.plant_timezone
    t0, t1 = wk.bounds_utc(tz)
    margin = int(getattr(settings, "plan_margin_days", 7))
    overview = vw.fleet_overview(con, wk.sunday)
    counts = vw.status_counts(overview)
    changes_df = vw.health_changes(con, wk)
    changes = vw.changes_summary(changes_df)
    need = overview.filter(pl.col("status").is_in(["watch", "alert"]))
    actions = []
    for r in need.iter_rows(named=True):
        causes = _split_causes(r["causes"])
        pb = plan_by(r["status"], r["health_day"], r["days_to_limit"], report_date, margin)
        actions.append({
            "unit_id": r["unit_id"], "line": r["line"], "status": r["status"],
            "since": r["since"], "days_to_limit": r["days_to_limit"],
            "reasons": _split_reasons(r["reasons"]), "causes": causes,
            "suggested_action": vw.suggested_action(causes), "plan_by": pb,
            "anchor": unit_anchor(r["unit_id"]), "last_data": r["last_data"],
            "change": _change_of(changes_df, r["unit_id"]),
        })
    dq = vw.data_quality(con, wk.monday, wk.sunday)
    week_events = vw.unit_events(con, start=t0, end=t1)
    week_maint = vw.maintenance_markers(con, start=t0, end=t1)
    motor = vw.motor_drift(con, start=wk.monday, end=wk.sunday)
    energy = vw.energy_summary(con, wk.monday, wk.sunday)
    advice = vw.advice_top(con, limit=10)
    advice_totals = vw.advice_totals(con)
    dist = vw.fleet_slip_distribution(con, wk.monday - dt.timedelta(weeks=12), wk.sunday)
    return {
        "overview": overview, "counts": counts, "changes": changes, "changes_df": changes_df,
        "actions": actions, "dq": dq, "week_events": week_events, "week_maint": week_maint,
        "motor": motor, "energy": energy, "advice": advice,
        "advice_totals": advice_totals, "dist": dist, "t0": t0, "t1": t1,
    }


def _change_of(changes_df: pl.DataFrame, unit_id: str) -> str:
    row = changes_df.filter(pl.col("unit_id") == unit_id)
    return row["change"][0] if row.height else "new"


def _evidence(con: Any, wk: IsoWeek, settings: Any, units: list[str],
              history_days: int = 91) -> dict[str, dict[str, Any]]:
    """Frames behind each unit's evidence charts (slip, creep, events), a few queries for
    all units together."""
    if not units:
        return {}
    start = wk.sunday - dt.timedelta(days=history_days - 1)
    t0, t1 = wk.bounds_utc(settings.plant_timezone)
    ev_start = t0 - dt.timedelta(weeks=3)
    slip = vw.slip_series_for_units(con, units, start, wk.sunday)
    creep = vw.creep_for_units(con, units, wk, settings.plant_timezone)
    events = vw.unit_events(con, units, start=ev_start, end=t1)
    maint = vw.maintenance_markers(con, units, start, t1)
    ev_by = {k[0]: v for k, v in events.partition_by("unit_id", as_dict=True).items()} \
        if events.height else {}
    m_by = {k[0]: v for k, v in maint.partition_by("unit_id", as_dict=True).items()} \
        if maint.height else {}
    out = {}
    for u in units:
        m = m_by.get(u, maint.clear())
        out[u] = {"slip": slip[u], "maint": m, "creep": creep[u],
                  "events": ev_by.get(u, events.clear()),
                  "events_maint": m.filter(pl.col("ts") >= ev_start),
                  "ev_start": ev_start, "ev_end": t1}
    return out


# ----------------------------------------------------------------------------- build
def build_report(settings: Any, week: str | IsoWeek | None = None,
                 out_dir: str | os.PathLike | None = None, pdf: bool = False, *,
                 lake: Any = None, now: dt.datetime | None = None) -> ReportResult:
    """Write the weekly report for ``week`` (ISO 8601 ``YYYY-Www``; default: the last
    complete week in ``settings.plant_timezone``).

    Files go into ``<out_dir or reports_dir>/<YYYY-Www>/``: report.html, actions.csv,
    summary.json and, with ``pdf``, report.pdf (headless Chromium). A second run for the
    same week replaces the folder atomically. ``lake`` (tests, scripts) replaces
    ``Lake.from_settings(settings)``; ``now`` fixes the clock.

    Raises UsageError (bad week), ReportError (lake busy, no data, PDF printer missing or
    failing).
    """
    timings: dict[str, float] = {}
    t_all, cpu_all = time.perf_counter(), time.process_time()
    now = now or dt.datetime.now(dt.timezone.utc)
    if now.tzinfo is None:
        now = now.replace(tzinfo=dt.timezone.utc)
    wk = resolve_week(week, settings.plant_timezone, now)
    local_today = now.astimezone(vw._zone(settings.plant_timezone)).date()
    report_date = min(local_today, wk.sunday + dt.timedelta(days=1))
    if lake is None:
        from .lake import Lake

        lake = Lake.from_settings(settings)
    chromium = find_chromium() if pdf else None
    if pdf and chromium is None:
        raise _no_chromium()

    t = time.perf_counter()
    con, versions = _open_snapshot(lake)
    timings["snapshot"] = time.perf_counter() - t
    try:
        t = time.perf_counter()
        data = _collect(con, wk, settings, report_date)
        if data["overview"].height == 0:
            raise ReportError(
                f"no health data in the lake for {wk} or before",
                hint="Run `fleetwatch ingest` and `fleetwatch analyze` first, or pick a week "
                     "with data (--week YYYY-Www).")
        n_max = int(settings.report_units_max)
        evid_units = [a["unit_id"] for a in data["actions"][:n_max]]
        evidence = _evidence(con, wk, settings, evid_units)
        timings["queries"] = time.perf_counter() - t
    finally:
        con.close()

    t, cpu = time.perf_counter(), time.process_time()
    svgs = _render_charts(data, evidence, wk, settings)
    timings["charts"] = time.perf_counter() - t
    timings["charts_cpu"] = time.process_time() - cpu
    timings["charts_n"] = float(len(svgs))

    generated_at = now.astimezone(dt.timezone.utc).replace(microsecond=0)
    summary = _summary(data, wk, settings, generated_at, report_date, versions)
    t = time.perf_counter()
    html = _render_html(data, evidence, svgs, wk, settings, summary)
    timings["html"] = time.perf_counter() - t

    root = Path(out_dir) if out_dir is not None else Path(settings.reports_path)
    root = root.resolve()
    target = root / wk.label
    root.mkdir(parents=True, exist_ok=True)
    _sweep_stale(root, wk.label)
    tmp = Path(tempfile.mkdtemp(prefix=f".{wk.label}.tmp-", dir=root))
    try:
        (tmp / "report.html").write_text(html, encoding="utf-8")
        (tmp / "actions.csv").write_text(_actions_csv(data["actions"]), encoding="utf-8",
                                         newline="")
        files = {"html": "report.html", "actions": "actions.csv", "summary": "summary.json"}
        if pdf:
            t = time.perf_counter()
            print_pdf(tmp / "report.html", tmp / "report.pdf", chromium=chromium)
            timings["pdf"] = time.perf_counter() - t
            files["pdf"] = "report.pdf"
        summary["files"] = files
        (tmp / "summary.json").write_text(_json.dumps(summary)
                                          + "\n", encoding="utf-8")
        os.chmod(tmp, 0o755)
        _swap_into_place(tmp, target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    paths = {"dir": target, **{k: target / v for k, v in files.items()}}
    timings["total"] = time.perf_counter() - t_all
    timings["total_cpu"] = time.process_time() - cpu_all
    return ReportResult(paths, wk.label, summary, timings)


def _open_snapshot(lake: Any) -> tuple[Any, dict[str, Any]]:
    """Connection and table versions read under the writer lock (held only meanwhile)."""
    from .errors import LockHeldError

    writer = getattr(lake, "writer", None)
    try:
        ctx = writer("report") if writer is not None else None
        if ctx is None:
            con = lake.connect()
            return con, _versions(lake)
        with ctx:
            con = lake.connect()
            versions = _versions(lake)
        return con, versions
    except LockHeldError as exc:
        raise ReportError(
            f"the lake is being written ({exc.message}); the report waits for a consistent "
            "snapshot", hint="Run the report after ingest/analyze finish (the scheduled job "
                             "runs them in order), or raise lock_timeout_s to wait longer.") \
            from None


def _versions(lake: Any) -> dict[str, Any]:
    fn = getattr(lake, "versions", None)
    if fn is None:
        return {}
    try:
        v = fn()
    except FleetwatchError:
        return {}
    return {str(k): (int(x) if isinstance(x, (int, float)) else x) for k, x in dict(v).items()}


# ----------------------------------------------------------------------------- charts
def _render_charts(data: dict[str, Any], evidence: dict[str, dict[str, Any]], wk: IsoWeek,
                   settings: Any) -> dict[str, str]:
    """All charts as inline SVG, rendered two at a time (vl-convert releases the GIL)."""
    jobs: dict[str, Callable[[], Any]] = {
        "status_counts": lambda: ch.status_counts_chart(
            data["counts"], f"Units by status at the end of {wk}"),
        "slip_distribution": lambda: ch.fleet_slip_distribution_chart(
            data["dist"], settings.slip_limit),
        "week_events": lambda: ch.events_timeline_chart(
            data["week_events"], data["week_maint"], data["t0"], data["t1"], by="unit_id",
            title=f"Events and maintenance in {wk} (plant time week, shown in UTC)"),
        "motor": lambda: ch.motor_drift_fleet_chart(
            data["motor"].sort("week_start").unique("unit_id", keep="last")),
        "energy": lambda: ch.energy_chart(data["energy"],
                                          title=f"Input energy per unit, {wk}"),
        "completeness": lambda: ch.completeness_chart(data["dq"].completeness),
    }
    for u, ev in evidence.items():
        jobs[f"{u}:slip"] = (lambda ev=ev: ch.unit_slip_chart(ev["slip"], ev["maint"]))
        jobs[f"{u}:creep"] = (lambda ev=ev: ch.creep_chart(ev["creep"]))
        jobs[f"{u}:events"] = (lambda ev=ev, u=u: ch.events_timeline_chart(
            ev["events"], ev["events_maint"], ev["ev_start"], ev["ev_end"],
            title=f"{u}: events and maintenance, last 4 weeks"))

    def render(key: str) -> tuple[str, str]:
        try:
            return key, ch.to_svg(jobs[key]())
        except Exception as exc:  # one bad chart must not sink the report
            return key, ch.to_svg(ch.empty_chart(key, f"chart failed: {type(exc).__name__}"))

    with ThreadPoolExecutor(max_workers=2) as ex:
        return dict(ex.map(render, list(jobs)))


# ----------------------------------------------------------------------------- outputs
def _num(x: Any, nd: int = 1) -> float | None:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return None
    return round(float(x), nd)


def _summary(data: dict[str, Any], wk: IsoWeek, settings: Any, generated_at: dt.datetime,
             report_date: dt.date, versions: dict[str, Any]) -> dict[str, Any]:
    counts = {r["status"]: r["count"] for r in data["counts"].iter_rows(named=True)}
    ov = data["overview"]
    return {
        "schema_version": SCHEMA_VERSION,
        "week": wk.label,
        "week_start": wk.monday, "week_end": wk.sunday,
        "plant_timezone": settings.plant_timezone,
        "generated_at": generated_at,
        "report_date": report_date,
        "fleetwatch_version": __version__,
        "units_total": ov.height,
        "counts": counts,
        "units_needing_action": [{
            "unit_id": a["unit_id"], "status": a["status"], "since": a["since"],
            "days_to_limit": _num(a["days_to_limit"]), "reasons": a["reasons"],
            "causes": a["causes"], "suggested_action": a["suggested_action"],
            "plan_by": a["plan_by"], "link": f"report.html#{a['anchor']}",
        } for a in data["actions"]],
        "changes_since_last_week": {"previous_week": wk.previous().label, **data["changes"]},
        "data_quality": data["dq"].totals(),
        "events_in_week": {k: int(n) for k, n in
                           data["week_events"].group_by("kind").len().sort("kind").iter_rows()},
        "lake_versions": versions,
    }


def _actions_csv(actions: list[dict[str, Any]]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\r\n")
    w.writerow(ACTIONS_COLUMNS)
    for a in actions:
        w.writerow([a["unit_id"], a["status"], a["since"].isoformat() if a["since"] else "",
                    "; ".join(a["reasons"]), a["suggested_action"], a["plan_by"].isoformat(),
                    f"report.html#{a['anchor']}"])
    return buf.getvalue()


def _fmt_days(x: float | None) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    return f"{x:.0f} d"


def _fmt_pct(x: float | None, nd: int = 1) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "–"
    return f"{x * 100:.{nd}f} %"


def _render_html(data: dict[str, Any], evidence: dict[str, Any], svgs: dict[str, str],
                 wk: IsoWeek, settings: Any, summary: dict[str, Any]) -> str:
    import jinja2
    from markupsafe import Markup

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(_TEMPLATES)),
                             autoescape=jinja2.select_autoescape(["html", "j2"]),
                             trim_blocks=True, lstrip_blocks=True,
                             undefined=jinja2.StrictUndefined)
    env.filters.update(days=_fmt_days, pct=_fmt_pct, status_word=ch.status_word,
                       svg=lambda key: Markup(svgs[key]))
    tmpl = env.get_template("report.html.j2")
    t0, t1 = data["t0"], data["t1"]
    ev = data["week_events"]
    ev_counts = (ev.group_by("unit_id", "kind").len().sort("unit_id", "kind")
                 if ev.height else ev.select("unit_id", "kind").with_columns(len=pl.lit(0)))
    motor = data["motor"].sort("week_start").unique("unit_id", keep="last")
    motor_top = (motor.with_columns(worst=pl.max_horizontal(pl.col("r_drift_pct").abs(),
                                                            pl.col("k_e_drift_pct").abs()))
                 .sort("worst", descending=True, nulls_last=True).head(8))
    energy = data["energy"]
    measured = energy.filter(pl.col("efficiency_mean").is_not_null())
    return tmpl.render(
        wk=wk, settings=settings, summary=summary, data=data, actions=data["actions"],
        evidence_units=list(evidence), evidence=evidence,
        counts={r["status"]: r["count"] for r in data["counts"].iter_rows(named=True)},
        status_colours=ch.STATUS_COLOURS, changes=data["changes"],
        week_range=f"{wk.monday:%a %d %b %Y} – {wk.sunday:%a %d %b %Y}",
        bounds_utc=f"{t0:%Y-%m-%d %H:%M} – {t1:%Y-%m-%d %H:%M} UTC",
        events=ev.head(200).iter_rows(named=True), events_total=ev.height,
        ev_counts=list(ev_counts.iter_rows(named=True)),
        maint=list(data["week_maint"].iter_rows(named=True)),
        motor_top=list(motor_top.iter_rows(named=True)),
        energy_total_kwh=float(energy["energy_in_kwh"].sum() or 0.0),
        energy_measured=list(measured.iter_rows(named=True)),
        energy_units=energy.height,
        advice=list(data["advice"].iter_rows(named=True)),
        advice_totals=data["advice_totals"],
        dq=data["dq"], dq_totals=data["dq"].totals(),
        quarantine=list(data["dq"].quarantine.iter_rows(named=True)),
        low_completeness=list(data["dq"].completeness.filter(pl.col("completeness") < 0.9)
                              .iter_rows(named=True)),
        slip_limit=settings.slip_limit, version=__version__,
    )


# ----------------------------------------------------------------------------- files
def _sweep_stale(root: Path, label: str, older_than_s: float = 3600.0) -> None:
    """Remove temp/old folders of this week left by a crashed run (not a running one)."""
    cutoff = time.time() - older_than_s
    for p in root.glob(f".{label}.*"):
        try:
            if p.is_dir() and p.stat().st_mtime < cutoff:
                shutil.rmtree(p, ignore_errors=True)
        except OSError:
            pass


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths (Linux renameat2 RENAME_EXCHANGE); False if unsupported."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p,
                   ctypes.c_uint]
    rc = fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange)
    return rc == 0


def _swap_into_place(tmp: Path, target: Path) -> None:
    """Put ``tmp`` at ``target``: a plain rename when target is absent, an atomic exchange
    when it exists (old contents then removed); fallback: rename old away, rename new in."""
    if not target.exists():
        try:
            os.rename(tmp, target)
            return
        except OSError:
            if not target.exists():
                raise
    if _exchange(tmp, target):
        shutil.rmtree(tmp, ignore_errors=True)   # tmp now holds the old report
        return
    old = target.with_name(f".{target.name}.old-{uuid.uuid4().hex[:8]}")
    os.rename(target, old)
    os.rename(tmp, target)
    shutil.rmtree(old, ignore_errors=True)


# ----------------------------------------------------------------------------- pdf
def find_chromium() -> str | None:
    """Path of a Chromium executable: $FLEETWATCH_CHROMIUM, then Debian's locations."""
    env = os.environ.get("FLEETWATCH_CHROMIUM")
    cands = ([env] if env else []) + list(CHROMIUM_CANDIDATES)
    for c in cands:
        if c and os.path.isfile(c) and os.access(c, os.X_OK):
            return c
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


def _no_chromium() -> ReportError:
    return ReportError("--pdf needs Chromium, and none was found",
                       hint="Install it (Debian/Ubuntu: `sudo apt-get install chromium`) or set "
                            "FLEETWATCH_CHROMIUM to its path; report.html prints on A4 from "
                            "any browser too.")


def print_pdf(html: Path, pdf: Path, chromium: str | None = None,
              timeout_s: float = 120.0) -> Path:
    """Print ``html`` to ``pdf`` (A4 from the page's print CSS) with headless Chromium.

    Raises ReportError when Chromium is missing, fails or times out.
    """
    chromium = chromium or find_chromium()
    if chromium is None:
        raise _no_chromium()
    profile = tempfile.mkdtemp(prefix="fleetwatch-chromium-")
    cmd = [chromium, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--disable-extensions", "--no-pdf-header-footer", f"--user-data-dir={profile}",
           f"--print-to-pdf={Path(pdf).resolve()}", Path(html).resolve().as_uri()]
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout_s)
    except subprocess.TimeoutExpired:
        raise ReportError(f"Chromium did not print {html} within {timeout_s:.0f} s",
                          hint="Retry; open report.html in a browser and print it.") from None
    except OSError as exc:
        raise ReportError(f"cannot start Chromium at {chromium}: {exc}",
                          hint="Reinstall it (`sudo apt-get install chromium`).") from None
    finally:
        shutil.rmtree(profile, ignore_errors=True)
    if proc.returncode != 0 or not Path(pdf).is_file() or Path(pdf).stat().st_size == 0:
        tail = (proc.stderr or "").strip().splitlines()[-3:]
        raise ReportError(f"Chromium failed to print {html} (exit {proc.returncode})",
                          hint="Chromium said: " + " / ".join(tail) if tail else
                          "Open report.html in a browser and print it instead.")
    return Path(pdf)
