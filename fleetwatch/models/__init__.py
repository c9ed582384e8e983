"""Health models: anomaly scores, wear trends and the status rules.

``run_models(lake, settings)`` is the stage analyze calls at its end (inside its writer
lock, so this function never takes the lock itself): it reads ``unit_days``, ``events`` and
``maintenance``, fits and applies the three models and overwrites ``scores``, ``trends`` and
``health`` (each overwrite is one atomic table commit).

The models follow scikit-learn's estimator contract (``_base.py``):

* :class:`RelativeIsolationForest` - isolation forest over per-unit robust z-scores
  (anomaly.py) -> ``scores``;
* :class:`WearTrend` - Theil-Sen trend and days to limit as of every day (trend.py) ->
  ``trends``;
* :class:`HealthRules` - normal / watch / alert with persistence, reasons and causes
  (health.py) -> ``health``.
"""
from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import time
from pathlib import Path
from typing import Any

import numpy as np

import polars as pl

from ..errors import LakeError, ModelError
from ..schema import table
from ._base import FleetModel, NotFittedModelError, assign_segments, empty_maintenance
from .anomaly import DEFAULT_FEATURES, RelativeIsolationForest, average_path_length
from .health import HEALTH_COLUMNS, HealthRules
from .trend import TREND_COLUMNS, WEAR_INDICATORS, WearTrend, theil_sen_asof

__all__ = [
    "RelativeIsolationForest", "WearTrend", "HealthRules", "FleetModel",
    "NotFittedModelError", "run_models", "build_models", "compute_health",
    "theil_sen_asof", "average_path_length", "assign_segments",
    "DEFAULT_FEATURES", "WEAR_INDICATORS", "TREND_COLUMNS", "HEALTH_COLUMNS",
]


def build_models(settings) -> dict[str, FleetModel]:
    """The three models configured from ``settings`` (health and analyze sections)."""
    g = lambda name, default: getattr(settings, name, default)  # noqa: E731
    ref_days = int(g("reference_days", 14))
    load_ref = float(g("load_ref_nm", 1.0))
    floors = {"creep_b": 0.001 / load_ref} if load_ref > 0 else None
    return {
        "anomaly": RelativeIsolationForest(
            reference_days=ref_days, scale_floors=floors,
            random_state=int(g("random_state", 0))),
        "trend": WearTrend(
            slip_limit=float(g("slip_limit", 0.05)), load_ref_nm=load_ref,
            confidence=float(g("forecast_confidence", 0.90)),
            min_days=int(g("min_trend_days", 7)),
            window_days=int(g("trend_window_days", 42)), reference_days=ref_days),
        "health": HealthRules(
            slip_limit=float(g("slip_limit", 0.05)),
            alert_horizon_days=float(g("alert_horizon_days", 14.0)),
            watch_horizon_days=float(g("watch_horizon_days", 45.0)),
            watch_score=float(g("watch_score", 0.62)),
            persist_k=int(g("persist_k", 2)), persist_n=int(g("persist_n", 3)),
            clear_m=int(g("clear_m", 3)),
            gross_slip_events_per_day=float(g("gross_slip_events_per_day", 3.0)),
            stall_repeat=int(g("stall_repeat", 2)), reference_days=ref_days,
            load_ref_nm=load_ref),
    }


def compute_health(unit_days: pl.DataFrame, maintenance: pl.DataFrame | None = None,
                   events: pl.DataFrame | None = None, settings=None,
                   models: dict[str, FleetModel] | None = None) -> dict[str, pl.DataFrame]:
    """Fit and apply the models on in-memory frames; returns scores, trends and health.

    ``settings`` may be None (all defaults). Raises ModelError when unit_days is empty.
    """
    if unit_days is None or unit_days.height == 0:
        raise ModelError("unit_days is empty: nothing to score",
                         hint="Ingest logs and run `fleetwatch analyze` first.")
    models = models or build_models(settings if settings is not None else object())
    maint = maintenance if maintenance is not None else empty_maintenance()
    scores = models["anomaly"].fit(unit_days, maint).score(unit_days, maint)
    trend_m = models["trend"].fit(unit_days, maint)
    trends = trend_m.predict(unit_days, maint)
    health = models["health"].fit(unit_days, maint).predict(
        unit_days, trends=trends, scores=scores, maintenance=maint, events=events)
    return {"scores": scores, "trends": trends, "health": health}


