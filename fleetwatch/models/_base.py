"""Shared pieces of the health models: the estimator base, segments and robust references.

Every model here follows scikit-learn's estimator contract (style.md 9): ``__init__`` only
stores its parameters, ``fit`` returns ``self``, learned state ends in ``_``, and using a
model before ``fit`` raises :class:`NotFittedModelError` (a ``ModelError`` the CLI can print,
and a ``sklearn.exceptions.NotFittedError`` so sklearn tooling recognises it).

Segments: a unit's history is cut at every maintenance action with ``resets_wear``; each
piece is a *segment*. The unit's *reference period* is the first ``reference_days`` calendar
days of each segment (the first days of data, or the days after the last wear reset). The
day of the action mixes the old contact and the new one; it goes to the side that holds
most of its hours (an action before 12:00 UTC starts the new segment that day, a later one
the next day) and is marked ``reset_day``: the health rules clear wear-based states on it,
and it feeds neither a reference nor any wear evidence.
"""
from __future__ import annotations

import datetime as dt
from typing import Iterable, Mapping

import numpy as np
import polars as pl
from sklearn.base import BaseEstimator
from sklearn.exceptions import NotFittedError

from ..errors import ModelError

__all__ = [
    "NotFittedModelError", "FleetModel", "assign_segments", "reference_stats", "robust_z",
    "DEFAULT_SCALE_FLOORS", "MAD_TO_SIGMA", "as_frame", "empty_maintenance",
]

#: 1.4826 * MAD estimates the standard deviation of normally distributed data
#: (1 / Phi^-1(3/4) = 1.48260; standard robust-statistics constant, from memory).
MAD_TO_SIGMA = 1.4826

#: Smallest robust scale per feature, in the feature's own unit. Without a floor a unit
#: whose reference days happen to be very steady would turn tiny changes into huge z-scores.
#: Values are a change we would still call negligible on a friction drive (common practice,
#: no source): 0.1 % slip (2 % of the default 5 % wear limit) for slip-type features, the
#: same slip at 1 N*m for the compliance, 1 % for the power residual, half a point of
#: efficiency, 1 degC, 2 % completeness.
DEFAULT_SCALE_FLOORS: dict[str, float] = {
    "slip_at_load": 0.001,
    "slip_mean": 0.001,
    "slip_p95": 0.001,
    "creep_a": 0.001,
    "creep_b": 0.001,        # 1/(N*m): 0.1 % slip per N*m (load_ref_nm = 1 N*m)
    "ratio_error": 0.001,
    "power_resid_pct": 1.0,
    "efficiency": 0.005,
    "temp_mean": 1.0,
    "completeness": 0.02,
}
_FALLBACK_FLOOR = 1e-9


class NotFittedModelError(ModelError, NotFittedError):
    """A model was used before ``fit``: fit it first (exit 1 through the CLI)."""

    def __init__(self, message: str, hint: str | None = None, exit_code: int | None = None):
        ModelError.__init__(self, message, hint=hint, exit_code=exit_code)


class FleetModel(BaseEstimator):
    """Base of the fleetwatch models: scikit-learn parameter handling plus a fitted check."""

    def _check_fitted(self) -> None:
        fitted = [k for k in vars(self) if k.endswith("_") and not k.startswith("__")]
        if not fitted:
            name = type(self).__name__
            raise NotFittedModelError(
                f"{name} is not fitted yet",
                hint=f"Call {name}(...).fit(unit_days) before using it.")


def as_frame(data, what: str = "frame") -> pl.DataFrame:
    """Accept a polars DataFrame/LazyFrame, a pandas frame or a dict of columns."""
    if isinstance(data, pl.DataFrame):
        return data
    if isinstance(data, pl.LazyFrame):
        return data.collect()
    try:
        return pl.DataFrame(data)
    except Exception as exc:  # pragma: no cover - defensive
        raise ModelError(f"{what}: cannot read {type(data).__name__} as a table ({exc})",
                         hint="Pass a polars DataFrame.") from None


def empty_maintenance() -> pl.DataFrame:
    return pl.DataFrame(schema={"unit_id": pl.Utf8, "ts": pl.Datetime("us", "UTC"),
                                "action": pl.Utf8, "resets_wear": pl.Boolean})


def _require(frame: pl.DataFrame, cols: Iterable[str], what: str) -> None:
    missing = [c for c in cols if c not in frame.columns]
    if missing:
        raise ModelError(f"{what} lacks column(s) {', '.join(missing)}; columns are: "
                         f"{', '.join(frame.columns)}",
                         hint="Run `fleetwatch analyze` to rebuild unit_days.")


def _reset_starts(maintenance: pl.DataFrame | None
                  ) -> dict[str, list[tuple[dt.date, dt.date, str]]]:
    """Per unit: sorted (maintenance day, first full day after it, action) of wear resets."""
    out: dict[str, list[tuple[dt.date, dt.date, str]]] = {}
    if maintenance is None or maintenance.height == 0:
        return out
    m = as_frame(maintenance, "maintenance")
    _require(m, ["unit_id", "ts"], "maintenance")
    if "resets_wear" in m.columns:
        m = m.filter(pl.col("resets_wear").fill_null(False))
    for row in m.sort("ts").iter_rows(named=True):
        ts = row["ts"]
        if ts is None:
            continue
        if isinstance(ts, dt.datetime):
            if ts.tzinfo is not None:
                ts = ts.astimezone(dt.timezone.utc)
            day = ts.date()
            morning = ts.hour < 12
        else:  # a plain date: the action is taken to happen before the day starts
            day, morning = ts, True
        start = day if morning else day + dt.timedelta(days=1)
        out.setdefault(str(row["unit_id"]), []).append((day, start, str(row.get("action") or "")))
    return out


