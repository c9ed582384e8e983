"""The demo: a simulated fleet run through the whole job, end to end.

``run_demo`` creates a project folder (default ``./fleetwatch-demo``), simulates the demo
fleet into ``<project>/demo_fleet/``, ingests its logs and maintenance log into the lake,
runs analyze (SQL models, fits, health models), prints the status table, writes the
latest weekly report, and starts the dashboard unless ``serve`` is False.
"""
from __future__ import annotations

import importlib.util
import time
from pathlib import Path
from typing import Callable

from .config import CONFIG_FILE, load_settings, write_default_toml

__all__ = ["run_demo", "DEMO_DIR"]

DEMO_DIR = "fleetwatch-demo"


def _have(module: str) -> bool:
    return importlib.util.find_spec(module) is not None


def _last_data_week(settings) -> str | None:
    """The last complete ISO week of the demo's data (the demo fleet lies in the past)."""

    from .lake import Lake
    from .views import IsoWeek

    days = Lake.from_settings(settings).read("unit_days", columns=["day"])
    if days.height == 0:
        return None
    last = days["day"].max()
    week = IsoWeek.containing(last)
    return (week if last >= week.sunday else week.previous()).label


def run_demo(project: str | Path | None = None, units: int = 24, days: int = 120, seed: int = 7,
             serve: bool = True, echo: Callable[[str], None] = print) -> dict:
    """Run the demo; returns what was written (paths and counts).

    ``project``: the project folder; when None, ``./fleetwatch-demo`` (so a demo started in a
    source checkout does not scatter files into it).
    """
    from .simulate import simulate_fleet

    t0 = time.perf_counter()
    root = Path(project).resolve() if project else (Path.cwd() / DEMO_DIR).resolve()
    root.mkdir(parents=True, exist_ok=True)
    if not (root / CONFIG_FILE).exists():
        write_default_toml(root / CONFIG_FILE)
    settings = load_settings(root)
    out: dict = {"project": str(root)}

    fleet_dir = root / "demo_fleet"
    echo(f"[1] Simulating {units} drives for {days} days into {fleet_dir} ...")
    sim = simulate_fleet(fleet_dir, units=units, days=days, seed=seed)
    out["simulated_rows"] = sim.rows
    echo(f"    {len(sim.files)} files, {sim.rows:,} rows ({sim.elapsed_s:.1f} s); "
         f"answer key {sim.answer_key}")

    from .ingest import ingest_files

    echo("[2] Ingesting logs and the maintenance log into the lake ...")
    rep = ingest_files(sorted(str(f) for f in fleet_dir.glob("telemetry_*.csv")), settings, mapping=fleet_dir / "mapping.toml",
                       kind="telemetry")
    mrep = ingest_files([fleet_dir / "maintenance.csv"], settings,
                        mapping=fleet_dir / "maintenance_mapping.toml", kind="maintenance")
    t = rep.totals
    echo(f"    telemetry: read {t['rows_read']:,} = accepted {t['accepted']:,} + quarantined "
         f"{t['quarantined']:,} + duplicates {t['duplicates']:,}")
    echo(f"    maintenance: {mrep.totals['accepted']} entries")
    out["ingest"] = t

    from .analyze import analyze

    echo("[3] Analyzing: slip, events, fits, anomaly scores, trends, health ...")
    arep = analyze(settings, full=True)
    out["analyze"] = getattr(arep, "rows", None)

    if _have("fleetwatch.status"):
        from .status import fleet_status, format_status_table

        echo("[4] Fleet status (latest day):")
        echo(format_status_table(fleet_status(settings)))

    if _have("fleetwatch.advisor"):
        from .advisor import advise

        echo("[5] Ratio advice (least input power per duty) ...")
        adv = advise(settings, write=True)
        out["advice"] = adv.summary
        echo(f"    fleet saving if followed: {adv.fleet_kwh_week:.2f} kWh/week "
             f"({adv.fleet_kwh_week_low:.2f} .. {adv.fleet_kwh_week_high:.2f})")

    if _have("fleetwatch.report"):
        from .report import build_report

        week = _last_data_week(settings)
        echo(f"[6] Weekly wear report for {week or 'the last complete week'} ...")
        res = build_report(settings, week=week)
        out["report"] = str(res.paths["html"])
        echo(f"    {res.paths['html']}")

    echo(f"Demo built in {time.perf_counter() - t0:.0f} s. Project: {root}")
    echo(f"Try: fleetwatch --project {root} sql \"SELECT unit_id, status, reasons FROM health "
         f"WHERE day = (SELECT max(day) FROM health) ORDER BY status = 'normal', status, "
         f"unit_id\"")   # alert, then watch, then normal
    if serve and _have("fleetwatch.dashboard"):
        from .dashboard import serve_dashboard

        echo("[7] Starting the dashboard (Ctrl+C stops it) ...")
        serve_dashboard(settings, block=True, echo=echo)
    return out
