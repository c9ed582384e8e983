"""Robust wear trends and time to the wear limit, as of every day (no look-ahead).

Slope: Theil-Sen (Theil 1950; Sen 1968): the median of all pairwise slopes
``(y_j - y_i) / (x_j - x_i)``; the confidence interval follows Sen (1968) eq. 2.6 exactly as
``scipy.stats.theilslopes`` computes it (normal approximation of Kendall's statistic with
tie corrections, interval read off the sorted pairwise slopes); the level uses the 'joint'
intercept ``median(y - slope * x)``. :func:`theil_sen_asof` reproduces
``scipy.stats.theilslopes(y, x, alpha, method='joint')`` for every as-of window at once
(tested against scipy in tests/test_trend.py).

As of day d a fit uses the indicator's values on days ``d - window_days < day <= d`` of the
current maintenance segment (since the last wear reset), and only when at least
``min_days`` days have data. The cap keeps the cost per fit bounded (measured on a 2-core
machine: 24 units x 120 days x 3 indicators about 1 s of CPU, 200 units x 365 days about
17 s) and lets the slope follow wear that speeds up. All as-of windows of one series are
evaluated at once: a banded table of pairwise slopes, one gather and one sort per window
length.

Time to limit (domain.md 3.7 option (a), "bracket with the slope CI"): from the fitted level
now, ``days = (limit - level_now) / slope``; the earliest crossing uses the upper slope
bound, the latest the lower one. When the lower bound is not above zero no crossing is
predicted (median and latest crossing null). No forecast reaches further than
``max_forecast_factor`` times the span of the data behind it (common practice, no source).

Indicators and limits (our decision):

* ``slip_at_load`` - steady slip at rated load, the main wear indicator; limit ``slip_limit``.
* ``creep_b`` - compliance, slip per N*m. Its limit is implied by the slip limit: slip at
  rated load is ``a + b * load_ref``, so with the unit's reference offset ``a_ref`` the slip
  limit is reached when ``b = (slip_limit - a_ref) / load_ref_nm``. A second, load-resolved
  view of the same wear; a reset (new roller) gives a new ``a_ref``.
* ``power_resid_pct`` - input power against the unit's own normal-behaviour model. No limit:
  without an output torque sensor it mixes load and losses (domain.md 1.2), so there is no
  physical level at which the drive is worn out. Its trend is reported as evidence only.
"""
from __future__ import annotations

import datetime as dt
from typing import Sequence

import numpy as np
import polars as pl
from scipy.stats import norm

from ..errors import ModelError
from ._base import FleetModel, as_frame, assign_segments, reference_stats

__all__ = ["WearTrend", "theil_sen_asof", "WEAR_INDICATORS", "TREND_COLUMNS"]

WEAR_INDICATORS: tuple[str, ...] = ("slip_at_load", "creep_b", "power_resid_pct")
TREND_COLUMNS = ["unit_id", "indicator", "as_of", "since", "n_days", "slope_per_day",
                 "slope_low", "slope_high", "level_now", "limit", "days_to_limit",
                 "days_to_limit_low", "days_to_limit_high", "note"]


def _tie_term(counts: np.ndarray) -> float:
    k = counts[counts > 1].astype(float)
    return float(np.sum(k * (k - 1) * (2 * k + 5)))


