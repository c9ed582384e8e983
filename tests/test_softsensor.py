"""Output-torque soft sensor (fleetwatch.softsensor): contract, physics shape, accuracy.

External checks are named beside the test (domain.md section 6). The accuracy test uses the
simulator's own physics (fleetwatch.simulate.true_operating_point) for three drives whose
motor constants, no-load current and variator efficiency differ, as they do in the fleet.
"""
from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest
from sklearn.base import clone
from sklearn.exceptions import NotFittedError

from fleetwatch import physics as ph
from fleetwatch.errors import ModelError
from fleetwatch.simulate import true_operating_point
from fleetwatch.softsensor import (TORQUE_ESTIMATES_COLUMNS, TorqueSoftSensor, estimate_torque,
                                   torque_inputs, validate_leave_one_unit_out)


def _eta_data(n=600, seed=0, eta0=0.93, c_ln2=0.04, c_ln=0.01, drag_in=0.05, drag_out=0.02,
              noise=0.01):
    """Rows (ratio, t_shaft) and output torque from the model the sensor assumes."""
    rng = np.random.default_rng(seed)
    r = np.exp(rng.uniform(np.log(0.4), np.log(3.5), n))
    t_sh = rng.uniform(0.2, 2.5, n)
    ln = np.log(r)
    y = r * t_sh * (eta0 - c_ln2 * ln * ln - c_ln * ln) - drag_in * r - drag_out
    return np.column_stack([r, t_sh]), y + noise * rng.standard_normal(n)


# ---------------------------------------------------------------- estimator contract
def test_contract_init_stores_params_fit_returns_self_and_learned_attrs():
    s = TorqueSoftSensor(loss="huber", f_scale_nm=0.05, asymmetric=False, eta_max=0.99)
    assert s.get_params() == {"loss": "huber", "f_scale_nm": 0.05, "asymmetric": False,
                              "eta_max": 0.99}
    assert not [k for k in vars(s) if k.endswith("_")]
    X, y = _eta_data()
    assert s.fit(X, y) is s
    learned = [k for k in vars(s) if k.endswith("_")]
    assert {"coef_", "sigma_abs_nm_", "sigma_rel_", "n_windows_"} <= set(learned)
    c = clone(s)
    assert c.get_params() == s.get_params() and not hasattr(c, "coef_")


def test_predict_before_fit_raises_not_fitted():
    with pytest.raises(NotFittedError) as exc:
        TorqueSoftSensor().predict(np.array([[1.0, 1.0]]))
    assert isinstance(exc.value, ModelError)


def test_fit_refuses_too_few_loaded_windows():
    X = np.array([[1.0, 0.01]] * 50)          # below MIN_T_SHAFT_NM: no load, nothing to learn
    with pytest.raises(ModelError, match="at least 10 loaded windows"):
        TorqueSoftSensor().fit(X, np.zeros(50))


# ---------------------------------------------------------------- physics shape
def test_recovers_known_efficiency_model():
    X, y = _eta_data(noise=0.005)
    c = TorqueSoftSensor().fit(X, y).coef_
    assert c["eta0"] == pytest.approx(0.93, abs=0.005)
    assert c["c_ln2"] == pytest.approx(0.04, abs=0.005)
    assert c["drag_in_nm"] == pytest.approx(0.05, abs=0.01)


def test_efficiency_falls_at_extreme_ratios_and_light_load():
    X, y = _eta_data()
    s = TorqueSoftSensor().fit(X, y)
    mid = s.eta_t(1.0, 2.0)
    assert s.eta_t(0.4, 2.0) < mid and s.eta_t(3.5, 2.0) < mid     # extreme ratios
    assert s.eta_t(1.0, 0.2) < s.eta_t(1.0, 1.0) < mid              # light load
    assert 0 < s.eta_t(1.0, 2.0) <= 1.0


def test_bounds_keep_the_shape_physical():
    # data whose efficiency *rises* towards the extremes: the bound c_ln2 >= 0 holds
    X, y = _eta_data(c_ln2=-0.03, drag_in=0.0, drag_out=0.0)
    c = TorqueSoftSensor().fit(X, y).coef_
    assert c["c_ln2"] >= 0.0 and c["drag_in_nm"] >= 0.0 and c["drag_out_nm"] >= 0.0
    assert c["eta0"] <= 1.0


