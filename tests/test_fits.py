"""fleetwatch.fits: grouped Theil-Sen, motor constants from sufficient statistics, segments,
creep normalisation and the input-power model (with its SQL twin, efficiency.sql)."""
from __future__ import annotations

import datetime as dt
import warnings

import duckdb
import numpy as np
import polars as pl
import pytest
import scipy.stats as st
from hypothesis import given, settings as hsettings, strategies as hst

from fleetwatch import fits, physics
from fleetwatch.config import load_settings
from fleetwatch.sqlmodels import model, run_model

UTC = dt.timezone.utc
T0 = dt.datetime(2026, 6, 1, tzinfo=UTC)


# ---------------------------------------------------------------- Theil-Sen
def _one(x, y, **kw):
    r = fits.theil_sen_grouped(np.zeros(len(x), dtype=int), x, y, **kw)
    return r.row(0, named=True)


def test_theil_sen_check_values_from_domain_md():
    # domain.md section 6 #11 (scipy.stats.theilslopes / linregress): x 1..5, y [1,2,3,4,50]
    r = _one([1, 2, 3, 4, 5], [1, 2, 3, 4, 50])
    assert (r["slope"], r["intercept"]) == pytest.approx((1.0, 0.0))
    assert (r["low_slope"], r["high_slope"]) == pytest.approx((1.0, 46.0))
    # #12: x 0..9, y = 2x + 1 with y[9] = 100 -> slope 2, intercept 1
    x = np.arange(10.0)
    y = 2 * x + 1
    y[9] = 100
    r = _one(x, y)
    assert (r["slope"], r["intercept"]) == pytest.approx((2.0, 1.0))
    # #13: weeks 0..11, slip = 1.0 + 0.1*week -> slope 0.1, intercept 1.0, crossing of 3.0
    # after 20.0 weeks; #14: y[5] = 2.5 -> 'separate' intercept 1.1 -> 19.0 weeks
    w = np.arange(12.0)
    r = _one(w, 1.0 + 0.1 * w)
    assert (r["slope"], r["intercept"]) == pytest.approx((0.1, 1.0))
    assert (3.0 - r["intercept"]) / r["slope"] == pytest.approx(20.0)
    y = 1.0 + 0.1 * w
    y[5] = 2.5
    r = _one(w, y)
    assert r["intercept"] == pytest.approx(1.1)
    assert (3.0 - r["intercept"]) / r["slope"] == pytest.approx(19.0)


@hsettings(max_examples=25, deadline=None)
@given(sizes=hst.lists(hst.integers(2, 40), min_size=1, max_size=12),
       seed=hst.integers(0, 2**32 - 1), ties=hst.booleans())
def test_theil_sen_grouped_equals_scipy_per_group(sizes, seed, ties):
    rng = np.random.default_rng(seed)
    g = np.repeat(np.arange(len(sizes)), sizes)
    x = rng.normal(size=g.size)
    y = 0.5 * x + rng.standard_t(2, size=g.size)
    if ties:
        x = np.round(x, 0)
        y = np.round(y, 0)
    perm = rng.permutation(g.size)               # input order must not matter across groups
    res = fits.theil_sen_grouped(g[perm], x[perm], y[perm], max_points=None)
    for row in res.iter_rows(named=True):
        m = g[perm] == row["group"]
        xs, ys = x[perm][m], y[perm][m]
        if np.unique(xs).size < 2:
            assert np.isnan(row["slope"])
            continue
        with warnings.catch_warnings():        # scipy's sqrt of a negative tie variance
            warnings.simplefilter("ignore", RuntimeWarning)
            ref = st.theilslopes(ys, xs, alpha=0.95)
        assert row["n"] == m.sum()
        np.testing.assert_allclose(
            [row["slope"], row["intercept"], row["low_slope"], row["high_slope"]],
            [ref.slope, ref.intercept, ref.low_slope, ref.high_slope], rtol=1e-12, atol=1e-12)


