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

import time
from typing import Any

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


def run_models(lake, settings) -> dict[str, Any]:
    """Read unit_days/events/maintenance, write scores, trends and health; return counts.

    Does NOT take the lake's writer lock: analyze calls this while holding it. Raises
    LakeError when unit_days is missing, ModelError when it holds no rows.
    """
    t0 = time.perf_counter()
    unit_days = _read(lake, "unit_days", required=True)
    events = _read(lake, "events", required=False)
    maintenance = _read(lake, "maintenance", required=False)
    if maintenance is None or maintenance.height == 0:
        maintenance = empty_maintenance()
    out = compute_health(unit_days, maintenance, events, settings)
    counts: dict[str, Any] = {}
    for name in ("scores", "trends", "health"):
        df = _conform(out[name], name)
        lake.overwrite(name, df.to_arrow())      # analyze hands the lake Arrow tables too
        counts[name] = df.height
    latest = out["health"].sort("day").group_by("unit_id").last()
    counts["units"] = latest.height
    counts["status_counts"] = {s: int((latest["status"] == s).sum())
                               for s in ("normal", "watch", "alert")}
    counts["elapsed_s"] = round(time.perf_counter() - t0, 3)
    return counts
