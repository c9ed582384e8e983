"""Output-torque soft sensor: learn the variator's torque efficiency where torque is logged,
estimate output torque everywhere else.

Few drives carry an output-torque sensor. On those the torque efficiency of the variator
(domain.md 1.2: ``eta_T = T_out / (T_in * i_kin)``) can be measured against the motor shaft
torque of the DC model (domain.md 1.4: ``T_shaft = k_e * (I - I_0)``, k_e from the unit's own
weekly fit in ``motor_fits``). ``TorqueSoftSensor`` fits one smooth, physically shaped model
of ``eta_T`` over ratio and load on the instrumented units, and every other unit's output
torque is then ``t_out_est = eta_T(i, T_shaft) * i * T_shaft``.

Model (linear in its five coefficients, fitted by robust least squares with bounds)::

    T_out = i*T_shaft * (eta0 - c_ln2*ln(i)**2 - c_ln*ln(i)) - drag_in_nm*i - drag_out_nm

- ``eta0``: torque efficiency at ratio 1 and high load (bounded to (0, 1]);
- ``c_ln2 >= 0``: efficiency falls towards both extreme ratios (contact radii far apart,
  more spin; domain.md 2.4-2.5); ``c_ln`` lets the fall be asymmetric (bounded);
- ``drag_in_nm >= 0`` and ``drag_out_nm >= 0``: load-independent drag torque referred to the
  input (bearings, seals, and any error of the assumed no-load current I_0, which shifts
  T_shaft by k_e*dI_0) and to the output. Divided by the ideal output torque i*T_shaft
  they are the light-load fall of the efficiency: ``eta_T = eta0 - c_ln2*ln^2 i - c_ln*ln i
  - drag_in_nm/T_shaft - drag_out_nm/(i*T_shaft)`` (the ``eta0 - c1*ln^2 i - c2/load``
  shape of the issue, with both load references kept).

The ratio is the commanded (kinematic) ratio; slip does not enter eta_T (domain.md 1.2
splits eta = (1 - s) * eta_T).

Uncertainty per window: ``t_out_est_std = sqrt(sigma_abs^2 + (sigma_rel * t_out_est)^2)``,
sized on leave-one-unit-out residuals when two or more instrumented units are fitted (so it
includes unit-to-unit spread of efficiency and motor constants, which is what an
uninstrumented unit suffers), else on the in-sample residuals.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping, Sequence

import numpy as np
import polars as pl
from scipy.optimize import least_squares, lsq_linear, nnls

from .errors import ModelError
from .schema import table as _schema_table
from .models._base import MAD_TO_SIGMA, FleetModel

__all__ = [
    "TorqueSoftSensor", "TORQUE_ESTIMATES_COLUMNS", "SOFTSENSOR_VALIDATION_COLUMNS",
    "torque_inputs", "estimate_torque", "validate_leave_one_unit_out", "TorqueEstimates",
    "MIN_T_SHAFT_NM",
]

#: Columns of the lake table ``torque_estimates`` (name, type, unit, help), for schema.py.
TORQUE_ESTIMATES_COLUMNS: tuple[tuple[str, str, str, str], ...] = tuple(
    (c.name, c.type, c.unit, c.help) for c in _schema_table("torque_estimates").columns)

#: Columns of the leave-one-unit-out validation (``TorqueEstimates.validation``).
SOFTSENSOR_VALIDATION_COLUMNS: tuple[tuple[str, str, str, str], ...] = (
    ("unit_id", "VARCHAR", "-", "Held-out instrumented unit, or 'ALL' for the pooled residuals."),
    ("windows", "BIGINT", "-", "Windows of the held-out unit."),
    ("t_out_mean_nm", "DOUBLE", "N*m", "Mean measured output torque."),
    ("rms_nm", "DOUBLE", "N*m", "RMS error of the estimate against the logged torque."),
    ("bias_nm", "DOUBLE", "N*m", "Mean error (estimate - logged)."),
    ("rms_pct", "DOUBLE", "%", "rms_nm as % of t_out_mean_nm."),
    ("bias_pct", "DOUBLE", "%", "bias_nm as % of t_out_mean_nm."),
    ("rms_pct_rated", "DOUBLE", "%", "rms_nm as % of the rated output torque (95th percentile "
     "of logged torque over all instrumented units)."),
)

#: Windows whose motor shaft torque is below this carry (almost) no load: their efficiency
#: is ill-conditioned (0/0), so they are left out of the fit (common practice, no source).
MIN_T_SHAFT_NM = 0.05

_PARAM_NAMES = ("eta0", "c_ln2", "c_ln", "drag_in_nm", "drag_out_nm")


def _features(X: Any) -> tuple[np.ndarray, np.ndarray]:
    """``(ratio, t_shaft_nm)`` from a 2-column array or a frame with those column names."""
    if isinstance(X, pl.DataFrame):
        cols = X.columns
        if "ratio" in cols and "t_shaft_nm" in cols:
            return (X["ratio"].cast(pl.Float64).to_numpy(),
                    X["t_shaft_nm"].cast(pl.Float64).to_numpy())
        X = X.to_numpy()
    elif hasattr(X, "columns") and hasattr(X, "to_numpy"):  # pandas
        if "ratio" in X.columns and "t_shaft_nm" in X.columns:
            return (np.asarray(X["ratio"], float), np.asarray(X["t_shaft_nm"], float))
        X = X.to_numpy()
    a = np.asarray(X, dtype=float)
    if a.ndim != 2 or a.shape[1] != 2:
        raise ModelError(f"TorqueSoftSensor needs two features (ratio, t_shaft_nm); got shape "
                         f"{a.shape}", hint="Pass an (n, 2) array or a frame with columns "
                         "ratio and t_shaft_nm.")
    return a[:, 0], a[:, 1]


def _design(ratio: np.ndarray, t_sh: np.ndarray) -> np.ndarray:
    """Columns multiplying (eta0, c_ln2, c_ln, drag_in_nm, drag_out_nm)."""
    ln = np.log(ratio)
    t_ideal = ratio * t_sh
    return np.column_stack([t_ideal, -t_ideal * ln * ln, -t_ideal * ln, -ratio,
                            -np.ones_like(ratio)])


class TorqueSoftSensor(FleetModel):
    """Torque efficiency eta_T(ratio, load) of the variator, learned where torque is logged.

    Parameters
    ----------
    loss : str
        Robust loss of ``scipy.optimize.least_squares`` ('soft_l1' default, 'huber',
        'linear' for plain least squares).
    f_scale_nm : float or None
        Residual size (N*m) where the robust loss starts to down-weight; None: 2 x the robust
        spread (1.4826*MAD) of a first plain fit.
    asymmetric : bool
        Keep the ``c_ln * ln(i)`` term (efficiency may fall unequally towards the two ends).
    eta_max : float
        Upper bound of eta0 (1.0: no gain).

    Learned attributes: ``coef_`` (dict of the five coefficients), ``sigma_abs_nm_`` and
    ``sigma_rel_`` (uncertainty model), ``sigma_source_`` ('leave_one_unit_out' or
    'in_sample'), ``n_windows_``, ``n_units_``, ``ratio_range_``, ``t_shaft_range_nm_``.

    ``fit(X, y, groups=None)``: X has columns (ratio, t_shaft_nm), y is the logged output
    torque in N*m, groups the unit of each row. Raises ModelError with too few usable rows.
    """

    def __init__(self, loss: str = "soft_l1", f_scale_nm: float | None = None,
                 asymmetric: bool = True, eta_max: float = 1.0):
        self.loss = loss
        self.f_scale_nm = f_scale_nm
        self.asymmetric = asymmetric
        self.eta_max = eta_max

    # ---------------------------------------------------------------- fitting
    def _bounds(self) -> tuple[np.ndarray, np.ndarray]:
        lo = np.array([0.05, 0.0, -0.5, 0.0, 0.0])
        hi = np.array([float(self.eta_max), 1.0, 0.5, np.inf, np.inf])
        if not self.asymmetric:
            lo[2], hi[2] = 0.0, 1e-12
        return lo, hi

    def _solve(self, ratio: np.ndarray, t_sh: np.ndarray, y: np.ndarray) -> np.ndarray:
        A = _design(ratio, t_sh)
        lo, hi = self._bounds()
        first = lsq_linear(A, y, bounds=(lo, hi), method="bvls")
        theta = first.x
        if self.loss == "linear":
            return theta
        resid = y - A @ theta
        scale = self.f_scale_nm
        if scale is None:
            mad = float(np.median(np.abs(resid - np.median(resid))))
            scale = max(2.0 * MAD_TO_SIGMA * mad, 1e-6)
        x0 = np.clip(theta, lo, np.where(np.isfinite(hi), hi, theta + 1.0))
        # keep x0 strictly inside for the trust-region reflective solver
        span = np.where(np.isfinite(hi), hi - lo, 1.0)
        x0 = np.clip(x0, lo + 1e-9 * span, np.where(np.isfinite(hi), hi - 1e-9 * span, np.inf))
        res = least_squares(lambda th: A @ th - y, x0, jac=lambda th: A, bounds=(lo, hi),
                            loss=self.loss, f_scale=float(scale), method="trf")
        return res.x

    @staticmethod
    def _usable(ratio, t_sh, y=None) -> np.ndarray:
        ok = np.isfinite(ratio) & np.isfinite(t_sh) & (ratio > 0) & (t_sh > MIN_T_SHAFT_NM)
        if y is not None:
            ok &= np.isfinite(y)
        return ok

    def fit(self, X: Any, y: Any, groups: Sequence[Any] | None = None) -> "TorqueSoftSensor":
        ratio, t_sh = _features(X)
        y = np.asarray(y, dtype=float).ravel()
        if y.shape[0] != ratio.shape[0]:
            raise ModelError(f"TorqueSoftSensor.fit: {ratio.shape[0]} rows of X but {y.shape[0]} "
                             "of y", hint="Pass one logged torque per row of X.")
        ok = self._usable(ratio, t_sh, y)
        if ok.sum() < 10:
            raise ModelError(
                f"TorqueSoftSensor needs at least 10 loaded windows with logged output torque, "
                f"got {int(ok.sum())}",
                hint="Instrument at least one unit with an output-torque sensor, or run "
                     "`fleetwatch analyze` so that windows and motor_fits exist.")
        r, t, yy = ratio[ok], t_sh[ok], y[ok]
        theta = self._solve(r, t, yy)
        self.coef_ = dict(zip(_PARAM_NAMES, (float(v) for v in theta)))
        self.n_windows_ = int(ok.sum())
        self.ratio_range_ = (float(r.min()), float(r.max()))
        self.t_shaft_range_nm_ = (float(t.min()), float(t.max()))
        g = None if groups is None else np.asarray(groups, dtype=object)[ok]
        self.n_units_ = 1 if g is None else int(len(set(g.tolist())))
        if g is not None and self.n_units_ >= 2:
            pred = np.full(yy.shape, np.nan)
            for u in sorted(set(g.tolist())):
                m = g == u
                if (~m).sum() < 10:
                    continue
                th_u = self._solve(r[~m], t[~m], yy[~m])
                pred[m] = _design(r[m], t[m]) @ th_u
            src = "leave_one_unit_out"
        else:
            pred = _design(r, t) @ theta
            src = "in_sample"
        good = np.isfinite(pred)
        self.sigma_abs_nm_, self.sigma_rel_ = _sigma_model(yy[good] - pred[good], pred[good])
        self.sigma_source_ = src
        return self

    # ---------------------------------------------------------------- use
    @property
    def theta_(self) -> np.ndarray:
        self._check_fitted()
        return np.array([self.coef_[k] for k in _PARAM_NAMES])

    def predict(self, X: Any, return_std: bool = False):
        """Output torque in N*m for rows (ratio, t_shaft_nm); with ``return_std`` also its
        standard deviation. NaN where a feature is missing or the ratio is not positive."""
        self._check_fitted()
        ratio, t_sh = _features(X)
        ok = np.isfinite(ratio) & np.isfinite(t_sh) & (ratio > 0)
        out = np.full(ratio.shape, np.nan)
        out[ok] = _design(ratio[ok], t_sh[ok]) @ self.theta_
        if not return_std:
            return out
        std = np.sqrt(self.sigma_abs_nm_ ** 2 + (self.sigma_rel_ * out) ** 2)
        return out, std

    def eta_t(self, ratio: Any, t_shaft_nm: Any) -> np.ndarray:
        """Torque efficiency eta_T = T_out / (i * T_shaft) (dimensionless)."""
        r = np.asarray(ratio, float)
        t = np.asarray(t_shaft_nm, float)
        r, t = np.broadcast_arrays(r, t)
        pred = self.predict(np.column_stack([r.ravel(), t.ravel()])).reshape(r.shape)
        with np.errstate(divide="ignore", invalid="ignore"):
            return pred / (r * t)

    def shaft_torque_for(self, ratio: Any, t_out_nm: Any) -> np.ndarray:
        """Inverse: the motor shaft torque (N*m) that gives ``t_out_nm`` at ``ratio``.

        Used by the advisor to predict motor current at another ratio for the same duty.
        NaN where the efficiency model is not positive.
        """
        self._check_fitted()
        c = self.coef_
        r = np.asarray(ratio, float)
        t = np.asarray(t_out_nm, float)
        ln = np.log(r)
        eff = c["eta0"] - c["c_ln2"] * ln * ln - c["c_ln"] * ln
        with np.errstate(divide="ignore", invalid="ignore"):
            ts = (t + c["drag_in_nm"] * r + c["drag_out_nm"]) / (r * eff)
        return np.where(eff > 0, ts, np.nan)


def _sigma_model(resid: np.ndarray, pred: np.ndarray) -> tuple[float, float]:
    """(sigma_abs, sigma_rel) with resid^2 ~ sigma_abs^2 + sigma_rel^2 * pred^2.

    Residuals beyond 5 robust sigmas are clipped first so one bad window cannot size the
    band; the two variances come from non-negative least squares.
    """
    if resid.size < 3:
        return float("nan"), float("nan")
    med = float(np.median(resid))
    s = MAD_TO_SIGMA * float(np.median(np.abs(resid - med)))
    if s > 0:
        resid = np.clip(resid, -5 * s - abs(med), 5 * s + abs(med))
    A = np.column_stack([np.ones_like(pred), pred * pred])
    sol, _ = nnls(A, resid * resid)
    return float(np.sqrt(sol[0])), float(np.sqrt(sol[1]))


# ---------------------------------------------------------------- frames
def _week_start(col: str) -> pl.Expr:
    return pl.col(col).dt.convert_time_zone("UTC").dt.date().dt.truncate("1w")


def torque_inputs(windows: pl.DataFrame, motor_fits: pl.DataFrame, i0_a: float,
                  steady_share_min: float = 0.8) -> pl.DataFrame:
    """Steady windows with the motor shaft torque the soft sensor needs.

    ``windows``: the lake table (unit_id, window_start, samples, steady_samples,
    ratio_cmd_mean, i_in_mean, load_mean, load_source, ...); ``motor_fits``: unit_id,
    week_start, k_e (and r_ohm; an ``i0_a`` column, if present, overrides ``i0_a``).
    Keeps windows with steady_samples >= steady_share_min * samples. Adds ``k_e``,
    ``r_ohm``, ``i0_a``, ``ratio`` (= ratio_cmd_mean), ``t_shaft_nm`` = k_e*(i_in_mean - i0)
    (domain.md 1.4) and ``t_out_meas`` (load_mean where load_source is 'measured').
    A week without a motor fit uses the unit's median constants over its other weeks.
    """
    need = ["unit_id", "window_start", "samples", "steady_samples", "ratio_cmd_mean",
            "i_in_mean", "load_mean", "load_source", "n_out_mean"]
    missing = [c for c in need if c not in windows.columns]
    if missing:
        raise ModelError(f"windows lacks column(s) {', '.join(missing)}",
                         hint="Run `fleetwatch analyze` to rebuild the windows table.")
    w = windows.filter(
        (pl.col("steady_samples") > 0)
        & (pl.col("steady_samples") >= steady_share_min * pl.col("samples"))
        & pl.col("ratio_cmd_mean").is_not_null() & pl.col("i_in_mean").is_not_null()
    ).with_columns(pl.col("unit_id").cast(pl.Utf8), _week_start("window_start").alias("_wk"))
    mf = motor_fits.with_columns(pl.col("unit_id").cast(pl.Utf8),
                                 pl.col("week_start").cast(pl.Date).alias("_wk"))
    keep = ["unit_id", "_wk", "k_e"] + [c for c in ("r_ohm", "i0_a") if c in mf.columns]
    mf = mf.select(keep).filter(pl.col("k_e").is_not_null() & pl.col("k_e").is_finite()
                                & (pl.col("k_e") > 0))
    med = mf.group_by("unit_id").agg([pl.col(c).median().alias(f"{c}__u")
                                      for c in keep[2:]])
    w = w.join(mf, on=["unit_id", "_wk"], how="left").join(med, on="unit_id", how="left")
    fills = [pl.coalesce(pl.col(c), pl.col(f"{c}__u")).alias(c) for c in keep[2:]]
    w = w.with_columns(fills).drop([f"{c}__u" for c in keep[2:]] + ["_wk"])
    if "i0_a" not in w.columns:
        w = w.with_columns(pl.lit(float(i0_a)).alias("i0_a"))
    else:
        w = w.with_columns(pl.col("i0_a").fill_null(float(i0_a)))
    if "r_ohm" not in w.columns:
        w = w.with_columns(pl.lit(None, dtype=pl.Float64).alias("r_ohm"))
    return w.with_columns(
        pl.col("ratio_cmd_mean").alias("ratio"),
        (pl.col("k_e") * (pl.col("i_in_mean") - pl.col("i0_a"))).alias("t_shaft_nm"),
        pl.when(pl.col("load_source") == "measured").then(pl.col("load_mean"))
        .otherwise(None).alias("t_out_meas"),
    ).sort("unit_id", "window_start")


@dataclass
class TorqueEstimates:
    """Result of :func:`estimate_torque`.

    ``table``: the ``torque_estimates`` rows (TORQUE_ESTIMATES_COLUMNS); ``frame``: the
    input windows with ``t_out``, ``t_out_std`` and ``torque_source`` added (what the
    advisor uses); ``sensor``: the fitted TorqueSoftSensor or None when no unit measures
    torque; ``validation``: leave-one-unit-out errors (SOFTSENSOR_VALIDATION_COLUMNS);
    ``measured_units`` / ``estimated_units``: which units have which torque.
    """

    table: pl.DataFrame
    frame: pl.DataFrame
    sensor: TorqueSoftSensor | None
    validation: pl.DataFrame
    measured_units: list[str]
    estimated_units: list[str]


def _xy(frame: pl.DataFrame) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return (frame.select("ratio", "t_shaft_nm").to_numpy().astype(float),
            frame["t_out_meas"].cast(pl.Float64).to_numpy(),
            frame["unit_id"].to_numpy())


def validate_leave_one_unit_out(inputs: pl.DataFrame,
                                sensor_params: Mapping[str, Any] | None = None) -> pl.DataFrame:
    """Hold out each instrumented unit, fit on the others, compare with its logged torque.

    ``inputs``: output of :func:`torque_inputs`. Returns one row per held-out unit and an
    'ALL' row over every held-out window (SOFTSENSOR_VALIDATION_COLUMNS). Empty when fewer
    than two units log torque (nothing to hold out against).
    """
    schema = {n: {"VARCHAR": pl.Utf8, "BIGINT": pl.Int64, "DOUBLE": pl.Float64}[t]
              for n, t, _, _ in SOFTSENSOR_VALIDATION_COLUMNS}
    meas = inputs.filter(pl.col("t_out_meas").is_not_null()
                         & (pl.col("t_shaft_nm") > MIN_T_SHAFT_NM))
    units = sorted(meas["unit_id"].unique().to_list())
    if len(units) < 2:
        return pl.DataFrame(schema=schema)
    rated = float(np.quantile(meas["t_out_meas"].to_numpy(), 0.95))
    rows, all_err, all_y = [], [], []
    for u in units:
        train, test = meas.filter(pl.col("unit_id") != u), meas.filter(pl.col("unit_id") == u)
        X, y, g = _xy(train)
        try:
            s = TorqueSoftSensor(**dict(sensor_params or {})).fit(X, y)
        except ModelError:
            continue
        Xt, yt, _ = _xy(test)
        err = s.predict(Xt) - yt
        ok = np.isfinite(err)
        err, yt = err[ok], yt[ok]
        if err.size == 0:
            continue
        all_err.append(err)
        all_y.append(yt)
        rows.append(_val_row(u, err, yt, rated))
    if all_err:
        rows.append(_val_row("ALL", np.concatenate(all_err), np.concatenate(all_y), rated))
    return pl.DataFrame(rows, schema=schema, orient="row")


def _val_row(u: str, err: np.ndarray, y: np.ndarray, rated: float) -> tuple:
    mean_t = float(np.mean(np.abs(y)))
    rms = float(np.sqrt(np.mean(err * err)))
    bias = float(np.mean(err))
    return (u, int(err.size), mean_t, rms, bias, 100 * rms / mean_t, 100 * bias / mean_t,
            100 * rms / rated)


def estimate_torque(inputs: pl.DataFrame, sensor_params: Mapping[str, Any] | None = None,
                    validate: bool = True) -> TorqueEstimates:
    """Fit the soft sensor on the measuring units and give every window an output torque.

    ``inputs``: output of :func:`torque_inputs`. A window with logged torque keeps it
    (source 'measured', null std); any other window gets ``eta_T*i*T_shaft`` (source
    'estimated') with its standard deviation. Without any unit measuring torque nothing can
    be estimated: the estimated windows get null torque and ``sensor`` is None.
    """
    meas = inputs.filter(pl.col("t_out_meas").is_not_null())
    sensor: TorqueSoftSensor | None = None
    if meas.height:
        X, y, g = _xy(meas)
        try:
            sensor = TorqueSoftSensor(**dict(sensor_params or {})).fit(X, y, groups=g)
        except ModelError:
            sensor = None
    if sensor is not None:
        est, std = sensor.predict(inputs.select("ratio", "t_shaft_nm").to_numpy(),
                                  return_std=True)
    else:
        est = std = np.full(inputs.height, np.nan)
    frame = inputs.with_columns(
        pl.Series("_est", est, dtype=pl.Float64).fill_nan(None),
        pl.Series("_std", std, dtype=pl.Float64).fill_nan(None),
    ).with_columns(
        pl.when(pl.col("t_out_meas").is_not_null()).then(pl.lit("measured"))
        .otherwise(pl.lit("estimated")).alias("torque_source"),
        pl.coalesce(pl.col("t_out_meas"), pl.col("_est")).alias("t_out"),
        pl.when(pl.col("t_out_meas").is_not_null()).then(None)
        .otherwise(pl.col("_std")).alias("t_out_std"),
    ).drop("_est", "_std")
    table = frame.select(
        "unit_id", "window_start", pl.col("t_out").alias("t_out_est"),
        pl.col("t_out_std").alias("t_out_est_std"), pl.col("torque_source").alias("source"))
    per_unit = frame.group_by("unit_id").agg(
        (pl.col("torque_source") == "measured").mean().alias("share"))
    measured = sorted(per_unit.filter(pl.col("share") >= 0.5)["unit_id"].to_list())
    estimated = sorted(per_unit.filter(pl.col("share") < 0.5)["unit_id"].to_list())
    validation = (validate_leave_one_unit_out(inputs, sensor_params) if validate
                  else validate_leave_one_unit_out(inputs.head(0), sensor_params))
    return TorqueEstimates(table, frame, sensor, validation, measured, estimated)
