"""Ratio advisor: for each unit and duty, the ratio that needs the least input power.

Steps (method and limits in the README, section "Output-torque soft sensor and ratio advisor"):

1. Torque. Every steady window gets an output torque: logged where the unit measures it,
   else the soft sensor's estimate (fleetwatch.softsensor). Stored as ``torque_estimates``.
2. Duty. A duty is (output speed, output torque); windows are binned on both with the
   preferred-number series R10 (ISO 3: 1, 1.25, 1.6, 2, 2.5, 3.15, 4, 5, 6.3, 8 per decade;
   values from memory), so a bin spans a fixed ~26 % whatever the units or the size of the
   drive.
3. Power. Per unit, a loss model of the electrical input power, linear in its coefficients
   and fitted robustly (Huber IRLS) over all the unit's steady windows; its terms are the
   loss mechanisms of a DC gear-motor and a friction variator (domain.md 1.2, 1.4, 2.4-2.5):

       P_in = c0 + P_out*(c1 + c2*ln^2 i + c3*ln i)      output power / variator efficiency
              + (c4*(T_out/i)^2 + c5*(T_out/i))*r_T     copper loss I^2*R, I ~ T_out/i + I_0
              + c6*omega_out*i + c7*(omega_out*i)^2      no-load and drag losses ~ motor speed

   r_T = R_T/R_20 = 1 + 0.00393*(T - 20) with the window's mean temperature (domain.md 1.4;
   1 where no temperature is logged): the copper loss follows the winding's resistance.

   Its section at one duty is the input power as a function of ratio for that duty. A
   per-bin quadratic in the ratio alone would confound the ratio with the duty's drift
   inside the bin (in one output-speed bin, the steep-ratio windows are the slow ones); the
   loss model separates them with the same data. Units with too little data of their own
   (fewer than UNIT_MODEL_MIN_WINDOWS windows or three ratio levels) use their line's model
   (units of one build; line = unit_id up to the first '-') with a level offset per unit.
4. Advice per (unit, duty bin) with at least ``advice_min_windows`` steady windows of the
   unit; where the unit has fewer, or ran the duty at one ratio only, the windows of its
   line in that bin are pooled (basis 'line': they show which ratios this build runs the
   duty at; the unit's own power model is still the one evaluated). The advised ratio
   minimises the modelled input power summed over the unit's windows of that duty,
   searched only inside
   - the ratios observed for that duty (2nd-98th percentile of the windows behind the
     advice) and inside the ratios behind the power model, both over all its data and near
     this duty (the bin widened by one bin width each way): never extrapolated, in ratio
     or in duty;
   - the motor speeds behind the power model (2nd-98th percentile of its windows' n_in; at
     most SPEED_OUT_SHARE of the duty's hours outside, a window's own speed always
     counts): its speed-loss terms are unknown elsewhere. A drive held at its supply-
     voltage limit runs one narrow band of motor speeds, where ratio and output speed move
     together (n_out = n_in / i) and the model cannot tell them apart; slowing its motor
     below that band gave tuned drives false savings;
   - the motor's speed limit ``motor_n_max_rpm`` (n_in = i * n_out * i_act/i_cmd) and the
     highest terminal voltage seen on the unit (V = I*R + k_e*omega, domain.md 1.4: above
     it the supply cannot hold the speed);
   - the motor's current limit ``motor_i_max_a`` (I = T_shaft/k_e + I_0 with the shaft
     torque the soft sensor's inverse gives for that duty and ratio);
   - ``max_start_ratio`` for duties that start from standstill: the ratio cannot change
     while the drive stands, so the ratio it stops in is the ratio it must start in. A bin
     is a standstill duty when one of its windows is the last steady window before the
     drive stopped, or the first steady window after it started, at the ratio of that
     stop or start (found in ``telemetry``; without telemetry every duty counts as one).
   Configured limits (speed, current, start ratio) must hold for every window of the duty;
   the voltage limit is empirical, so a window's own ratio always counts as reachable.
5. Savings. Per window, modelled input power at the ratio used minus at the advised ratio,
   times the window's steady time; summed per unit and divided by the unit's weeks of data
   (days with any window / 7) -> kWh per week. Intervals: block bootstrap over days (each
   replicate refits the power model with the day weights, re-finds the advised ratio and
   re-sums the saving; a pooled line model also resamples its units), percentiles.
   Status: 'change' when at least KEEP_HOURS_SHARE of the duty's hours run more than
   KEEP_RATIO_TOL away from the advised ratio and the interval
   excludes zero (or the ratio used breaks a configured limit), else 'keep'; the fleet
   saving and its interval sum the 'change' rows (following 'keep' changes nothing).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import polars as pl

from .errors import ModelError
from .physics import ALPHA_COPPER_PER_K
from .models._base import MAD_TO_SIGMA, FleetModel
from .schema import table as _schema_table
from .softsensor import (TORQUE_ESTIMATES_COLUMNS, TorqueSoftSensor, estimate_torque,
                         torque_inputs)

__all__ = [
    "advise", "AdviceResult", "ADVICE_COLUMNS", "InputPowerModel", "duty_bin_edges",
    "assign_duty_bins", "standstill_windows", "advise_frame", "format_advice", "line_of",
    "PREFERRED_SERIES", "STANDSTILL_SQL",
]

#: Columns of the lake table ``advice`` (name, type, unit, help), for schema.py.
ADVICE_COLUMNS: tuple[tuple[str, str, str, str], ...] = tuple(
    (c.name, c.type, c.unit, c.help) for c in _schema_table("advice").columns)

#: ISO 3 preferred numbers (Renard series; values from memory) used as duty-bin edges.
PREFERRED_SERIES: dict[int, tuple[float, ...]] = {
    5: (1.0, 1.6, 2.5, 4.0, 6.3),
    10: (1.0, 1.25, 1.6, 2.0, 2.5, 3.15, 4.0, 5.0, 6.3, 8.0),
    20: (1.0, 1.12, 1.25, 1.4, 1.6, 1.8, 2.0, 2.24, 2.5, 2.8, 3.15, 3.55, 4.0, 4.5, 5.0,
         5.6, 6.3, 7.1, 8.0, 9.0),
}

#: Starts and stops from telemetry: samples where the drive goes from standing to turning
#: (edge 'start') or back ('stop'), with the commanded ratio of the running sample.
#: Standing = n_in at or below stall_n_in_max_rpm (the events' definition of standstill).
STANDSTILL_SQL = """
WITH s AS (
    SELECT unit_id, ts, ratio_cmd,
           n_in > $stall_n_in_max_rpm AS running,
           lag(n_in > $stall_n_in_max_rpm) OVER (PARTITION BY unit_id ORDER BY ts) AS was_running,
           lag(ratio_cmd) OVER (PARTITION BY unit_id ORDER BY ts) AS prev_ratio
    FROM telemetry
    WHERE n_in IS NOT NULL
)
SELECT unit_id, ts,
       CASE WHEN running THEN 'start' ELSE 'stop' END AS edge,
       CASE WHEN running THEN ratio_cmd ELSE prev_ratio END AS ratio_cmd
