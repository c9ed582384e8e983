"""Isolation forest over unit-day features, each relative to the unit's own reference.

Method: Liu, Ting & Zhou, "Isolation Forest", IEEE ICDM 2008 (domain.md 3.8). Random
axis-parallel splits isolate unusual points in few steps; the paper's score is
``s = 2^(-E[h(x)] / c(psi))``: 0.5 means nothing distinct, towards 1 clearly anomalous.
scikit-learn's ``IsolationForest.score_samples`` returns ``-s`` (sklearn docs; domain.md 6
#16-#17), so :meth:`RelativeIsolationForest.score_samples` returns ``-score_samples``.

Why relative features: drives differ (roller compound, spin at their usual ratio, motor), so
a fleet-wide forest on raw values would flag the unusual *unit*, not the unusual *day*.
Each feature is first turned into a robust z-score against the unit's own reference period
(first ``reference_days`` days of data, or the days after its last wear reset):
``z = (x - median_ref) / max(1.4826 * MAD_ref, floor)`` (floors: ``_base.DEFAULT_SCALE_FLOORS``).
One forest is then fitted fleet-wide on the reference days of all units, i.e. on what
"normal day-to-day variation" looks like, and every day is scored against it.

Look-ahead: a day inside a reference period is compared with the whole reference period
(at most ``reference_days`` ahead); the health rules ignore scores of reference days. The
forest is fitted on all units' reference days, which may lie after the scored day; it models
normal variation only, not any fault.
"""
from __future__ import annotations

import hashlib
from typing import Mapping, Sequence

import numpy as np
import polars as pl
from sklearn.ensemble import IsolationForest

from ..errors import ModelError
from ._base import (FleetModel, as_frame, assign_segments, reference_stats, robust_z,
                    to_matrix)

__all__ = ["RelativeIsolationForest", "DEFAULT_FEATURES", "average_path_length"]

#: Default features. Chosen to be physically distinct and load-normalised (domain.md 2.7):
#: slip at rated load (wear, contamination), creep offset a (actuator / geometry),
#: compliance b (preload loss, contamination), input-power residual and measured
#: efficiency (losses, motor). Duty-dependent aggregates (slip_mean, slip_p95) and the
#: ambient-driven temperature are left out: they move with how the drive is used.
DEFAULT_FEATURES: tuple[str, ...] = ("slip_at_load", "creep_a", "creep_b", "power_resid_pct",
                                     "efficiency")


def average_path_length(n) -> np.ndarray:
    """c(n) of Liu, Ting & Zhou (2008): mean path length of an unsuccessful BST search.

    ``c(n) = 2 H(n-1) - 2 (n-1)/n`` with ``H(i) ~= ln(i) + 0.5772156649`` (Euler's constant);
    ``c(1) = 0`` and ``c(2) = 1`` as in scikit-learn's ``_average_path_length``.
    """
    n = np.asarray(n, dtype=float)
    out = np.zeros_like(n)
    two = n == 2
    big = n > 2
    out[two] = 1.0
    nb = n[big]
    out[big] = 2.0 * (np.log(nb - 1.0) + np.euler_gamma) - 2.0 * (nb - 1.0) / nb
    return out


