"""A small simulated fleet taken through simulate -> ingest -> analyze, for tests.

``build_fleet(root)`` simulates the committed demo fleet's arguments (``SAMPLE_ARGS``:
8 drives, 45 days, 5-minute logging; every fault kind once), ingests the maintenance log
and the June telemetry, analyzes, ingests the July telemetry and analyzes again (the
incremental path). It returns a ``Fleet`` with the settings, the answer key and both
reports. Tests import it and wrap it in a module- or session-scoped fixture::

    from fixtures_fleet import build_fleet     # tests/ is on sys.path under pytest

    @pytest.fixture(scope="session")
    def fleet(tmp_path_factory):
        return build_fleet(tmp_path_factory.mktemp("fleet"))
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from fleetwatch.analyze import AnalyzeReport, analyze
from fleetwatch.config import Settings, load_settings
from fleetwatch.ingest import ingest_files
from fleetwatch.simulate import SAMPLE_ARGS, simulate_fleet

FLEET_ARGS: dict[str, Any] = dict(SAMPLE_ARGS)


@dataclass
class Fleet:
    project: Path
    sim_dir: Path
    settings: Settings
    key: dict
    first: AnalyzeReport
    second: AnalyzeReport

    def units(self, condition: str) -> list[str]:
        return [u for u, t in self.key["units"].items() if t["condition"] == condition]


def build_fleet(root: Path, **overrides: Any) -> Fleet:
    args = {**FLEET_ARGS, **overrides}
    sim = root / "sim"
    simulate_fleet(sim, **args)
    project = root / "project"
    project.mkdir(parents=True, exist_ok=True)
    settings = load_settings(project, overrides={"sample_period_s": float(args["period_s"])},
                             env={})
    ingest_files([sim / "maintenance.csv"], settings,
                 mapping=sim / "maintenance_mapping.toml", kind="maintenance")
    files = sorted(sim.glob("telemetry_*.csv"))
    months = sorted({f.stem.rsplit("_", 1)[1] for f in files})
    ingest_files([f for f in files if f.stem.endswith(months[0])], settings,
                 mapping=sim / "mapping.toml")
    first = analyze(settings)
    ingest_files([f for f in files if not f.stem.endswith(months[0])], settings,
                 mapping=sim / "mapping.toml")
    second = analyze(settings)
    key = json.loads((sim / "answer_key.json").read_text(encoding="utf-8"))
    return Fleet(project, sim, settings, key, first, second)