def test_theil_sen_thins_large_groups_deterministically():
    rng = np.random.default_rng(3)
    x = np.arange(5000.0)
    y = 3.0 + 0.25 * x + rng.normal(0, 1, 5000)
    y[::10] += 1000.0                           # 10 % outliers, every tenth point
    g = np.zeros(5000, dtype=int)
    r = fits.theil_sen_grouped(g, x, y, max_points=200).row(0, named=True)
    assert r["n"] == 200
    assert r["slope"] == pytest.approx(0.25, rel=2e-3)
    assert fits.theil_sen_grouped(g, x, y, max_points=200).row(0, named=True) == r


def test_theil_sen_drops_nan_and_reports_identical_x_as_nan():
    r = fits.theil_sen_grouped([0, 0, 0, 1, 1, 1], [1, 1, 1, 1, 2, np.nan],
                               [1, 2, 3, 1, 2, 3])
    a, b = r.sort("group").iter_rows(named=True)
    assert np.isnan(a["slope"]) and a["n"] == 3
    assert b["n"] == 2 and b["slope"] == pytest.approx(1.0)


# ---------------------------------------------------------------- motor constants
def _sums(v, i, w, **extra):
    return pl.DataFrame({"n": [len(v)], "s_ii": [(i * i).sum()], "s_iw": [(i * w).sum()],
                         "s_ww": [(w * w).sum()], "s_vi": [(v * i).sum()],
                         "s_vw": [(v * w).sum()], "s_vv": [(v * v).sum()], **extra})


@hsettings(max_examples=30, deadline=None)
@given(seed=hst.integers(0, 2**32 - 1), n=hst.integers(3, 400),
       r=hst.floats(0.1, 5.0), k=hst.floats(0.01, 2.0), noise=hst.floats(0.0, 0.5))
def test_motor_sums_fit_equals_physics_fit(seed, n, r, k, noise):
    rng = np.random.default_rng(seed)
    i = rng.uniform(0.2, 10.0, n)
    w = rng.uniform(20.0, 300.0, n)
    v = physics.motor_voltage_v(i, w, r, k) + rng.normal(0, noise, n)
    want = physics.fit_motor_constants(v, i, w)
    got = fits.solve_motor_sums(_sums(v, i, w)).row(0, named=True)
    np.testing.assert_allclose([got["r_ohm"], got["k_e"]], want[:2], rtol=1e-7, atol=1e-9)
    # SSR from the sums cancels to about sqrt(eps * sum(v^2)): microvolts, physically nothing
    assert got["resid_std_v"] == pytest.approx(want[2], rel=1e-4,
                                               abs=1e-7 * np.sqrt((v * v).sum()))


def test_motor_sums_fit_refuses_one_operating_point_and_too_few_rows():
    i = np.full(50, 2.0)
    w = np.full(50, 150.0)
    v = physics.motor_voltage_v(i, w, 1.0, 0.2)
    got = fits.solve_motor_sums(_sums(v, i, w)).row(0, named=True)
    assert got["r_ohm"] is None and got["k_e"] is None
    assert physics.fit_motor_constants(v, i, w)[0] != physics.fit_motor_constants(v, i, w)[0]
    got = fits.solve_motor_sums(_sums(v[:2], np.array([1.0, 2.0]), w[:2])).row(0, named=True)
    assert got["r_ohm"] is None


def test_motor_drift_against_the_reference_weeks():
    weeks = [dt.date(2026, 6, 1) + dt.timedelta(days=7 * k) for k in range(6)]
    r = [1.0, 1.02, 0.98, 1.0, 1.10, 1.20]
    f = pl.DataFrame({"unit_id": "U1", "week_start": weeks, "n": [500, 500, 500, 500, 500, 10],
                      "r_ohm": r, "k_e": [0.3] * 5 + [0.27], "resid_std_v": 0.05})
    first = pl.DataFrame({"unit_id": ["U1"], "first_ts": [T0 + dt.timedelta(days=2)]}).with_columns(
        pl.col("first_ts").dt.cast_time_unit("us"))
    out = fits.motor_fits_with_drift(f, first, reference_days=14)
    # reference weeks overlap [Jun 3, Jun 17): Jun 1, 8 and 15 -> median R 1.0
    assert out["r_drift_pct"].to_list()[:5] == pytest.approx([0.0, 2.0, -2.0, 0.0, 10.0])
    assert out["r_drift_pct"][5] is None          # too few samples: no drift claimed
    assert out.columns == ["unit_id", "week_start", "r_ohm", "k_e", "resid_std_v", "n",
                           "r_drift_pct", "k_e_drift_pct"]