class RelativeIsolationForest(FleetModel):
    """Isolation forest over per-unit robust z-scores of unit-day features.

    Parameters
    ----------
    features : feature columns of ``unit_days`` (missing columns count as 'at reference').
    n_estimators, max_samples : trees and subsample size (paper defaults t=100, psi=256;
        ``max_samples`` is capped by the number of reference rows).
    reference_days : length of each unit's reference period, calendar days.
    scale_floors : smallest robust scale per feature (defaults in ``_base``).
    n_top : at most this many features are named as drivers of a day's score.
    z_named : features with |z| below this are not named (the largest one always is).
    random_state : seed of the forest (fixed: weekly reports must be reproducible).

    Learned: ``reference_`` (per unit and segment: median, scale and count of each
    feature), ``forest_``, ``feature_names_in_``, ``n_features_in_``, ``n_reference_rows_``,
    ``train_digest_`` (SHA-256 of the training matrix: the same digest, the same forest).
    """

    def __init__(self, features: Sequence[str] = DEFAULT_FEATURES, n_estimators: int = 100,
                 max_samples: int = 256, reference_days: int = 14,
                 scale_floors: Mapping[str, float] | None = None, n_top: int = 3,
                 z_named: float = 2.0, random_state: int | None = 0):
        self.features = features
        self.n_estimators = n_estimators
        self.max_samples = max_samples
        self.reference_days = reference_days
        self.scale_floors = scale_floors
        self.n_top = n_top
        self.z_named = z_named
        self.random_state = random_state

    # ------------------------------------------------------------------ fitting
    def _segmented(self, unit_days, maintenance) -> pl.DataFrame:
        return assign_segments(as_frame(unit_days, "unit_days"), maintenance,
                               int(self.reference_days))

    def fit(self, unit_days, maintenance=None, y=None) -> "RelativeIsolationForest":
        """Learn each unit's reference and fit one forest on all units' reference days.

        Raises ModelError when no unit has reference days with data.
        """
        feats = list(self.features)
        if not feats:
            raise ModelError("RelativeIsolationForest needs at least one feature",
                             hint="Pass features=['slip_at_load', ...].")
        seg = self._segmented(unit_days, maintenance)
        ref = reference_stats(seg, feats, self.scale_floors)
        z = robust_z(seg, ref, feats)
        zcols = [f"z_{f}" for f in feats]
        # reference days with data only: days off (all features null) are not "normal days"
        train = z.filter(pl.col("is_reference") & ~pl.col("reset_day")
                         & pl.any_horizontal([pl.col(c).is_not_null() for c in zcols]))
        if train.height == 0:
            raise ModelError("no reference days to fit the isolation forest on",
                             hint="unit_days is empty; ingest logs and run analyze first.")
        X = to_matrix(train, zcols)
        self.train_digest_ = hashlib.sha256(np.ascontiguousarray(X).tobytes()).hexdigest()
        self.forest_ = IsolationForest(
            n_estimators=int(self.n_estimators),
            max_samples=int(min(self.max_samples, X.shape[0])),
            random_state=self.random_state,
        ).fit(X)
        self.reference_ = ref
        self.feature_names_in_ = np.asarray(feats, dtype=object)
        self.n_features_in_ = len(feats)
        self.n_reference_rows_ = int(X.shape[0])
        return self

    # ------------------------------------------------------------------ scoring
    def score_samples(self, Z) -> np.ndarray:
        """Paper-scale score s in (0, 1] of rows of robust z-scores (columns = features)."""
        self._check_fitted()
        Z = np.asarray(Z, dtype=float)
        if Z.ndim != 2 or Z.shape[1] != self.n_features_in_:
            raise ModelError(f"expected {self.n_features_in_} z-score columns, got shape "
                             f"{Z.shape}")
        return -self.forest_.score_samples(np.nan_to_num(Z, nan=0.0))

    def transform(self, unit_days, maintenance=None) -> pl.DataFrame:
        """unit_days with segment columns and ``z_<feature>`` columns added.

        Units or segments not seen in ``fit`` get their reference from this frame.
        """
        self._check_fitted()
        feats = list(self.feature_names_in_)
        seg = self._segmented(unit_days, maintenance)
        known = self.reference_.select("unit_id", "segment_start")
        new_keys = (seg.select("unit_id", "segment_start").unique()
                    .join(known, on=["unit_id", "segment_start"], how="anti"))
        ref = self.reference_
        if new_keys.height:
            extra = reference_stats(seg.join(new_keys, on=["unit_id", "segment_start"]),
                                    feats, self.scale_floors)
            ref = pl.concat([ref, extra.select(ref.columns)], how="vertical_relaxed")
        return robust_z(seg, ref, feats)

    def score(self, unit_days, maintenance=None, since=None) -> pl.DataFrame:
        """The ``scores`` table: unit_id, day, score, is_reference, top_features.

        Days without any feature value (drive not running, no steady data) get no row: a
        score there would only say "like the reference", which nothing measured.
        ``since`` (a date): only the rows of that day and later (each row is scored on its
        own, so they equal those of a whole run; the references still come from every day).
        """
        z = self.transform(unit_days, maintenance)
        feats = list(self.feature_names_in_)
        zcols = [f"z_{f}" for f in feats]
        if since is not None:
            z = z.filter(pl.col("day") >= since)
        z = z.filter(pl.any_horizontal([pl.col(c).is_not_null() for c in zcols]))
        Z = to_matrix(z, zcols)
        s = self.score_samples(Z) if z.height else np.zeros(0)
        raw = z.select(zcols).to_numpy().astype(float) if z.height else np.zeros((0, len(feats)))
        return pl.DataFrame({
            "unit_id": z["unit_id"],
            "day": z["day"],
            "score": s,
            "is_reference": z["is_reference"],
            "top_features": [self._describe(row) for row in raw],
        }).sort("unit_id", "day")

    def _describe(self, zrow: np.ndarray) -> str:
        """'slip_at_load z=+6.1; creep_b z=+4.0': features by |z|, most first."""
        feats = self.feature_names_in_
        finite = np.isfinite(zrow)
        if not finite.any():
            return "no data"
        az = np.where(finite, np.abs(zrow), -1.0)
        order = np.argsort(-az, kind="stable")
        named = [i for i in order[: int(self.n_top)] if az[i] >= self.z_named]
        if not named:
            named = [int(order[0])]
        return "; ".join(f"{feats[i]} z={zrow[i]:+.1f}" for i in named)