def _read(lake, name: str, required: bool) -> pl.DataFrame | None:
    try:
        df = lake.read(name)
    except Exception as exc:  # a table that was never written
        if required:
            raise LakeError(f"cannot read lake table '{name}': {exc}",
                            hint="Run `fleetwatch analyze` to build it.") from None
        return None
    if isinstance(df, pl.LazyFrame):
        df = df.collect()
    return df


def _conform(df: pl.DataFrame, name: str) -> pl.DataFrame:
    """Exactly the contract's columns, in order, with its types (schema.py)."""
    types = {"VARCHAR": pl.Utf8, "DOUBLE": pl.Float64, "BIGINT": pl.Int64,
             "BOOLEAN": pl.Boolean, "DATE": pl.Date}
    cols = table(name).columns
    return df.select([pl.col(c.name).cast(types.get(c.type, pl.Utf8)) for c in cols])


#: File (inside the lake folder) with the health rules' saved state for later starts.
STATE_FILE = "_fleetwatch/health_state.json"
#: Saved starts: the Mondays of the last this many days of data (an incremental analyze
#: recomputes from a Monday a few days before its new data).
STATE_SPAN_DAYS = 35
#: Each table's day column (rows on or after a start are rewritten).
_DAY_COLUMN = {"scores": "day", "trends": "as_of", "health": "day"}


def _digest(df: pl.DataFrame | None) -> str:
    """Order-independent digest of a frame's rows (stable within one polars version)."""
    if df is None:
        return "none"
    h = f"{df.height}:{','.join(f'{c}={t}' for c, t in df.schema.items())}"
    if df.height:
        for seed in (1, 2):
            h += ":" + str(int(df.hash_rows(seed=seed).to_numpy().astype(np.uint64)
                               .sum(dtype=np.uint64)))
    return h


def _fingerprint(models: dict[str, FleetModel], maintenance: pl.DataFrame) -> str:
    """What every score, trend and status depends on besides the unit-days themselves: the
    models' parameters, their fitted references, the forest's training rows and the
    maintenance log."""
    h = hashlib.sha256(f"polars {pl.__version__};".encode())
    for name in sorted(models):
        m = models[name]
        h.update(f"{name}:{sorted(m.get_params().items())!r};".encode())
        for attr in ("reference_", "limits_"):
            if hasattr(m, attr):
                h.update(f"{attr}={_digest(getattr(m, attr))};".encode())
        if hasattr(m, "train_digest_"):
            h.update(f"train={m.train_digest_};".encode())
    h.update(_digest(maintenance.select("unit_id", "ts", "resets_wear", "action")
                     if {"unit_id", "ts", "resets_wear", "action"} <= set(maintenance.columns)
                     else maintenance).encode())
    return h.hexdigest()[:24]


def _state_path(lake) -> Path | None:
    root = getattr(lake, "path", None)
    return None if root is None else Path(root) / STATE_FILE


def _read_state(lake) -> dict | None:
    p = _state_path(lake)
    if p is None:
        return None
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def _drop_state(lake) -> None:
    p = _state_path(lake)
    if p is not None:
        p.unlink(missing_ok=True)


def _write_state(lake, state: dict) -> None:
    p = _state_path(lake)
    if p is None:
        return
    p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(p.name + ".tmp")
    tmp.write_text(json.dumps(state, separators=(",", ":")), encoding="utf-8")
    os.replace(tmp, p)


def _resume_day(saved: dict | None, fp: str, unit_days: pl.DataFrame):
    """Latest saved start whose earlier unit-days are still those it was saved on."""
    if not saved or saved.get("fingerprint") != fp:
        return None
    for d in sorted(saved.get("snapshots", {}), reverse=True):
        snap = saved["snapshots"][d]
        day = dt.date.fromisoformat(d)
        if snap.get("unit_days") == _digest(unit_days.filter(pl.col("day") < day)):
            return day
    return None