def assign_segments(unit_days: pl.DataFrame, maintenance: pl.DataFrame | None,
                    reference_days: int) -> pl.DataFrame:
    """Add ``segment_start``, ``seg_day``, ``is_reference``, ``reset_day``, ``reset_action``.

    ``segment_start`` is the unit's first day, or the start of the segment opened by its last
    wear reset (the action's day when done before 12:00 UTC, else the next day); ``seg_day``
    counts calendar days from it; ``is_reference``
    marks the first ``reference_days`` calendar days of a segment; ``reset_day`` marks the
    day a wear reset was done (its maintenance ``action`` in ``reset_action``).
    """
    ud = as_frame(unit_days, "unit_days")
    _require(ud, ["unit_id", "day"], "unit_days")
    ud = ud.with_columns(pl.col("unit_id").cast(pl.Utf8), pl.col("day").cast(pl.Date))
    resets = _reset_starts(maintenance)
    first = ud.group_by("unit_id").agg(pl.col("day").min().alias("_first"))
    rows = []
    for uid, first_day in first.iter_rows():
        rows.append((uid, first_day, None, None))
        for mday, start, action in resets.get(uid, []):
            rows.append((uid, start, mday, action))
    seg = pl.DataFrame(rows, schema={"unit_id": pl.Utf8, "segment_start": pl.Date,
                                     "reset_day": pl.Date, "reset_action": pl.Utf8},
                       orient="row").sort("unit_id", "segment_start")
    # A segment starts at the later of the unit's first day and the reset's first full day.
    starts = seg.select("unit_id", "segment_start").unique().sort("unit_id", "segment_start")
    ud = ud.sort("unit_id", "day")
    out = ud.join_asof(starts, left_on="day", right_on="segment_start", by="unit_id",
                       strategy="backward", check_sortedness=False)   # both sorted above
    marks = (seg.filter(pl.col("reset_day").is_not_null())
             .group_by("unit_id", "reset_day").agg(pl.col("reset_action").last()))
    out = out.join(marks.rename({"reset_day": "day"}).with_columns(
        pl.lit(True).alias("reset_day")), on=["unit_id", "day"], how="left")
    out = out.with_columns(
        pl.col("segment_start").fill_null(pl.col("day")),
        pl.col("reset_day").fill_null(False),
    ).with_columns(
        (pl.col("day") - pl.col("segment_start")).dt.total_days().alias("seg_day"),
    ).with_columns(
        (pl.col("seg_day") < reference_days).alias("is_reference"),
    )
    return out


def reference_stats(segmented: pl.DataFrame, features: Iterable[str],
                    floors: Mapping[str, float] | None = None) -> pl.DataFrame:
    """Robust reference per unit and segment: median and floored 1.4826*MAD of each feature.

    Uses the rows with ``is_reference`` (see :func:`assign_segments`), skipping reset days.
    Columns: unit_id, segment_start, ``<f>__med``, ``<f>__scale``, ``<f>__n``.
    """
    floors = {**DEFAULT_SCALE_FLOORS, **(floors or {})}
    feats = [f for f in features if f in segmented.columns]
    ref = segmented.filter(pl.col("is_reference") & ~pl.col("reset_day"))
    aggs = []
    for f in feats:
        x = pl.col(f).cast(pl.Float64).fill_nan(None)
        aggs += [x.median().alias(f"{f}__med"),
                 (x - x.median()).abs().median().alias(f"{f}__mad"),
                 x.count().alias(f"{f}__n")]
    if not aggs:
        return segmented.select("unit_id", "segment_start").unique()
    stats = ref.group_by("unit_id", "segment_start").agg(aggs)
    return stats.with_columns([
        pl.max_horizontal(pl.col(f"{f}__mad") * MAD_TO_SIGMA,
                          pl.lit(float(floors.get(f, _FALLBACK_FLOOR)))).alias(f"{f}__scale")
        for f in feats
    ]).drop([f"{f}__mad" for f in feats])


def robust_z(segmented: pl.DataFrame, ref: pl.DataFrame, features: Iterable[str],
             min_ref_days: int = 3) -> pl.DataFrame:
    """Add ``z_<f>`` = (x - median_ref) / scale_ref per feature (null when no reference).

    A feature whose reference has fewer than ``min_ref_days`` values gets a null z.
    """
    feats = list(features)
    cols = ["unit_id", "segment_start"] + [c for f in feats for c in
                                           (f"{f}__med", f"{f}__scale", f"{f}__n")
                                           if c in ref.columns]
    out = segmented.join(ref.select(cols), on=["unit_id", "segment_start"], how="left")
    exprs = []
    for f in feats:
        if f not in segmented.columns or f"{f}__med" not in out.columns:
            exprs.append(pl.lit(None, dtype=pl.Float64).alias(f"z_{f}"))
            continue
        x = pl.col(f).cast(pl.Float64).fill_nan(None)
        z = (x - pl.col(f"{f}__med")) / pl.col(f"{f}__scale")
        exprs.append(pl.when(pl.col(f"{f}__n") >= min_ref_days).then(z).otherwise(None)
                     .alias(f"z_{f}"))
    return out.with_columns(exprs)


def to_matrix(frame: pl.DataFrame, cols: list[str]) -> np.ndarray:
    """Float matrix of ``cols``; nulls and NaN become 0 (= 'at the reference value')."""
    if not cols:
        return np.zeros((frame.height, 0))
    return (frame.select([pl.col(c).cast(pl.Float64).fill_nan(None).fill_null(0.0) for c in cols])
            .to_numpy().astype(float))