def test_robust_to_gross_outliers():
    X, y = _eta_data(seed=3)
    y_bad = y.copy()
    y_bad[::20] *= 0.3                      # 5 % windows with a slipping / failed sensor
    clean = TorqueSoftSensor().fit(X, y).coef_["eta0"]
    dirty = TorqueSoftSensor().fit(X, y_bad).coef_["eta0"]
    plain = TorqueSoftSensor(loss="linear").fit(X, y_bad).coef_["eta0"]
    assert abs(dirty - clean) < 0.01
    assert abs(plain - clean) > abs(dirty - clean)     # the robust loss is what helps


def test_inverse_gives_back_the_shaft_torque():
    X, y = _eta_data()
    s = TorqueSoftSensor().fit(X, y)
    r, t_sh = np.array([0.5, 1.0, 2.7]), np.array([0.6, 1.3, 2.0])
    t_out = s.predict(np.column_stack([r, t_sh]))
    assert s.shaft_torque_for(r, t_out) == pytest.approx(t_sh, rel=1e-9)


def test_uncertainty_grows_with_torque_and_is_positive():
    X, y = _eta_data(noise=0.0)
    y = y * (1 + 0.02 * np.random.default_rng(1).standard_normal(y.size))   # 2 % relative
    s = TorqueSoftSensor().fit(X, y)
    _, std = s.predict(np.array([[1.0, 0.3], [1.0, 2.5]]), return_std=True)
    assert 0 < std[0] < std[1]
    assert s.sigma_rel_ == pytest.approx(0.02, abs=0.008)


# ---------------------------------------------------------------- frames
def _windows(units, n=30, measured=(), k_e=0.1, i0=0.2, current=2.0):
    t0 = dt.datetime(2026, 6, 1, 8, tzinfo=dt.timezone.utc)
    rows = []
    for u in units:
        for j in range(n):
            ws = t0 + dt.timedelta(minutes=10 * j)
            rows.append(dict(unit_id=u, window_start=ws, samples=10, steady_samples=10,
                             ratio_cmd_mean=1.0 + 0.05 * (j % 20), i_in_mean=current + 0.02 * j,
                             n_out_mean=800.0, load_source="measured" if u in measured
                             else "motor_model",
                             load_mean=(1.8 if u in measured else None)))
    w = pl.DataFrame(rows)
    mf = pl.DataFrame({"unit_id": list(units), "week_start": [dt.date(2026, 6, 1)] * len(units),
                       "k_e": [k_e] * len(units), "r_ohm": [1.5] * len(units)})
    return w, mf


def test_shaft_torque_matches_domain_example_8():
    # domain.md section 6 #8 (derived): k = 0.100268 V*s/rad, I = 2 A, I_0 = 0.2 A
    # -> T_shaft = k*(I - I_0) = 0.18048 N*m; at 2000 rpm P_shaft = 37.8 W.
    w, mf = _windows(["U1"], n=1, k_e=0.100268, current=2.0)
    inp = torque_inputs(w, mf, i0_a=0.2)
    assert inp["t_shaft_nm"][0] == pytest.approx(0.18048, abs=1e-5)
    p_shaft = ph.mech_power_w(inp["t_shaft_nm"][0], 2000.0)
    assert p_shaft == pytest.approx(37.8, abs=0.01)


def test_week_without_motor_fit_uses_the_units_median_constants():
    w, mf = _windows(["U1"], n=3, k_e=0.3)
    w = w.with_columns(pl.col("window_start") + dt.timedelta(days=14))   # a later week
    mf = pl.concat([mf, mf.with_columns(pl.lit(dt.date(2026, 6, 8)).alias("week_start"),
                                        pl.lit(0.5).alias("k_e"))])
    inp = torque_inputs(w, mf, i0_a=0.0)
    assert inp["k_e"].to_list() == pytest.approx([0.4] * 3)


