"""fleetwatch: condition monitoring for fleets of variable-ratio friction drives.

Public API (the dashboard and scripts import only these names; see DEVELOPERS.md):
settings and errors, the lake, ingest, analyze, the models, reports and the guarded SQL
function. Submodules are imported lazily so ``import fleetwatch`` stays cheap.
"""
from __future__ import annotations

import importlib

__version__ = "0.1.0"

_LAZY = {
    "load_settings": "fleetwatch.config",
    "Settings": "fleetwatch.config",
    "SETTINGS": "fleetwatch.config",
    "FleetwatchError": "fleetwatch.errors",
    "TABLES": "fleetwatch.schema",
    "simulate_fleet": "fleetwatch.simulate",
    "Lake": "fleetwatch.lake",
    "ingest_files": "fleetwatch.ingest",
    "run_query": "fleetwatch.query",
    "analyze": "fleetwatch.analyze",
    "run_models": "fleetwatch.models",
    "fleet_status": "fleetwatch.status",
    "evaluate_detection": "fleetwatch.evaluate",
    "build_report": "fleetwatch.report",
    "advise": "fleetwatch.advisor",
    "run_demo": "fleetwatch.demo",
}

__all__ = ["__version__", *_LAZY]


def __getattr__(name: str):
    if name in _LAZY:
        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'fleetwatch' has no attribute {name!r}")