def test_motor_constants_for_load_come_from_an_earlier_week():
    """A week's load uses the latest usable fit of an EARLIER week (from the lake or from
    the same batch), so it does not move when more data of the week arrives; a unit's first
    weeks use their own fit when usable, else none."""
    W = [dt.date(2026, 6, 1) + dt.timedelta(days=7 * k) for k in range(4)]
    f = pl.DataFrame({"unit_id": ["U1"] * 4 + ["U2", "U2", "U3"],
                      "week_start": W + [W[2], W[3], W[0]],
                      "n": [500, 600, 5, 700, 5, 400, 900],
                      "r_ohm": [1.0, 1.1, None, 1.3, None, 2.2, 3.0],
                      "k_e": [0.30, 0.31, None, 0.33, None, 0.52, 0.7]})
    old = pl.DataFrame({"unit_id": ["U2", "U2", "U9"], "week_start": [W[0], W[1], W[0]],
                        "n": [800, 10, 800], "r_ohm": [2.0, 9.0, 5.0],
                        "k_e": [0.5, 0.9, 0.8]})
    mc = fits.motor_constants_for_load(f, old, i0_a=0.2).sort("unit_id", "week_start")
    assert mc["unit_id"].to_list() == ["U1"] * 4 + ["U2", "U2", "U3"]     # only f's weeks
    # U1: own fit in its first week, then the previous week's; the week without a usable
    # fit passes the last usable one on
    # U2: the lake's usable week 1 (week 2 has too few samples), for both of its weeks
    # U3: no earlier fit, its own
    assert mc["k_e"].to_list() == [0.30, 0.30, 0.31, 0.31, 0.5, 0.5, 0.7]
    assert mc["r_ohm"].to_list() == [1.0, 1.0, 1.1, 1.1, 2.0, 2.0, 3.0]
    assert mc["i0_a"].to_list() == [0.2] * 7
    # a unit whose only fit is unusable gets no constants
    lone = pl.DataFrame({"unit_id": ["U4"], "week_start": [W[0]], "n": [3],
                         "r_ohm": [None], "k_e": [None]}, schema=f.schema)
    assert fits.motor_constants_for_load(lone, None, 0.2)["k_e"].to_list() == [None]
    assert fits.first_usable_week(f) == {"U1": W[0], "U2": W[3], "U3": W[0]}


def test_weekly_motor_sums_add_the_days_in_a_fixed_order():
    rng = np.random.default_rng(3)
    days = [dt.date(2026, 6, 1) + dt.timedelta(days=i) for i in range(9)]
    d = pl.DataFrame({"unit_id": ["U1"] * 9, "day": days,
                      **{c: rng.normal(size=9) * 1e3 for c in
                         ("s_ii", "s_iw", "s_ww", "s_vi", "s_vw", "s_vv")},
                      "n": rng.integers(1, 100, 9), "n_temp": rng.integers(0, 5, 9)}
                     ).with_columns(week_start=pl.col("day").dt.truncate("1w"))
    w = fits.motor_week_sums(d)
    assert w["week_start"].to_list() == [dt.date(2026, 6, 1), dt.date(2026, 6, 8)]
    assert w["n"].to_list() == [int(d["n"][:7].sum()), int(d["n"][7:].sum())]
    # shuffled day rows give the same sums bit for bit (a split week adds up the same)
    w2 = fits.motor_week_sums(d.sample(fraction=1.0, shuffle=True, seed=1))
    assert w2.equals(w)
    assert w["s_vv"][0] == sum(d["s_vv"].to_list()[:7])


# ---------------------------------------------------------------- segments and creep
def _first(units=("U1",)):
    return pl.DataFrame({"unit_id": list(units), "first_ts": [T0] * len(units)}).with_columns(
        pl.col("first_ts").dt.cast_time_unit("us"))