def run_models(lake, settings, full: bool = False) -> dict[str, Any]:
    """Read unit_days/events/maintenance, write scores, trends and health; return counts.

    Does NOT take the lake's writer lock: analyze calls this while holding it. Raises
    LakeError when unit_days is missing, ModelError when it holds no rows.

    Incremental unless ``full``: the health rules run day by day, so a run saves each
    unit's rule state at the Mondays of its last ``STATE_SPAN_DAYS`` days (``STATE_FILE``).
    The next run starts from the latest saved Monday before which nothing it depends on
    changed (the unit-days before it, the models' parameters and fitted references, the
    forest's training rows, the maintenance log) and rewrites only the rows from there;
    rows before it are those a whole run gives. Anything else runs over all days.
    """
    t0 = time.perf_counter()
    unit_days = _read(lake, "unit_days", required=True)
    events = _read(lake, "events", required=False)
    maintenance = _read(lake, "maintenance", required=False)
    if maintenance is None or maintenance.height == 0:
        maintenance = empty_maintenance()
    if unit_days is None or unit_days.height == 0:
        raise ModelError("unit_days is empty: nothing to score",
                         hint="Ingest logs and run `fleetwatch analyze` first.")
    models = build_models(settings)
    models["anomaly"].fit(unit_days, maintenance)
    models["trend"].fit(unit_days, maintenance)
    models["health"].fit(unit_days, maintenance)
    fp = _fingerprint(models, maintenance)
    saved = None if full else _read_state(lake)
    start = _resume_day(saved, fp, unit_days)
    last = unit_days["day"].max()
    snap_days = [d for d in (last - dt.timedelta(days=i) for i in range(STATE_SPAN_DAYS + 7))
                 if d.weekday() == 0]
    snap_days.append(last + dt.timedelta(days=7 - last.weekday()))   # next Monday
    if start is not None:
        snap_days = [d for d in snap_days if d >= start]
    scores = models["anomaly"].score(unit_days, maintenance, since=start)
    trends = models["trend"].predict(unit_days, maintenance, asof_from=start)
    resume = saved["snapshots"][start.isoformat()]["units"] if start is not None else None
    health, snaps = models["health"].predict_resumable(
        unit_days, trends=trends, scores=scores, maintenance=maintenance, events=events,
        since=start, resume=resume, snapshot_days=snap_days)
    out = {"scores": scores, "trends": trends, "health": health}
    _drop_state(lake)           # a crash between the writes must not leave a stale state
    counts: dict[str, Any] = {}
    for name in ("scores", "trends", "health"):
        df = _conform(out[name], name)
        if start is None:
            lake.overwrite(name, df.to_arrow())  # analyze hands the lake Arrow tables too
        elif df.height:
            lake.replace_where(name, df.to_arrow(),
                               f"{_DAY_COLUMN[name]} >= '{start.isoformat()}'")
        else:                                    # nothing from the start on: drop old rows
            lake.delete_where(name, f"{_DAY_COLUMN[name]} >= '{start.isoformat()}'")
        counts[name] = df.height
    kept = {d: s for d, s in (saved or {}).get("snapshots", {}).items()
            if start is not None and dt.date.fromisoformat(d) < start
            and dt.date.fromisoformat(d) > last - dt.timedelta(days=STATE_SPAN_DAYS + 7)}
    kept.update({d: {"units": units,
                     "unit_days": _digest(unit_days.filter(
                         pl.col("day") < dt.date.fromisoformat(d)))}
                 for d, units in snaps.items()})
    _write_state(lake, {"fingerprint": fp, "snapshots": kept})
    if start is None:
        latest = health.sort("day").group_by("unit_id").last()
    else:
        latest = _read(lake, "health", required=True).sort("day").group_by("unit_id").last()
    counts["units"] = latest.height
    counts["status_counts"] = {s: int((latest["status"] == s).sum())
                               for s in ("normal", "watch", "alert")}
    counts["from_day"] = start.isoformat() if start is not None else None
    counts["elapsed_s"] = round(time.perf_counter() - t0, 3)
    return counts