def theil_sen_asof(x, y, asof_x, window: float, confidence: float = 0.95,
                   min_points: int = 2) -> dict[str, np.ndarray]:
    """Theil-Sen fits of ``y`` on ``x`` as of each value of ``asof_x``, over a moving window.

    The fit as of ``t`` uses the points with ``t - window < x <= t``. ``x`` must be strictly
    increasing (one value per day). Returns arrays (one entry per ``asof_x``): ``n``,
    ``slope``, ``intercept`` ('joint': median(y - slope*x)), ``low``, ``high`` (Sen 1968 CI at
    ``confidence``, as scipy.stats.theilslopes), ``x_first``, ``x_last``; NaN where fewer
    than ``min_points`` points lie in the window.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    t = np.asarray(asof_x, dtype=float)
    k = t.size
    out = {name: np.full(k, np.nan) for name in
           ("slope", "intercept", "low", "high", "x_first", "x_last")}
    out["n"] = np.zeros(k, dtype=np.int64)
    if x.size == 0 or k == 0:
        return out
    if np.any(np.diff(x) <= 0):
        raise ModelError("theil_sen_asof: x must be strictly increasing")
    hi = np.searchsorted(x, t, side="right") - 1           # last point with x <= t
    lo = np.searchsorted(x, t - window, side="right")      # first point with x > t - window
    npts = np.where(hi >= lo, hi - lo + 1, 0)
    out["n"] = npts.astype(np.int64)
    ok = npts >= max(2, min_points)
    if not ok.any():
        return out
    rows = np.nonzero(ok)[0]
    alpha = 1.0 - confidence if confidence > 0.5 else confidence
    zq = float(norm.ppf(alpha / 2.0))
    m_all = int(npts[rows].max())
    # Bound memory: about 2 M pairwise slopes per block of as-of rows.
    step = max(1, int(2_000_000 // max(1, m_all * (m_all - 1) // 2)))
    slope = np.empty(rows.size)
    low = np.empty(rows.size)
    high = np.empty(rows.size)
    intercept = np.empty(rows.size)
    for c0 in range(0, rows.size, step):
        r = rows[c0:c0 + step]
        sl, lw, hg, ic = _fit_block(x, y, hi[r], lo[r], npts[r], zq)
        slope[c0:c0 + step], low[c0:c0 + step] = sl, lw
        high[c0:c0 + step], intercept[c0:c0 + step] = hg, ic
    hi_r, lo_r = hi[rows], lo[rows]
    out["slope"][rows] = slope
    out["low"][rows] = low
    out["high"][rows] = high
    out["intercept"][rows] = intercept
    out["x_first"][rows] = x[lo_r]
    out["x_last"][rows] = x[hi_r]
    return out


def _fit_block(x, y, hi_r, lo_r, n_r, zq):
    """Theil-Sen slope, Sen CI and joint intercept for windows [lo_r, hi_r] of (x, y).

    Rows are grouped by window length: every row of a group has the same number of pairs
    and the same order statistics to read, so one gather and one sort serve the
    whole group.
    """
    m = int(n_r.max())
    n = x.size
    # Banded slope table, m rows of padding in front: band[(m + a) * m + d] = slope between
    # points a and a + d (d = 1 .. m-1).
    d = np.arange(m)
    b_idx = np.minimum(np.arange(n)[:, None] + d[None, :], n - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        band = ((y[b_idx] - y[:, None]) / (x[b_idx] - x[:, None])).ravel()
    band = np.concatenate([np.full(m * m, np.nan), band])
    # Pairs relative to the window's last point h: a = h - p (earlier), b = h - q, q < p,
    # so the flat index is (m + h) * m + c with c = (p - q) - p * m.
    q_off, p_off = np.triu_indices(m, k=1)
    order = np.argsort(p_off, kind="stable")       # pairs with small p first
    q_off, p_off = q_off[order], p_off[order]
    c = (p_off - q_off) - p_off * m
    any_ties = np.unique(y).size < y.size

    slope = np.empty(n_r.size)
    low = np.empty(n_r.size)
    high = np.empty(n_r.size)
    intercept = np.empty(n_r.size)
    for L in np.unique(n_r):
        sel = np.nonzero(n_r == L)[0]
        L = int(L)
        nt = L * (L - 1) // 2                      # pairs with p < L come first in ``c``
        h = hi_r[sel]
        S = band[(m + h)[:, None] * m + c[None, :nt]]
        win = h[:, None] - np.arange(L)[None, :]   # indices of the window's points
        Yw, Xw = y[win], x[win]
        # Sen (1968) eq. 2.6 with tie corrections, as scipy.stats.theilslopes
        sigsq = np.full(sel.size, L * (L - 1) * (2 * L + 5), dtype=float)
        if any_ties:
            Ys = np.sort(Yw, axis=1)
            for r in np.nonzero(np.any(Ys[:, 1:] == Ys[:, :-1], axis=1))[0]:
                _, counts = np.unique(Yw[r], return_counts=True)
                sigsq[r] -= _tie_term(counts)
        sigma = np.sqrt(np.maximum(sigsq / 18.0, 0.0))
        ru = np.minimum(np.round((nt - zq * sigma) / 2.0).astype(np.int64), nt - 1)
        rl = np.maximum(np.round((nt + zq * sigma) / 2.0).astype(np.int64) - 1, 0)
        if rl.min() == rl.max() and ru.min() == ru.max():      # no ties: one group
            groups = [(int(rl[0]), int(ru[0]), np.arange(sel.size))]
        else:
            key = rl * (nt + 1) + ru
            groups = [(int(rl[key == k][0]), int(ru[key == k][0]), np.nonzero(key == k)[0])
                      for k in np.unique(key)]
        for rlg, rug, rows in groups:
            part = np.sort(S[rows], axis=1)    # numpy's SIMD sort beats np.partition here
            sl = 0.5 * (part[:, (nt - 1) // 2] + part[:, nt // 2])
            slope[sel[rows]] = sl
            low[sel[rows]] = part[:, rlg]
            high[sel[rows]] = part[:, rug]
        intercept[sel] = np.median(Yw - slope[sel][:, None] * Xw, axis=1)
    return slope, low, high, intercept

class WearTrend(FleetModel):
    """Theil-Sen trend and days to limit of each wear indicator, as of every unit-day.

    Parameters
    ----------
    indicators : unit_days columns to trend (default slip_at_load, creep_b, power_resid_pct).
    slip_limit : wear limit of slip at rated load (-).
    load_ref_nm : rated load of 'slip at rated load' (N*m); sets the implied creep_b limit.
    confidence : confidence level of the slope interval (``forecast_confidence``).
    min_days : fewest days with data behind a fit (``min_trend_days``).
    window_days : a fit looks back at most this many calendar days (``trend_window_days``).
    max_forecast_factor : no forecast beyond this multiple of the data span.
    reference_days : reference period after the start of data or a wear reset.

    Learned: ``reference_`` (per unit and segment: robust median and scale of creep_a and the
    indicators) and ``limits_`` (per unit, segment and indicator: the limit, or null).
    """

    def __init__(self, indicators: Sequence[str] = WEAR_INDICATORS, slip_limit: float = 0.05,
                 load_ref_nm: float = 1.0, confidence: float = 0.90, min_days: int = 7,
                 window_days: int = 42, max_forecast_factor: float = 2.0,
                 reference_days: int = 14):
        self.indicators = indicators
        self.slip_limit = slip_limit
        self.load_ref_nm = load_ref_nm
        self.confidence = confidence
        self.min_days = min_days
        self.window_days = window_days
        self.max_forecast_factor = max_forecast_factor
        self.reference_days = reference_days

    def _limit_exprs(self) -> dict[str, pl.Expr]:
        return {
            "slip_at_load": pl.lit(float(self.slip_limit)),
            "creep_b": pl.when((float(self.slip_limit) - pl.col("creep_a__med")) > 0)
            .then((float(self.slip_limit) - pl.col("creep_a__med")) / float(self.load_ref_nm))
            .otherwise(None),
        }

    def fit(self, unit_days, maintenance=None, y=None) -> "WearTrend":
        """Learn each unit's reference per segment and the resulting limits."""
        if not 0.5 < float(self.confidence) < 1.0:
            raise ModelError(f"confidence must lie between 0.5 and 1, got {self.confidence}",
                             hint="Set forecast_confidence, e.g. 0.90.")
        seg = assign_segments(as_frame(unit_days, "unit_days"), maintenance,
                              int(self.reference_days))
        feats = sorted(set(self.indicators) | {"creep_a"})
        ref = reference_stats(seg, feats)
        for f in feats:
            if f"{f}__med" not in ref.columns:
                ref = ref.with_columns(pl.lit(None, dtype=pl.Float64).alias(f"{f}__med"),
                                       pl.lit(None, dtype=pl.Float64).alias(f"{f}__scale"))
        limits = self._limit_exprs()
        lim_frames = []
        for ind in self.indicators:
            expr = limits.get(ind, pl.lit(None, dtype=pl.Float64))
            lim_frames.append(ref.select("unit_id", "segment_start",
                                         pl.lit(ind).alias("indicator"),
                                         expr.cast(pl.Float64).alias("limit"),
                                         pl.col(f"{ind}__med").alias("ref_level"),
                                         pl.col(f"{ind}__scale").alias("ref_scale")))
        self.reference_ = ref
        self.limits_ = (pl.concat(lim_frames) if lim_frames else
                        pl.DataFrame(schema={"unit_id": pl.Utf8, "segment_start": pl.Date,
                                             "indicator": pl.Utf8, "limit": pl.Float64,
                                             "ref_level": pl.Float64, "ref_scale": pl.Float64}))
        return self

    def predict(self, unit_days, maintenance=None, extra: bool = False,
                asof_from: dt.date | None = None) -> pl.DataFrame:
        """The ``trends`` table: one row per unit, indicator and as-of day with a fit.

        ``extra=True`` adds ``segment_start``, ``ref_level`` and ``ref_scale`` (used by the
        health rules). ``asof_from``: only the as-of days on or after it (the fits still see
        every earlier day they look back on, so these rows equal those of a whole run).
        """
        self._check_fitted()
        seg = assign_segments(as_frame(unit_days, "unit_days"), maintenance,
                              int(self.reference_days))
        epoch = dt.date(1970, 1, 1)
        seg = seg.with_columns((pl.col("day") - pl.lit(epoch)).dt.total_days().alias("_x"))
        parts = []
        inds = [i for i in self.indicators if i in seg.columns]
        for (uid, s_start), g in seg.group_by(["unit_id", "segment_start"], maintain_order=True):
            g = g.sort("day")
            # x in days since the segment's first row (small numbers, exact intercepts)
            x_all = g["_x"].to_numpy()
            x0 = int(x_all[0])
            t = (x_all - x0).astype(float)
            days = g["day"].to_numpy()
            # as-of points to evaluate (all, or those on or after asof_from)
            t_eval = t if asof_from is None else t[x_all >= (asof_from - epoch).days]
            if not t_eval.size:
                continue
            d_eval = days[days.size - t_eval.size:]
            for ind in inds:
                vals = g[ind].cast(pl.Float64).fill_nan(None)
                # the day of a wear reset mixes old and new contact: no evidence either way
                have = (vals.is_not_null() & ~g["reset_day"]).to_numpy()
                if have.sum() < max(2, int(self.min_days)):
                    continue
                fit = theil_sen_asof(t[have], vals.to_numpy()[have].astype(float), t_eval,
                                     float(self.window_days), float(self.confidence),
                                     int(self.min_days))
                idx = np.nonzero(fit["n"] >= int(self.min_days))[0]
                if not idx.size:
                    continue
                first = fit["x_first"][idx].astype(np.int64) + x0
                parts.append(pl.DataFrame({
                    "unit_id": [uid] * idx.size,
                    "segment_start": [s_start] * idx.size,
                    "indicator": [ind] * idx.size,
                    "as_of": d_eval[idx],
                    "since": (np.datetime64(epoch, "D") + first.astype("timedelta64[D]")),
                    "n_days": fit["n"][idx],
                    "slope_per_day": fit["slope"][idx],
                    "slope_low": fit["low"][idx],
                    "slope_high": fit["high"][idx],
                    "level_now": fit["intercept"][idx] + fit["slope"][idx] * t_eval[idx],
                    "_span": t_eval[idx] - fit["x_first"][idx],
                }))
        schema_cols = TREND_COLUMNS + (["segment_start", "ref_level", "ref_scale"] if extra else [])
        if not parts:
            return pl.DataFrame(schema=_trend_schema(extra)).select(schema_cols)
        tr = pl.concat(parts).with_columns(pl.col("as_of").cast(pl.Date),
                                           pl.col("since").cast(pl.Date))
        tr = tr.join(self.limits_, on=["unit_id", "segment_start", "indicator"], how="left")
        tr = _forecast(tr, float(self.max_forecast_factor))
        return tr.select(schema_cols).sort("unit_id", "indicator", "as_of")


