"""One JSON encoding for every machine-readable output (CLI ``--json``, report summary).

Timestamps with a zone are written in UTC with a ``Z`` suffix, dates and naive times in ISO
8601, paths as text and numpy scalars as plain numbers.
"""
from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any


def json_default(o: Any) -> Any:
    """``default=`` hook for :func:`json.dumps` covering the types fleetwatch outputs hold."""
    if isinstance(o, dt.datetime):
        if o.tzinfo is not None:
            return o.astimezone(dt.timezone.utc).isoformat().replace("+00:00", "Z")
        return o.isoformat()
    if isinstance(o, dt.date):
        return o.isoformat()
    if isinstance(o, Path):
        return str(o)
    if hasattr(o, "item"):          # numpy scalar
        return o.item()
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def dumps(obj: Any) -> str:
    """``obj`` as indented JSON text."""
    return json.dumps(obj, indent=2, default=json_default)