def test_estimate_labels_measured_and_estimated_windows():
    w, mf = _windows(["M1", "M2", "E1"], measured=("M1", "M2"))
    te = estimate_torque(torque_inputs(w, mf, i0_a=0.2))
    assert te.measured_units == ["M1", "M2"] and te.estimated_units == ["E1"]
    t = te.table
    assert t.columns == [c[0] for c in TORQUE_ESTIMATES_COLUMNS]
    m = t.filter(pl.col("source") == "measured")
    e = t.filter(pl.col("source") == "estimated")
    assert m.height == 60 and e.height == 30
    assert (m["t_out_est"] == 1.8).all() and m["t_out_est_std"].is_null().all()
    assert e["t_out_est"].is_not_null().all() and (e["t_out_est_std"] > 0).all()


def test_no_instrumented_unit_gives_no_sensor_and_null_estimates():
    w, mf = _windows(["E1", "E2"])
    te = estimate_torque(torque_inputs(w, mf, i0_a=0.2))
    assert te.sensor is None and te.measured_units == []
    assert te.table["t_out_est"].is_null().all()
    assert te.validation.height == 0


# ---------------------------------------------------------------- accuracy, simulator physics
def _physics_windows(key, units, seed=0, i0_setting=0.2, per_unit=500):
    """Steady windows of healthy simulated drives at random duties and ratios, built from the
    simulator's physics, with logger noise and the motor fit of analyze."""
    rng = np.random.default_rng(seed)
    frames = []
    t0 = dt.datetime(2026, 6, 1, tzinfo=dt.timezone.utc)
    for u in units:
        r = np.round(rng.uniform(0.5, 3.0, per_unit), 1)
        n_in_set = rng.uniform(900.0, 1350.0, per_unit)
        t = np.clip(rng.lognormal(np.log(1.0), 0.35, per_unit), 0.35, 2.0) * r  # T_out = tau*i
        temp = rng.uniform(25.0, 55.0, per_unit)
        n = n_in_set / r
        op = true_operating_point(key, u, n, t, r, temp)
        ok = op["feasible"]
        i = op["i_in"][ok] + 0.01 * rng.standard_normal(ok.sum())
        v = op["v_in"][ok] + 0.02 * rng.standard_normal(ok.sum())
        n_in = op["n_in_rpm"][ok]
        r_ohm, k_e, _, _ = ph.fit_motor_constants(v, i, ph.omega_from_rpm(n_in))
        frames.append(pl.DataFrame({
            "unit_id": u, "window_start": [t0 + dt.timedelta(minutes=10 * j)
                                           for j in range(int(ok.sum()))],
            "samples": 10, "steady_samples": 10, "ratio_cmd_mean": r[ok], "i_in_mean": i,
            "n_out_mean": n[ok], "load_source": "measured",
            "load_mean": t[ok] + 0.005 * rng.standard_normal(ok.sum()),
            "t_true": t[ok], "k_e_fit": k_e, "r_fit": r_ohm}))
    w = pl.concat(frames)
    mf = (w.group_by("unit_id").agg(pl.col("k_e_fit").first().alias("k_e"),
                                    pl.col("r_fit").first().alias("r_ohm"))
          .with_columns(pl.lit(dt.date(2026, 6, 1)).alias("week_start")))
    return torque_inputs(w, mf, i0_a=i0_setting)


def test_holdout_error_below_10_percent_of_rated_torque_on_simulator_physics():
    """Issue target: error on held-out instrumented units < 10 % RMS of rated torque.

    Truth is the simulator's physics (fleetwatch.simulate.true_operating_point); the assumed
    no-load current (0.2 A) differs from the drives' true one (about 0.3 A) on purpose, as
    the motor_i0_a setting would in the field."""
    key = {"seed": 11, "units": {"L1-U01": {}, "L1-U02": {}, "L1-U03": {}}}
    inp = _physics_windows(key, list(key["units"]))
    val = validate_leave_one_unit_out(inp)
    assert set(val["unit_id"]) == {"L1-U01", "L1-U02", "L1-U03", "ALL"}
    every = val.filter(pl.col("unit_id") == "ALL").row(0, named=True)
    assert every["rms_pct_rated"] < 10.0
    assert every["rms_pct"] < 5.0                   # much better than the target in practice
    assert abs(every["bias_pct"]) < 3.0
    # the estimate also beats the ideal-transfer guess T_out = i*T_shaft by a wide margin
    ideal = (inp["ratio"] * inp["t_shaft_nm"] - inp["t_out_meas"]).to_numpy()
    assert every["rms_nm"] < 0.5 * float(np.sqrt(np.mean(ideal ** 2)))
