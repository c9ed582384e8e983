"""Project folders with a lake for the dashboard tests and benchmark.

``build_project``: the synthetic derived tables of ``report_lake`` written as analyze writes
them (windows and efficiency streamed month by month, the rest through ``Lake.overwrite``):
every column of ``fleetwatch.schema`` and planted statuses whose expected
values the tests know (``Truth``); sizes are free (the benchmark's year of 24 units).
``simulated_fleet``: the small fleet of ``fixtures_fleet`` taken through the real pipeline
(simulate -> ingest -> analyze), built once per pytest session and shared by the AppTest and
browser tests; ``expected_status`` reads what its lake says each unit's status is.
"""
from __future__ import annotations

import json
import socket
from pathlib import Path

from report_lake import synthetic_tables, write_lake

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
PACKAGED_APP = ROOT / "fleetwatch" / "dashboard_app" / "app.py"
THIN_APP = ROOT / "dashboards" / "app.py"


def build_project(root: Path, units: int = 16, days: int = 63, window_min: int = 60,
                  layout: str = "analyze"):
    """Write ``fleetwatch.toml`` and a lake under ``root``; returns report_lake's Truth.

    ``layout``: "analyze" (default) stores windows and efficiency the way ``fleetwatch
    analyze`` does (month-ordered, streamed; report_lake.write_lake), so the dashboard reads
    the layout users get; "overwrite" sorts every table by its key."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "fleetwatch.toml").write_text(f"[analyze]\nwindow_min = {window_min}\n",
                                          encoding="utf-8")
    tables, truth = synthetic_tables(units=units, days=days, window_min=window_min)
    write_lake(root / "lake", tables, layout=layout)
    return truth


def simulated_fleet(tmp_path_factory) -> tuple[Path, dict]:
    """(project folder, answer key) of the pipeline-built fleet, built on first use."""
    from fixtures_fleet import build_fleet

    base = tmp_path_factory.getbasetemp() / "dashboard_fleet"
    if not (base / "built").exists():
        build_fleet(base)
        (base / "built").write_text("ok", encoding="utf-8")
    key = json.loads((base / "sim" / "answer_key.json").read_text(encoding="utf-8"))
    return base / "project", key


def expected_status(project: Path) -> dict[str, str]:
    """Unit -> status on its latest health day, read straight from the lake."""
    import polars as pl

    from fleetwatch.config import load_settings
    from fleetwatch.lake import Lake

    health = Lake.from_settings(load_settings(project, env={})).read("health")
    latest = health.sort("day").group_by("unit_id").agg(pl.col("status").last())
    return dict(zip(latest["unit_id"], latest["status"]))


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]