def test_segments_restart_the_reference_after_a_wear_reset():
    maint = pl.DataFrame({"unit_id": ["U1", "U1", "U1"],
                          "ts": [T0 - dt.timedelta(days=3), T0 + dt.timedelta(days=20),
                                 T0 + dt.timedelta(days=30)],
                          "resets_wear": [True, True, False]}).with_columns(
        pl.col("ts").dt.cast_time_unit("us"))
    seg = fits.unit_segments(_first(), maint, reference_days=14)
    assert seg.height == 2                         # the reset before the data is ignored
    assert seg["ref_start"].to_list() == [T0, T0 + dt.timedelta(days=20)]
    assert seg["seg_end"][0] == T0 + dt.timedelta(days=20)
    probe = pl.DataFrame({"unit_id": ["U1"] * 4,
                          "t": [T0 + dt.timedelta(days=d) for d in (1, 15, 21, 40)]})
    got = fits.assign_segments(probe, seg, "t").sort("t")
    assert got["in_reference"].to_list() == [True, False, True, False]


def _windows(days, bins, rng, b_scale=lambda day: 1.0, a_shift=lambda day: 0.0):
    """Steady windows of one unit: per ratio bin its own spin offset and compliance."""
    rows = []
    for d in range(days):
        for k in range(60):
            ratio, a_bin, b_bin = bins[k % len(bins)]
            load = rng.uniform(0.3, 2.0)
            slip = a_bin + a_shift(d) + b_bin * b_scale(d) * load + rng.normal(0, 2e-4)
            rows.append((T0 + dt.timedelta(days=d, minutes=10 * k), ratio, load, slip))
    df = pl.DataFrame(rows, schema=["window_start", "ratio_cmd_mean", "load_mean", "slip_mean"],
                      orient="row")
    return df.with_columns(unit_id=pl.lit("U1"), day=pl.col("window_start").dt.date(),
                           steady_samples=pl.lit(10), load_source=pl.lit("motor_model"),
                           window_start=pl.col("window_start").dt.cast_time_unit("us"))


def test_daily_creep_removes_ratio_bin_offsets_and_tracks_compliance():
    cfg = load_settings("/nonexistent-fleetwatch-project", env={})
    rng = np.random.default_rng(4)
    # three ratio bins with different spin offsets and compliances, used 1:1:1; from day 20
    # the compliance doubles in every bin (preload loss), from day 30 the offset shifts
    bins = [(0.8, 0.000, 0.010), (1.6, 0.006, 0.020), (2.6, 0.012, 0.030)]
    w = _windows(40, bins, rng, b_scale=lambda d: 2.0 if d >= 20 else 1.0,
                 a_shift=lambda d: 0.01 if d >= 30 else 0.0)
    cw = fits.creep_windows(w, cfg)
    seg = fits.unit_segments(_first(), None, reference_days=14)
    ref = fits.creep_reference_bins(cw, seg)
    assert sorted(ref["ratio_bin"]) == [0.5, 1.5, 2.5]
    assert ref["offset"].to_list() == pytest.approx(
        [a - 0.006 for _, a, _ in sorted(bins)], abs=2e-4)
    daily = fits.creep_daily(cw, seg, ref, load_ref_nm=1.0).sort("day")
    b = daily["creep_b"].to_numpy()
    a = daily["creep_a"].to_numpy()
    sal = daily["slip_at_load"].to_numpy()
    # usage-weighted reference: a = 0.006, b = 0.020 -> slip at 1 N*m = 0.026
    assert np.median(b[:20]) == pytest.approx(0.020, rel=0.03)
    assert np.median(a[:20]) == pytest.approx(0.006, abs=5e-4)
    assert np.median(sal[:20]) == pytest.approx(0.026, abs=5e-4)
    assert np.median(b[20:30]) == pytest.approx(0.040, rel=0.03)
    assert np.median(a[30:]) - np.median(a[20:30]) == pytest.approx(0.010, abs=1e-3)
    # day-to-day noise is small although each day mixes three bins with different spin
    assert np.std(b[:20]) < 0.05 * np.median(b[:20])
    weekly = fits.creep_fits_weekly(cw, seg)
    assert weekly.filter(pl.col("is_reference"))["week_start"].unique().sort().to_list() == \
        [dt.date(2026, 6, 1), dt.date(2026, 6, 8)]
    wk = weekly.filter(pl.col("ratio_bin") == 1.5).sort("week_start")
    assert wk["b"][0] == pytest.approx(0.020, rel=0.03)
    assert wk["b"][-1] == pytest.approx(0.040, rel=0.03)
    assert (wk["b_low"] <= wk["b"]).all() and (wk["b"] <= wk["b_high"]).all()