def _trend_schema(extra: bool) -> dict:
    s = {"unit_id": pl.Utf8, "indicator": pl.Utf8, "as_of": pl.Date, "since": pl.Date,
         "n_days": pl.Int64, "slope_per_day": pl.Float64, "slope_low": pl.Float64,
         "slope_high": pl.Float64, "level_now": pl.Float64, "limit": pl.Float64,
         "days_to_limit": pl.Float64, "days_to_limit_low": pl.Float64,
         "days_to_limit_high": pl.Float64, "note": pl.Utf8}
    if extra:
        s.update({"segment_start": pl.Date, "ref_level": pl.Float64, "ref_scale": pl.Float64})
    return s


def _forecast(tr: pl.DataFrame, factor: float) -> pl.DataFrame:
    """Days to limit (median, earliest, latest) from the fitted level now, with notes."""
    gap = pl.col("limit") - pl.col("level_now")
    horizon = factor * pl.col("_span")
    has_limit = pl.col("limit").is_not_null()
    over = has_limit & (gap <= 0)
    rising = pl.col("slope_low") > 0
    med = pl.when(over).then(0.0).when(has_limit & rising).then(gap / pl.col("slope_per_day"))
    low = (pl.when(over).then(0.0)
           .when(has_limit & (pl.col("slope_high") > 0)).then(gap / pl.col("slope_high")))
    high = pl.when(over).then(0.0).when(has_limit & rising).then(gap / pl.col("slope_low"))
    tr = tr.with_columns(med.alias("_med"), low.alias("_low"), high.alias("_high"),
                         horizon.alias("_horizon"))
    within = lambda c: pl.when(pl.col(c) <= pl.col("_horizon")).then(pl.col(c))  # noqa: E731
    note = (pl.when(~has_limit).then(pl.lit("no limit (trend only)"))
            .when(over).then(pl.lit("at or above limit"))
            .when(~rising).then(pl.lit("no crossing predicted"))
            .when(pl.col("_med") > pl.col("_horizon"))
            .then(pl.format("beyond forecast range (> {} d)", pl.col("_horizon").round(0)))
            .otherwise(None))
    return tr.with_columns(
        within("_med").alias("days_to_limit"),
        within("_low").alias("days_to_limit_low"),
        within("_high").alias("days_to_limit_high"),
        note.alias("note"),
    )