FROM s
WHERE was_running IS NOT NULL AND running <> was_running
ORDER BY unit_id, ts
"""

# Tunables that are method choices rather than site settings (documented in advisor.md).
STEADY_SHARE_MIN = 0.8        # a window counts when >= 80 % of its samples are steady
RATIO_RANGE_Q = (0.02, 0.98)  # observed ratio range of a bin: robust to a stray window
RATIO_GRID_STEP = 0.01        # ratio search resolution
KEEP_RATIO_TOL = 0.05         # a window within this of the advised ratio already runs it
KEEP_HOURS_SHARE = 0.10       # 'keep' when less than this share of hours runs elsewhere
V_MARGIN = 0.01               # voltage limit: highest window-mean voltage seen + 1 %
EDGE_MAX_GAP_S = 3600.0       # a start/stop and its window must lie within an hour
UNIT_MODEL_MIN_WINDOWS = 200  # own power model from this many windows and 3 ratio levels
BOOTSTRAP_CONFIDENCE = 0.90
SUPPORT_MIN_WINDOWS = 10      # fewest model windows near a duty to define its ratio support
SPEED_SUPPORT_Q = RATIO_RANGE_Q  # motor speeds behind a power model: robust to a stray window
SPEED_OUT_SHARE = 0.10        # share of a duty's hours that may run outside those speeds


def line_of(unit_id: str) -> str:
    """Line (build) of a unit: unit_id up to the first '-' ('' when there is none).

    Same rule as fleetwatch.views (the dashboard's line filter).
    """
    return unit_id.split("-", 1)[0] if "-" in unit_id else ""


# ---------------------------------------------------------------- duty bins
def duty_bin_edges(lo: float, hi: float, per_decade: int = 10) -> np.ndarray:
    """Preferred-number bin edges covering [lo, hi] (both > 0).

    ``per_decade`` selects the Renard series R5, R10 or R20 (ISO 3). Raises ModelError for
    another value or a non-positive range.
    """
    if per_decade not in PREFERRED_SERIES:
        raise ModelError(f"duty_bins_per_decade must be one of {sorted(PREFERRED_SERIES)}, "
                         f"got {per_decade}", hint="Use 10 (R10 series, ~26 % wide bins).")
    if not (lo > 0 and hi > 0 and np.isfinite(lo) and np.isfinite(hi)):
        raise ModelError(f"duty bin range must be positive, got [{lo}, {hi}]")
    base = np.array(PREFERRED_SERIES[per_decade])
    d0, d1 = math.floor(math.log10(lo)) - 1, math.floor(math.log10(hi)) + 1
    edges = np.concatenate([base * 10.0 ** d for d in range(d0, d1 + 1)])
    edges = np.round(edges, 10)
    i0 = max(int(np.searchsorted(edges, lo, side="right")) - 1, 0)
    i1 = min(int(np.searchsorted(edges, hi, side="right")), edges.size - 1)
    return edges[i0: i1 + 1]


def assign_duty_bins(frame: pl.DataFrame, per_decade: int = 10) -> pl.DataFrame:
    """Add n_out_lo_rpm/n_out_hi_rpm and t_out_lo_nm/t_out_hi_nm (preferred-number bins).

    Rows with a non-positive or missing n_out_mean or t_out get null bins.
    """
    out = frame
    for col, lo_name, hi_name in (("n_out_mean", "n_out_lo_rpm", "n_out_hi_rpm"),
                                  ("t_out", "t_out_lo_nm", "t_out_hi_nm")):
        x = out[col].cast(pl.Float64).to_numpy()
        ok = np.isfinite(x) & (x > 0)
        lo = np.full(x.shape, np.nan)
        hi = np.full(x.shape, np.nan)
        if ok.any():
            edges = duty_bin_edges(float(x[ok].min()), float(x[ok].max()), per_decade)
            k = np.searchsorted(edges, x[ok], side="right") - 1
            lo[ok], hi[ok] = edges[k], edges[k + 1]
        out = out.with_columns(pl.Series(lo_name, lo).fill_nan(None),
                               pl.Series(hi_name, hi).fill_nan(None))
    return out


# ---------------------------------------------------------------- power model
def _r_factor(temp_c: Any, shape: tuple) -> np.ndarray:
    """Winding resistance relative to 20 degC, R_T/R_20 = 1 + 0.00393*(T - 20) (domain.md
    1.4, annealed copper, from memory); 1 where the temperature is not logged."""
    if temp_c is None:
        return np.ones(shape)
    t = np.broadcast_to(np.asarray(temp_c, float), shape)
    return np.where(np.isfinite(t), 1.0 + ALPHA_COPPER_PER_K * (t - 20.0), 1.0)


def _basis(ratio: np.ndarray, n_out_rpm: np.ndarray, t_out_nm: np.ndarray,
           temp_c: Any = None) -> np.ndarray:
    w = n_out_rpm * (2.0 * np.pi / 60.0)
    ln = np.log(ratio)
    p_out = w * t_out_nm
    ti = t_out_nm / ratio
    w_in = w * ratio
    rf = _r_factor(temp_c, np.shape(ratio))      # copper loss scales with R(T)
    return np.column_stack([np.ones_like(ratio), p_out, p_out * ln * ln, p_out * ln,
                            ti * ti * rf, ti * rf, w_in, w_in * w_in])


_BASIS_NAMES = ("c0_w", "c1_p_out", "c2_p_out_ln2", "c3_p_out_ln", "c4_copper", "c5_cross",
                "c6_speed", "c7_speed2")


class InputPowerModel(FleetModel):
    """Electrical input power of one drive (or one line) over ratio and duty.

    A loss model linear in its coefficients (see the module docstring), fitted by
    iteratively reweighted least squares with Huber weights (``epsilon`` robust sigmas).
    X columns: ratio, n_out_rpm, t_out_nm; optional ``groups`` give each group its own
    level (pooled line models). Learned: ``coef_``, ``group_offsets_`` (dict, W),
    ``scale_w_`` (robust residual sigma), ``weights_`` (final robust weights),
    ``ratio_range_``, ``n_windows_``.
    """

    def __init__(self, epsilon: float = 1.5, max_iter: int = 30):
        self.epsilon = epsilon
        self.max_iter = max_iter

    @staticmethod
    def _design(X: Any, groups: Any, levels: list | None) -> tuple[np.ndarray, np.ndarray]:
        a = np.asarray(X, dtype=float)
        if a.ndim != 2 or a.shape[1] not in (3, 4):
            raise ModelError(f"InputPowerModel needs columns (ratio, n_out_rpm, t_out_nm[, "
                             f"temp_c]); got shape {a.shape}")
        B = _basis(a[:, 0], a[:, 1], a[:, 2], a[:, 3] if a.shape[1] == 4 else None)
        if levels and len(levels) > 1:
            g = np.asarray(groups, dtype=object)
            D = np.column_stack([(g == lv).astype(float) for lv in levels[1:]])
            B = np.column_stack([B, D])
        return B, a

    def fit(self, X: Any, y: Any, groups: Any = None,
            sample_weight: Any = None) -> "InputPowerModel":
        y = np.asarray(y, dtype=float).ravel()
        levels = sorted(set(np.asarray(groups, dtype=object).tolist())) if groups is not None \
            else None
        B, a = self._design(X, groups, levels)
        ok = np.all(np.isfinite(B), axis=1) & np.isfinite(y) & (a[:, 0] > 0)
        if ok.sum() < B.shape[1] + 5:
            raise ModelError(f"InputPowerModel: {int(ok.sum())} usable windows, need at least "
                             f"{B.shape[1] + 5}")
        sw = np.ones(y.shape) if sample_weight is None else np.asarray(sample_weight, float)
        coef, w = _irls(B[ok], y[ok], sw[ok], self.epsilon, self.max_iter)
        self.levels_ = levels
        self.coef_ = coef
        resid = y[ok] - B[ok] @ coef
        self.scale_w_ = _robust_sigma(resid)
        weights = np.zeros(y.shape)
        weights[ok] = w
        self.weights_ = weights
        self.ratio_range_ = (float(a[ok, 0].min()), float(a[ok, 0].max()))
        self.n_windows_ = int(ok.sum())
        self.group_offsets_ = {}
        if levels:
            self.group_offsets_ = {levels[0]: 0.0}
            for k, lv in enumerate(levels[1:]):
                self.group_offsets_[lv] = float(coef[len(_BASIS_NAMES) + k])
        return self

    def refit(self, X: Any, y: Any, groups: Any, weights: np.ndarray) -> np.ndarray:
        """Coefficients of a weighted least-squares refit with fixed ``weights`` (bootstrap)."""
        self._check_fitted()
        B, _ = self._design(X, groups, self.levels_)
        ok = (weights > 0) & np.all(np.isfinite(B), axis=1) & np.isfinite(y)
        return _wls(B[ok], np.asarray(y, float)[ok], weights[ok])

    def predict(self, X: Any, groups: Any = None, coef: np.ndarray | None = None) -> np.ndarray:
        """Input power in W at rows (ratio, n_out_rpm, t_out_nm)."""
        self._check_fitted()
        a = np.asarray(X, dtype=float)
        B = _basis(a[:, 0], a[:, 1], a[:, 2], a[:, 3] if a.shape[1] == 4 else None)
        c = self.coef_ if coef is None else coef
        out = B @ c[: len(_BASIS_NAMES)]
        if self.levels_ and len(self.levels_) > 1 and groups is not None:
            g = np.asarray(groups, dtype=object)
            for k, lv in enumerate(self.levels_[1:]):
                out = out + (g == lv) * c[len(_BASIS_NAMES) + k]
        return out

    def curve_many(self, ratios: np.ndarray | None, n_out_rpm: np.ndarray,
                   t_out_nm: np.ndarray, coefs: np.ndarray,
                   ratios_w: np.ndarray | None = None, temp_c: Any = None) -> np.ndarray:
        """Input power for many coefficient sets: (B, W, G) on a ratio grid, or (B, W) at
        each window's own ratio ``ratios_w``. ``temp_c``: winding temperature per window
        (kept at another ratio: a first-order approximation)."""
        self._check_fitted()
        c = np.asarray(coefs, float)[:, : len(_BASIS_NAMES)]
        if ratios is None:
            B = _basis(np.asarray(ratios_w, float), n_out_rpm, t_out_nm, temp_c)
            return c @ B.T
        R, N, T, C = _grid_arrays(ratios, n_out_rpm, t_out_nm, temp_c)
        B = _basis(R.ravel(), N.ravel(), T.ravel(), None if C is None else C.ravel())
        return (c @ B.T).reshape(c.shape[0], *R.shape)

    def curve(self, ratios: np.ndarray, n_out_rpm: np.ndarray, t_out_nm: np.ndarray,
              coef: np.ndarray | None = None, temp_c: Any = None) -> np.ndarray:
        """Input power (W) on a grid: rows = windows (n_out, t_out[, temp_c]), columns =
        ratios.

        Group offsets are left out: they shift a unit's curve, not where its minimum is.
        """
        self._check_fitted()
        c = (self.coef_ if coef is None else coef)[: len(_BASIS_NAMES)]
        R, N, T, C = _grid_arrays(ratios, n_out_rpm, t_out_nm, temp_c)
        B = _basis(R.ravel(), N.ravel(), T.ravel(), None if C is None else C.ravel())
        return (B @ c).reshape(R.shape)


def _grid_arrays(ratios, n_out_rpm, t_out_nm, temp_c):
    n_out_rpm = np.asarray(n_out_rpm, float)
    R = np.broadcast_to(np.asarray(ratios, float)[None, :], (n_out_rpm.size, np.size(ratios)))
    N = np.broadcast_to(n_out_rpm[:, None], R.shape)
    T = np.broadcast_to(np.asarray(t_out_nm, float)[:, None], R.shape)
    C = None if temp_c is None else np.broadcast_to(np.asarray(temp_c, float)[:, None], R.shape)
    return R, N, T, C


def _robust_sigma(resid: np.ndarray) -> float:
    med = float(np.median(resid))
    return max(MAD_TO_SIGMA * float(np.median(np.abs(resid - med))), 1e-9)


def _wls(B: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Weighted least squares through the normal equations of unit-scaled columns.

    Eight-odd columns and thousands of rows: the normal equations are ~100x faster than an
    SVD here and, with the columns scaled and a 1e-10 ridge, accurate enough.
    """
    Bw = B * w[:, None]
    scale = np.sqrt((Bw * B).sum(axis=0))
    scale[~(scale > 0)] = 1.0
    Bs = B / scale
    G = (Bs * w[:, None]).T @ Bs
    G[np.diag_indices_from(G)] += 1e-10 * max(float(np.trace(G)), 1e-300)
    rhs = (Bs * w[:, None]).T @ y
    try:
        sol = np.linalg.solve(G, rhs)
    except np.linalg.LinAlgError:
        sw = np.sqrt(w)
        sol = np.linalg.lstsq(Bs * sw[:, None], y * sw, rcond=None)[0]
    return sol / scale


def _irls(B: np.ndarray, y: np.ndarray, sw: np.ndarray, eps: float,
          max_iter: int) -> tuple[np.ndarray, np.ndarray]:
    """Huber M-estimate by IRLS: returns coefficients and the final robust weights * sw."""
    coef = _wls(B, y, sw)
    w = np.ones_like(y)
    for _ in range(max_iter):
        r = y - B @ coef
        s = _robust_sigma(r)
        a = np.abs(r) / (eps * s)
        w_new = np.where(a <= 1.0, 1.0, 1.0 / np.maximum(a, 1e-12))
        new = _wls(B, y, sw * w_new)
        done = np.allclose(new, coef, rtol=1e-7, atol=1e-10)
        coef, w = new, w_new
        if done:
            break
    return coef, w * sw


# ---------------------------------------------------------------- standstill duties
def standstill_windows(edges: pl.DataFrame, windows: pl.DataFrame,
                       window_min: float) -> pl.DataFrame:
    """Windows adjacent to standstill: ``unit_id, window_start, standstill`` (True only).

    ``edges``: rows (unit_id, ts, edge 'start'|'stop', ratio_cmd) as STANDSTILL_SQL gives.
    ``windows``: steady windows (unit_id, window_start, ratio_cmd_mean). After a start, the
    first steady window within EDGE_MAX_GAP_S at the start's ratio; before a stop, the last
    steady window within EDGE_MAX_GAP_S at the stop's ratio.
    """
    schema = {"unit_id": pl.Utf8, "window_start": windows.schema["window_start"],
              "standstill": pl.Boolean}
    if edges.height == 0 or windows.height == 0:
        return pl.DataFrame(schema=schema)
    w = (windows.select(pl.col("unit_id").cast(pl.Utf8), "window_start", "ratio_cmd_mean")
         .with_columns((pl.col("window_start")
                        + pl.duration(seconds=float(window_min) * 60.0)).alias("window_end"))
         .sort("unit_id", "window_start"))
    e = edges.with_columns(pl.col("unit_id").cast(pl.Utf8),
                           pl.col("ts").cast(w.schema["window_start"])).sort("unit_id", "ts")
    tol = pl.duration(seconds=EDGE_MAX_GAP_S)
    same = ((pl.col("ratio_cmd_mean") - pl.col("ratio_cmd")).abs()
            <= 0.02 * pl.col("ratio_cmd").abs() + 1e-6)
    starts = (e.filter(pl.col("edge") == "start")
              .join_asof(w.rename({"window_start": "ws"}), left_on="ts", right_on="ws",
                         by="unit_id", strategy="forward", check_sortedness=False)
              .filter(pl.col("ws").is_not_null() & (pl.col("ws") - pl.col("ts") <= tol) & same)
              .select("unit_id", pl.col("ws").alias("window_start")))
    stops = (e.filter(pl.col("edge") == "stop")
             .join_asof(w.rename({"window_end": "we"}), left_on="ts", right_on="we",
                        by="unit_id", strategy="backward", check_sortedness=False)
             .filter(pl.col("we").is_not_null() & (pl.col("ts") - pl.col("we") <= tol) & same)
             .select("unit_id", "window_start"))
    return (pl.concat([starts, stops]).unique()
            .with_columns(pl.lit(True).alias("standstill")).cast(schema))


# ---------------------------------------------------------------- advice
@dataclass
class _Limits:
    max_start_ratio: float
    motor_n_max_rpm: float
    motor_i_max_a: float


def _wmedian(x: np.ndarray, w: np.ndarray) -> float:
    o = np.argsort(x)
    c = np.cumsum(w[o])
    return float(x[o][np.searchsorted(c, 0.5 * c[-1])])


def _motor_state(ratios: np.ndarray, win: dict[str, np.ndarray],
                 sensor: TorqueSoftSensor | None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Motor speed (rpm), current (A) and terminal voltage (V) of each window's duty at the
    ratios ``ratios`` (shape (G,) for a grid, or (W, 1) for each window's own ratio).

    n_in = i * n_out * (i_act/i_cmd) keeps the window's slip; I = T_shaft/k_e + I_0 with the
    soft sensor's inverse for T_shaft (domain.md 1.4); V = I*R + k_e*omega_in. Current and
    voltage are NaN without a sensor or motor constants.
    """
    r = np.asarray(ratios, float)
    r = r[None, :] if r.ndim == 1 else r
    n_in = r * win["n_out"][:, None] * win["slip_factor"][:, None]
    if sensor is None:
        nan = np.full(np.broadcast_shapes(r.shape, n_in.shape), np.nan)
        return n_in, nan, nan
    t_sh = sensor.shaft_torque_for(r, win["t_out"][:, None])
    cur = t_sh / win["k_e"][:, None] + win["i0_a"][:, None]
    v = cur * win["r_ohm"][:, None] + win["k_e"][:, None] * n_in * (2 * np.pi / 60)
    return n_in, cur, v


def _feasible(grid: np.ndarray, r_used: np.ndarray, win: dict[str, np.ndarray],
              sensor: TorqueSoftSensor | None, lim: _Limits, v_seen: float,
              n_support: tuple[float, float] = (-np.inf, np.inf)
              ) -> tuple[np.ndarray, list[str], list[str]]:
    """Mask over the ratio grid: every window of the duty stays inside the motor limits.

    Returns (mask, limits that cut the grid, configured limits the used ratios break).
    The voltage limit is empirical (the highest voltage seen): a window's own ratio always
    counts as reachable for it, so the model's voltage error cannot rule out what ran.
    ``n_support``: the motor speeds (rpm) the power model's data cover (``model_speed``).
    At the ratio searched, at most SPEED_OUT_SHARE of the duty's hours (``hours`` in
    ``win``) may need a motor speed outside it; a window's own speed always counts as
    covered. The model's speed-loss terms are known only over the speeds its data ran at:
    a drive held at its supply-voltage limit runs one narrow band of motor speeds, and
    there the ratio and the output speed move together, so the model cannot tell their
    effects apart and a ratio that slows the motor below that band is an extrapolation.
    """
    ok = np.ones(grid.shape, bool)
    why: list[str] = []
    broken: list[str] = []
    n_in, cur, v = _motor_state(grid, win, sensor)
    n_u, cur_u, v_u = _motor_state(r_used[:, None], win, sensor)
    checks = [("motor_speed", n_in, n_u, np.full(n_u.shape, lim.motor_n_max_rpm), True),
              ("motor_current", cur, cur_u, np.full(n_u.shape, lim.motor_i_max_a), True)]
    if np.isfinite(v_seen):
        checks.append(("motor_voltage", v, v_u, np.fmax(v_seen, v_u), False))
    s_lo, s_hi = n_support
    if np.isfinite(s_lo) or np.isfinite(s_hi):
        hours = np.asarray(win.get("hours", np.ones(n_u.shape[0])), float)
        inside = ((n_in >= np.fmin(s_lo, n_u)) & (n_in <= np.fmax(s_hi, n_u))
                  | ~np.isfinite(n_in))                     # (W, G); unknown speed: no cut
        out_share = (hours[:, None] * ~inside).sum(axis=0) / max(float(hours.sum()), 1e-12)
        m = out_share <= SPEED_OUT_SHARE + 1e-12
        if not m.all():
            why.append("model_speed")
        ok &= m
    for name, val, val_u, limit, configured in checks:
        if not np.isfinite(val).any():
            continue
        m = np.all(np.nan_to_num(val, nan=-np.inf) <= limit, axis=0)
        if not m.all() and name not in why:
            why.append(name)
        ok &= m
        if configured and np.any(np.nan_to_num(val_u, nan=-np.inf) > limit):
            broken.append(name)
    return ok, why, broken


def _best(P: np.ndarray, dur: np.ndarray, ok: np.ndarray) -> int:
    tot = (P * dur[:, None]).sum(axis=0)
    tot = np.where(ok, tot, np.inf)
    return int(np.argmin(tot))


def advise_frame(frame: pl.DataFrame, sensor: TorqueSoftSensor | None, *,
                 min_windows: int, max_start_ratio: float, motor_n_max_rpm: float,
                 motor_i_max_a: float, sample_period_s: float, per_decade: int = 10,
                 n_boot: int = 200, random_state: int = 0,
                 confidence: float = BOOTSTRAP_CONFIDENCE,
                 days_per_unit: Mapping[str, int] | None = None) -> tuple[pl.DataFrame, dict]:
    """Advice rows (ADVICE_COLUMNS) from steady windows with torque.

    ``frame``: windows as :func:`fleetwatch.softsensor.estimate_torque` returns them
    (unit_id, window_start, ratio, n_out_mean, t_out, torque_source, p_in_mean, k_e, r_ohm,
    i0_a, steady_samples, ...) plus a boolean ``standstill`` column (missing: every duty
    counts as starting from standstill). ``days_per_unit``: days of data per unit, the
    denominator of "per week" (default: days with a steady window). Returns the advice
    table and a dict with the fleet's weekly saving and its interval (``fleet_kwh_week``,
    ``_low``, ``_high``), the bootstrap replicates per unit, the fitted power models and
    the binned ``frame``.
    """
    lim = _Limits(max_start_ratio, motor_n_max_rpm, motor_i_max_a)
    f = frame.filter(pl.col("t_out").is_not_null() & (pl.col("t_out") > 0)
                     & pl.col("p_in_mean").is_not_null() & (pl.col("ratio") > 0)
                     & pl.col("n_out_mean").is_not_null() & (pl.col("n_out_mean") > 0))
    if "standstill" not in f.columns:
        f = f.with_columns(pl.lit(True).alias("standstill"))
    if "ratio_act_mean" not in f.columns:
        f = f.with_columns(pl.col("ratio").alias("ratio_act_mean"))
    f = f.with_columns(
        pl.col("unit_id").cast(pl.Utf8),
        pl.col("unit_id").cast(pl.Utf8).map_elements(line_of, return_dtype=pl.Utf8)
        .alias("line"),
        (pl.col("steady_samples") * float(sample_period_s) / 3600.0).alias("hours"),
        (pl.col("ratio_act_mean") / pl.col("ratio")).fill_null(1.0).alias("slip_factor"),
        pl.col("window_start").dt.convert_time_zone("UTC").dt.date().alias("_day"),
        (pl.col("p_in_mean") / pl.col("i_in_mean")).alias("_v"),
        pl.col("standstill").fill_null(False),
        (pl.col("temp_mean").cast(pl.Float64) if "temp_mean" in f.columns
         else pl.lit(None, dtype=pl.Float64)).fill_null(float("nan")).alias("_temp"),
    )
    f = assign_duty_bins(f, per_decade)
    rng = np.random.default_rng(random_state)
    alpha = (1.0 - confidence) / 2.0
    models: dict[str, tuple[InputPowerModel, pl.DataFrame, str]] = {}

    def xy(d: pl.DataFrame):
        return (d.select("ratio", "n_out_mean", "t_out", "_temp").to_numpy().astype(float),
                d["p_in_mean"].to_numpy().astype(float), d["unit_id"].to_numpy())

    # power models: own where a unit has enough, else its line's (pooled, per-unit level)
    units = sorted(f["unit_id"].unique().to_list())
    line_models: dict[str, tuple[InputPowerModel, pl.DataFrame, str] | None] = {}

    def line_model(ln: str):
        if ln not in line_models:
            line_models[ln] = None
            dl = f.filter(pl.col("line") == ln)
            if ln and dl["unit_id"].n_unique() >= 2:
                X, y, g = xy(dl)
                try:
                    line_models[ln] = (InputPowerModel().fit(X, y, groups=g), dl, "line")
                except ModelError:
                    pass
        return line_models[ln]

    for u in units:
        d = f.filter(pl.col("unit_id") == u)
        if d.height >= UNIT_MODEL_MIN_WINDOWS and d["ratio"].round(1).n_unique() >= 3:
            X, y, _ = xy(d)
            try:
                models[u] = (InputPowerModel().fit(X, y), d, "unit")
                continue
            except ModelError:
                pass
        lm = line_model(line_of(u))
        if lm is not None:
            models[u] = lm

    # bootstrap: per model, days resampled with replacement (block bootstrap over days,
    # since windows of one day share set points and temperature); each replicate refits the
    # model with the day counts as weights (robust weights of the full fit kept fixed)
    boot: dict[int, tuple[np.ndarray, dict]] = {}

    def boot_of(m: InputPowerModel, d: pl.DataFrame) -> tuple[np.ndarray, dict]:
        if id(m) not in boot:
            days = d["_day"].to_numpy()
            uniq, inv = np.unique(days, return_inverse=True)
            X, y, g = xy(d)
            counts = rng.multinomial(uniq.size, np.full(uniq.size, 1.0 / uniq.size),
                                     size=n_boot)
            # a pooled line model also resamples its units: the ratio effect it sees in a
            # duty may come from comparing different drives, and that is only as sure as
            # the drives are alike
            units_d, uinv = np.unique(np.asarray(g, dtype=str), return_inverse=True)
            ucounts = (rng.multinomial(units_d.size, np.full(units_d.size, 1.0 / units_d.size),
                                       size=n_boot) if m.levels_ and units_d.size > 1
                       else np.ones((n_boot, units_d.size)))
            coefs = np.empty((n_boot, m.coef_.size))
            for b in range(n_boot):
                try:
                    coefs[b] = m.refit(X, y, g if m.levels_ else None,
                                       m.weights_ * counts[b, inv] * ucounts[b, uinv])
                except np.linalg.LinAlgError:
                    coefs[b] = m.coef_
            boot[id(m)] = (coefs, {"days": {dd: k for k, dd in enumerate(uniq.tolist())},
                                   "counts": counts.astype(float)})
        return boot[id(m)]

    rows: list[dict] = []
    unit_reps: dict[str, np.ndarray] = {}
    if days_per_unit is None:
        days_per_unit = dict(f.group_by("unit_id").agg(pl.col("_day").n_unique()).iter_rows())
    weeks_of = {u: max(int(nd), 1) / 7.0 for u, nd in days_per_unit.items()}
    v_max_seen = dict(f.group_by("unit_id").agg(pl.col("_v").drop_nans().max()).iter_rows())
    groups = f.filter(pl.col("n_out_lo_rpm").is_not_null() & pl.col("t_out_lo_nm").is_not_null()
                      ).partition_by("unit_id", "n_out_lo_rpm", "t_out_lo_nm", as_dict=True)
    line_groups = {}
    for (u, nlo, tlo), d in groups.items():
        line_groups.setdefault((line_of(u), nlo, tlo), []).append(d)
    for (u, nlo, tlo) in sorted(groups):
        own = groups[(u, nlo, tlo)]
        n_u = own.height
        nhi, thi = own["n_out_hi_rpm"][0], own["t_out_hi_nm"][0]
        ln = line_of(u)
        src = "measured" if (own["torque_source"] == "measured").mean() >= 0.5 else "estimated"
        base = dict(unit_id=u, line=ln, n_out_lo_rpm=nlo, n_out_hi_rpm=nhi, t_out_lo_nm=tlo,
                    t_out_hi_nm=thi, unit_windows=int(n_u), torque_source=src)
        dur = own["hours"].to_numpy()
        r_used_w = own["ratio"].to_numpy().astype(float)
        wk = weeks_of.get(u, 1.0)
        base["ratio_used"] = _wmedian(r_used_w, dur)
        base["hours_per_week"] = float(dur.sum() / wk)
        # windows behind the advice: the unit's own, else its line's in this bin
        # (the unit's own power model is still used: it carries the unit's motor and
        # variator; the line's windows show which ratios this build runs the duty at)
        basis, behind = "unit", own
        if n_u < min_windows or own["ratio"].round(2).n_unique() < 2:
            if ln and len(line_groups[(ln, nlo, tlo)]) > 1:
                pooled = pl.concat(line_groups[(ln, nlo, tlo)], how="diagonal_relaxed")
                if pooled.height >= min_windows:
                    basis, behind = "line", pooled
        base["basis"] = basis
        base["windows"] = int(behind.height)
        standstill = bool(behind["standstill"].any())
        base["starts_from_standstill"] = standstill
        rq = np.quantile(behind["ratio"].to_numpy().astype(float), RATIO_RANGE_Q)
        base["ratio_min_obs"], base["ratio_max_obs"] = float(rq[0]), float(rq[1])

        def empty(note: str) -> dict:
            return {**base, "ratio_advised": None, "saving_w": None, "saving_kwh_week": None,
                    "saving_kwh_week_low": None, "saving_kwh_week_high": None,
                    "limited_by": None, "status": "no_advice", "note": note}

        if behind.height < min_windows:
            rows.append(empty(f"{behind.height} steady windows for this duty (unit and line), "
                              f"fewer than advice_min_windows = {min_windows}"))
            continue
        if u not in models:
            rows.append(empty("no input-power model for this unit (too few steady windows "
                              "with torque on the unit and its line)"))
            continue
        if rq[1] - rq[0] < RATIO_GRID_STEP:
            rows.append(empty(f"only one ratio ({rq[0]:.2f}) observed for this duty: nothing "
                              "to compare it with"))
            continue
        model, mdata, mbasis = models[u]
        lo, hi = float(rq[0]), float(rq[1])
        why: list[str] = []
        mlo, mhi = model.ratio_range_
        if lo < mlo or hi > mhi:
            why.append("model_range")
            lo, hi = max(lo, mlo), min(hi, mhi)
        # never extrapolate the power model in duty either: the advised ratio must lie
        # among the ratios its data ran at near this duty (this bin and the next R-series
        # step around it). Matters for pooled bins, where the line's windows may show a
        # ratio this unit's model never saw near this duty.
        slo, shi = _support_range(mdata, nlo, nhi, tlo, thi, u if mbasis == "unit" else None)
        if lo < slo or hi > shi:
            why.append("model_support")
            lo, hi = max(lo, slo), min(hi, shi)
        if standstill and hi > max_start_ratio:
            why.append("start_ratio")
            hi = min(hi, max_start_ratio)
        if hi < lo:
            rows.append(empty(
                f"the ratios observed for this duty are steeper than max_start_ratio = "
                f"{max_start_ratio:g} and the duty starts from standstill"
                if "start_ratio" in why else "observed ratios lie outside the power model's "
                "range (ratios its data ran at near this duty)"))
            continue
        grid = np.unique(np.round(np.r_[np.arange(lo, hi + 1e-9, RATIO_GRID_STEP), lo, hi], 6))
        win = {"n_out": own["n_out_mean"].to_numpy().astype(float),
               "t_out": own["t_out"].to_numpy().astype(float),
               "slip_factor": own["slip_factor"].to_numpy().astype(float),
               "k_e": own["k_e"].to_numpy().astype(float),
               "i0_a": own["i0_a"].to_numpy().astype(float),
               "r_ohm": own["r_ohm"].cast(pl.Float64).to_numpy(),
               "temp": own["_temp"].to_numpy().astype(float), "hours": dur}
        v_seen = v_max_seen.get(u)
        ok, why_m, broken = _feasible(grid, r_used_w, win, sensor, lim,
                                      np.nan if v_seen is None else float(v_seen) * (1 + V_MARGIN),
                                      _speed_support(mdata, u if mbasis == "unit" else None))
        why += why_m
        if standstill and np.any(r_used_w > max_start_ratio + 1e-9):
            broken.append("start_ratio")
        if not ok.any():
            rows.append(empty("no ratio inside the observed range keeps the motor inside its "
                              f"limits ({', '.join(why_m)})"))
            continue
        P = model.curve(grid, win["n_out"], win["t_out"], temp_c=win["temp"])
        k = _best(P, dur, ok)
        r_adv = float(grid[k])
        dp = _diag_power(model, r_used_w, win) - P[:, k]
        saving_w = float((dp * dur).sum() / dur.sum())
        kwh = float((dp * dur).sum() / 1000.0 / wk)
        # bootstrap replicates of the weekly saving (advised ratio re-found each time)
        coefs, bw = boot_of(model, mdata)
        day_idx = np.array([bw["days"][dd] for dd in own["_day"].to_list()])
        dw = bw["counts"][:, day_idx]                                   # (B, W)
        Pb = model.curve_many(grid, win["n_out"], win["t_out"], coefs,
                              temp_c=win["temp"])                       # (B, W, G)
        tot = np.einsum("bwg,w->bg", Pb, dur)
        kb = np.argmin(np.where(ok[None, :], tot, np.inf), axis=1)
        pub = model.curve_many(None, win["n_out"], win["t_out"], coefs, ratios_w=r_used_w,
                               temp_c=win["temp"])
        p_adv_b = np.take_along_axis(Pb, kb[:, None, None].repeat(Pb.shape[1], 1), 2)[:, :, 0]
        reps = ((pub - p_adv_b) * dur[None, :] * dw).sum(axis=1) / 1000.0 / wk
        lo_i, hi_i = (float(v) for v in np.quantile(reps, [alpha, 1 - alpha]))
        # share of the duty's hours not already run at the advised ratio: a duty run partly
        # at another ratio (an old recipe, another shift) has something to gain even when
        # its typical (median) ratio is the advised one
        off_share = float(dur[np.abs(r_used_w - r_adv) >= KEEP_RATIO_TOL].sum() / dur.sum())
        if broken:
            status = "change"
            note = (f"the ratio used breaks the {', '.join(broken)} limit at times; "
                    f"run this duty at ratio {r_adv:.2f} (modelled saving {saving_w:+.1f} W)")
        elif off_share < KEEP_HOURS_SHARE:
            status, note = "keep", "already at the least-power ratio for this duty"
        elif kwh <= 0:
            status, note = "keep", ("no saving: the least-power ratio every window of this "
                                    "duty can run at costs more than the ratios used now")
        elif lo_i <= 0:
            status, note = "keep", ("the advised ratio is not a clear saving (interval "
                                    f"{lo_i:.3f} .. {hi_i:.3f} kWh/week)")
        else:
            status = "change"
            if abs(r_adv - base["ratio_used"]) >= KEEP_RATIO_TOL:
                note = (f"run this duty at ratio {r_adv:.2f} instead of "
                        f"{base['ratio_used']:.2f} (motor at about "
                        f"{r_adv * float(np.median(win['n_out'])):.0f} rpm)")
            else:   # mostly run right already; the rest of its hours run elsewhere
                note = (f"run all of this duty at ratio {r_adv:.2f}: {100 * off_share:.0f} % "
                        f"of its hours run at other ratios ({r_used_w.min():.2f} .. "
                        f"{r_used_w.max():.2f}), e.g. from another recipe or shift")
        if mbasis == "line":
            note += "; power model pooled with the line's units"
        if status == "change":   # the fleet saving counts the advice that changes something
            unit_reps[u] = unit_reps.get(u, np.zeros(n_boot)) + reps
        rows.append({**base, "ratio_advised": r_adv, "saving_w": saving_w,
                     "saving_kwh_week": kwh, "saving_kwh_week_low": lo_i,
                     "saving_kwh_week_high": hi_i,
                     "limited_by": ",".join(dict.fromkeys(why)) or None, "status": status,
                     "note": note})

    advice = _to_table(rows)
    kwh_rows = advice.filter(pl.col("status") == "change")
    fleet = float(kwh_rows["saving_kwh_week"].sum()) if kwh_rows.height else 0.0
    if unit_reps:
        tot = np.sum(np.vstack(list(unit_reps.values())), axis=0)
        f_lo, f_hi = (float(v) for v in np.quantile(tot, [alpha, 1 - alpha]))
    else:
        f_lo = f_hi = 0.0
    extra = {"fleet_kwh_week": fleet, "fleet_kwh_week_low": f_lo, "fleet_kwh_week_high": f_hi,
             "unit_replicates": unit_reps, "models": {u: (m, b) for u, (m, _, b) in
                                                      models.items()},
             "confidence": confidence, "frame": f}
    return advice, extra


def _support_range(mdata: pl.DataFrame, nlo: float, nhi: float, tlo: float, thi: float,
                   unit: str | None) -> tuple[float, float]:
    """Ratio range (RATIO_RANGE_Q) of the power model's windows near one duty bin.

    Near: output speed and torque within the bin widened by one bin width on each side
    (same ratio of edges, so it works on any series). ``unit``: only that unit's windows.
    Returns (inf, -inf) with fewer than SUPPORT_MIN_WINDOWS windows.
    """
    fn, ft = nhi / nlo, thi / tlo
    d = mdata.filter((pl.col("n_out_mean") >= nlo / fn) & (pl.col("n_out_mean") < nhi * fn)
                     & (pl.col("t_out") >= tlo / ft) & (pl.col("t_out") < thi * ft))
    if unit is not None:
        d = d.filter(pl.col("unit_id") == unit)
    if d.height < SUPPORT_MIN_WINDOWS:
        return float("inf"), float("-inf")
    q = np.quantile(d["ratio"].to_numpy().astype(float), RATIO_RANGE_Q)
    return float(q[0]), float(q[1])


def _speed_support(mdata: pl.DataFrame, unit: str | None) -> tuple[float, float]:
    """Motor speeds (rpm, SPEED_SUPPORT_Q quantiles of n_in_mean) of the power model's windows.

    ``unit``: only that unit's windows. (-inf, inf) without a logged motor speed or with
    fewer than SUPPORT_MIN_WINDOWS windows.
    """
    if "n_in_mean" not in mdata.columns:
        return float("-inf"), float("inf")
    d = mdata if unit is None else mdata.filter(pl.col("unit_id") == unit)
    x = d["n_in_mean"].cast(pl.Float64).drop_nulls().drop_nans().to_numpy()
    x = x[x > 0]
    if x.size < SUPPORT_MIN_WINDOWS:
        return float("-inf"), float("inf")
    q = np.quantile(x, SPEED_SUPPORT_Q)
    return float(q[0]), float(q[1])


def _diag_power(model: InputPowerModel, ratios: np.ndarray, win: dict,
                coef: np.ndarray | None = None) -> np.ndarray:
    """Modelled input power of each window at its own ratio (no group offset)."""
    c = model.coef_ if coef is None else coef
    return _basis(np.asarray(ratios, float), win["n_out"], win["t_out"],
                  win["temp"]) @ c[: len(_BASIS_NAMES)]


_PL_TYPES = {"VARCHAR": pl.Utf8, "DOUBLE": pl.Float64, "BIGINT": pl.Int64,
             "BOOLEAN": pl.Boolean, "TIMESTAMPTZ": pl.Datetime("us", "UTC")}


def _to_table(rows: list[dict]) -> pl.DataFrame:
    schema = {n: _PL_TYPES[t] for n, t, *_ in ADVICE_COLUMNS}
    if not rows:
        return pl.DataFrame(schema=schema)
    return pl.DataFrame([{k: r.get(k) for k in schema} for r in rows], schema=schema,
                        orient="row")


# ---------------------------------------------------------------- entry point
@dataclass
class AdviceResult:
    """What :func:`advise` found (and wrote).

    ``advice``: the ``advice`` table (ADVICE_COLUMNS); ``torque_estimates``: the
    ``torque_estimates`` table (softsensor.TORQUE_ESTIMATES_COLUMNS); ``validation``:
    leave-one-unit-out errors of the soft sensor; ``fleet_kwh_week`` with
    ``fleet_kwh_week_low``/``_high`` at ``confidence``; ``measured_units`` /
    ``estimated_units``: where output torque is logged / estimated; ``sensor_coef``: the
    soft sensor's coefficients and ``sensor`` the fitted TorqueSoftSensor (None without any
    instrumented unit); ``windows``: the
    steady windows behind the advice (torque, duty bin, standstill flag, steady hours);
    ``written``: tables written to the lake; ``notes``: plain-language caveats.
    """

    advice: pl.DataFrame
    torque_estimates: pl.DataFrame
    validation: pl.DataFrame
    fleet_kwh_week: float
    fleet_kwh_week_low: float
    fleet_kwh_week_high: float
    confidence: float
    measured_units: list[str]
    estimated_units: list[str]
    sensor_coef: dict | None
    sensor: TorqueSoftSensor | None = None
    windows: pl.DataFrame = field(default_factory=pl.DataFrame)
    written: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def summary(self) -> dict[str, Any]:
        """JSON-ready summary: fleet saving, per-unit saving and the 'change' advice."""
        a = self.advice
        per_unit = (a.filter(pl.col("status") == "change")
                    .group_by("unit_id").agg(pl.col("saving_kwh_week").sum())
                    .sort("unit_id"))
        val = self.validation.filter(pl.col("unit_id") == "ALL")
        return {
            "fleet_saving_kwh_week": self.fleet_kwh_week,
            "fleet_saving_kwh_week_low": self.fleet_kwh_week_low,
            "fleet_saving_kwh_week_high": self.fleet_kwh_week_high,
            "confidence": self.confidence,
            "units_torque_measured": self.measured_units,
            "units_torque_estimated": self.estimated_units,
            "soft_sensor": {"coefficients": self.sensor_coef,
                            "holdout_rms_pct": val["rms_pct"][0] if val.height else None,
                            "holdout_bias_pct": val["bias_pct"][0] if val.height else None},
            "unit_saving_kwh_week": dict(per_unit.iter_rows()),
            "bins": {"advised": int(a["ratio_advised"].is_not_null().sum()),
                     "change": int((a["status"] == "change").sum()),
                     "keep": int((a["status"] == "keep").sum()),
                     "no_advice": int((a["status"] == "no_advice").sum())},
            "advice": a.filter(pl.col("status") == "change").to_dicts(),
            "notes": self.notes,
            "written": self.written,
        }


def _cast_table(df: pl.DataFrame, columns) -> pl.DataFrame:
    return df.select([pl.col(n).cast(_PL_TYPES[t]) for n, t, *_ in columns])


def advise(settings: Any, write: bool = True, *, n_boot: int | None = None) -> AdviceResult:
    """Soft sensor, ratio advice and savings for the lake of ``settings``.

    Reads ``windows``, ``motor_fits`` and ``telemetry`` (for starts and stops); fits the
    output-torque soft sensor on the units that log torque; advises per unit and duty bin;
    with ``write`` replaces the lake tables ``advice`` and ``torque_estimates`` (under the
    writer lock). ``n_boot`` overrides the ``advice_bootstrap`` setting.

    Raises ModelError when there are no steady windows (run ``fleetwatch analyze`` first);
    LakeError / LockHeldError from the lake.
    """
    from .lake import Lake

    lake = Lake.from_settings(settings)
    windows = lake.read("windows")
    if windows.height == 0:
        raise ModelError("the lake has no windows to advise on",
                         hint="Run `fleetwatch ingest` and `fleetwatch analyze` first.")
    motor_fits = lake.read("motor_fits")
    i0_a = float(getattr(settings, "motor_i0_a", 0.0))
    inputs = torque_inputs(windows, motor_fits, i0_a, STEADY_SHARE_MIN)
    notes: list[str] = []
    if inputs.height == 0:
        raise ModelError("no steady windows with motor current and a motor fit",
                         hint="Check that telemetry logs i_in and run `fleetwatch analyze`.")
    te = estimate_torque(inputs)
    if te.sensor is None:
        notes.append("no unit logs output torque: the soft sensor cannot be trained, so only "
                     "instrumented duties could be described; no advice for the others")
    edges = pl.DataFrame(schema={"unit_id": pl.Utf8, "ts": pl.Datetime("us", "UTC"),
                                 "edge": pl.Utf8, "ratio_cmd": pl.Float64})
    if lake.has_table("telemetry"):
        con = lake.connect(["telemetry"])
        try:
            edges = pl.from_arrow(con.sql(STANDSTILL_SQL, params={
                "stall_n_in_max_rpm": float(settings.stall_n_in_max_rpm)}).to_arrow_table())
        finally:
            con.close()
        standstill = standstill_windows(edges, te.frame, float(settings.window_min))
        frame = (te.frame.join(standstill, on=["unit_id", "window_start"], how="left")
                 .with_columns(pl.col("standstill").fill_null(False)))
    else:
        notes.append("no telemetry in the lake: starts cannot be found, so every duty is "
                     "treated as starting from standstill (max_start_ratio applies to all)")
        frame = te.frame.with_columns(pl.lit(True).alias("standstill"))
    days = dict(windows.with_columns(pl.col("unit_id").cast(pl.Utf8))
                .group_by("unit_id").agg(pl.col("day").n_unique()).iter_rows()) \
        if "day" in windows.columns else None
    advice, extra = advise_frame(
        frame, te.sensor, min_windows=int(settings.advice_min_windows),
        max_start_ratio=float(settings.max_start_ratio),
        motor_n_max_rpm=float(settings.motor_n_max_rpm),
        motor_i_max_a=float(settings.motor_i_max_a),
        sample_period_s=float(settings.sample_period_s),
        per_decade=int(getattr(settings, "duty_bins_per_decade", 10)),
        n_boot=int(n_boot if n_boot is not None else getattr(settings, "advice_bootstrap", 200)),
        random_state=int(getattr(settings, "random_state", 0)),
        confidence=float(getattr(settings, "advice_confidence", BOOTSTRAP_CONFIDENCE)),
        days_per_unit=days)
    result = AdviceResult(
        advice=advice, torque_estimates=_cast_table(te.table, TORQUE_ESTIMATES_COLUMNS),
        validation=te.validation, fleet_kwh_week=extra["fleet_kwh_week"],
        fleet_kwh_week_low=extra["fleet_kwh_week_low"],
        fleet_kwh_week_high=extra["fleet_kwh_week_high"], confidence=extra["confidence"],
        measured_units=te.measured_units, estimated_units=te.estimated_units,
        sensor_coef=None if te.sensor is None else dict(te.sensor.coef_), sensor=te.sensor,
        windows=extra["frame"].drop("_v"), notes=notes)
    if write:
        with lake.writer("advise"):
            lake.overwrite("advice", advice)
            lake.overwrite("torque_estimates", result.torque_estimates)
        result.written = ["advice", "torque_estimates"]
    return result


def format_advice(result: AdviceResult) -> str:
    """Plain-text report of an AdviceResult for the terminal."""
    lines = []
    pct = int(round(100 * result.confidence))
    lines.append(f"Fleet saving if the advice is followed: {result.fleet_kwh_week:.2f} kWh/week "
                 f"({pct} % interval {result.fleet_kwh_week_low:.2f} .. "
                 f"{result.fleet_kwh_week_high:.2f})")
    lines.append("Output torque measured on: " + (", ".join(result.measured_units) or "none"))
    lines.append("Output torque estimated (soft sensor) on: "
                 + (", ".join(result.estimated_units) or "none"))
    val = result.validation.filter(pl.col("unit_id") == "ALL")
    if val.height:
        lines.append(f"Soft sensor on held-out instrumented units: RMS {val['rms_nm'][0]:.3f} "
                     f"N*m ({val['rms_pct'][0]:.1f} %), bias {val['bias_nm'][0]:+.3f} N*m "
                     f"({val['bias_pct'][0]:+.1f} %)")
    a = result.advice
    for u in sorted(a["unit_id"].unique().to_list()):
        au = a.filter(pl.col("unit_id") == u)
        ch = au.filter(pl.col("status") == "change")
        kwh = ch["saving_kwh_week"].drop_nulls().sum()
        lines.append(f"{u}: {kwh:.2f} kWh/week from {ch.height} duties to change "
                     f"({(au['status'] == 'keep').sum()} to keep, "
                     f"{(au['status'] == 'no_advice').sum()} without advice)")
        for r in ch.sort("saving_kwh_week", descending=True).iter_rows(named=True):
            lines.append(
                f"  n_out {r['n_out_lo_rpm']:g}-{r['n_out_hi_rpm']:g} rpm, t_out "
                f"{r['t_out_lo_nm']:g}-{r['t_out_hi_nm']:g} N*m: ratio {r['ratio_used']:.2f} -> "
                f"{r['ratio_advised']:.2f}, {r['saving_kwh_week']:.3f} kWh/week "
                f"({r['saving_kwh_week_low']:.3f} .. {r['saving_kwh_week_high']:.3f}), "
                f"{r['windows']} windows, torque {r['torque_source']}")
    lines.extend(f"Note: {n}" for n in result.notes)
    lines.append("fleetwatch advises; qualified people decide. Isolate and lock out a drive "
                 "before any hands-on work.")
    return "\n".join(lines)