def test_creep_windows_use_input_side_load_and_skip_gross_slip():
    cfg = load_settings("/nonexistent-fleetwatch-project", env={})
    w = pl.DataFrame({"unit_id": "U1", "window_start": [T0, T0, T0], "day": T0.date(),
                      "steady_samples": [5, 5, 1], "slip_mean": [0.02, 0.3, 0.02],
                      "load_mean": [5.0, 5.0, 5.0], "load_source": "measured",
                      "ratio_cmd_mean": [2.5, 2.5, 2.5]})
    cw = fits.creep_windows(w, cfg)
    assert cw.height == 1                          # gross slip and 1-sample windows dropped
    # T_in = T_out / i (ideal torque transfer, domain.md 1.2)
    assert cw["load_in"][0] == pytest.approx(2.0)
    assert cw["ratio_bin"][0] == 2.5


def test_drop_flatlined_removes_only_overlapping_windows():
    cw = pl.DataFrame({"unit_id": ["U1"] * 4 + ["U2"],
                       "window_start": [T0 + dt.timedelta(minutes=10 * k) for k in range(4)]
                       + [T0], "x": range(5)})
    flat = pl.DataFrame({"unit_id": ["U1", "U1"], "signal": ["n_out", "temp"],
                         "start_ts": [T0 + dt.timedelta(minutes=15), T0],
                         "end_ts": [T0 + dt.timedelta(minutes=21), T0 + dt.timedelta(hours=9)]})
    out = fits.drop_flatlined(cw, flat, window_min=10)
    assert out["x"].to_list() == [0, 3, 4]         # windows 10-20 and 20-30 overlap n_out


# ---------------------------------------------------------------- power model and its SQL
def test_power_model_recovers_its_coefficients_and_matches_efficiency_sql():
    rng = np.random.default_rng(7)
    n = 400
    w = pl.DataFrame({
        "unit_id": "U1",
        "window_start": [T0 + dt.timedelta(minutes=10 * k) for k in range(n)],
        "steady_samples": 5,
        "load_mean": rng.uniform(0.3, 2.0, n),
        "load_source": "motor_model",
        "ratio_cmd_mean": rng.choice([0.8, 1.5, 2.5], n),
        "n_out_mean": rng.uniform(400, 1500, n),
    }).with_columns(pl.col("window_start").dt.cast_time_unit("us"))
    wk = w["n_out_mean"] * w["ratio_cmd_mean"] * np.pi / 30
    L = w["load_mean"]
    true = (5.0, 1.15, 2.0, 0.02, 0.5)
    p = true[0] + true[1] * L * wk + true[2] * L * L + true[3] * wk + true[4] * L
    w = w.with_columns(p_in_mean=p + rng.normal(0, 0.01, n), day=pl.col("window_start").dt.date())
    seg = fits.unit_segments(_first(), None, reference_days=14)
    pm = fits.power_models(w, seg)
    assert pm.height == 1
    assert [pm[c][0] for c in ("c0", "c1", "c2", "c3", "c4")] == pytest.approx(true, rel=0.02)
    pred = fits.predict_power(w, pm)
    # the SQL model applies the same coefficients to the windows table
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.register("windows", w.to_arrow())
    con.register("power_models", pm.to_arrow())
    con.execute("CREATE TABLE window_power (unit_id VARCHAR, window_start TIMESTAMPTZ, "
                "n_measured BIGINT, p_out_mean_w DOUBLE, p_in_meas_mean_w DOUBLE, "
                "p_shaft_mean_w DOUBLE)")
    cfg = load_settings("/nonexistent-fleetwatch-project", env={})
    run_model(con, model("efficiency"), cfg, {})
    sql = pl.from_arrow(con.sql("SELECT p_in_pred, power_resid_pct, method FROM efficiency "
                                "ORDER BY window_start").to_arrow_table())
    np.testing.assert_allclose(sql["p_in_pred"], pred, rtol=1e-10)
    assert set(sql["method"]) == {"residual_only"}
    assert abs(sql["power_resid_pct"].mean()) < 0.01
