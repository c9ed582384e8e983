"""Theil-Sen trends and time to limit (fleetwatch.models.trend).

Check values: domain.md section 6 #11-#14, recomputed there with scipy 1.17.1; every slope
and interval is also compared with ``scipy.stats.theilslopes`` itself (SciPy docs: returns
slope, intercept, low_slope, high_slope; 'joint' intercept = median(y - slope*x)).
"""
from __future__ import annotations

import datetime as dt
import time

import numpy as np
import polars as pl
import pytest
from scipy.stats import theilslopes

from fleetwatch.models import WearTrend, theil_sen_asof
from fleetwatch.models.trend import TREND_COLUMNS

D0 = dt.date(2026, 6, 1)


def _frame(series: dict[str, list[float | None]], indicator: str = "slip_at_load",
           start: dt.date = D0, extra: dict | None = None) -> pl.DataFrame:
    rows = []
    for uid, ys in series.items():
        for k, y in enumerate(ys):
            r = {"unit_id": uid, "day": start + dt.timedelta(days=k), indicator: y}
            for col, val in (extra or {}).items():
                r[col] = val
            rows.append(r)
    return pl.DataFrame(rows, schema_overrides={indicator: pl.Float64})


def _fit_full(x, y, confidence=0.95):
    r = theil_sen_asof(x, y, [x[-1]], window=1e9, confidence=confidence)
    return r["slope"][0], r["intercept"][0], r["low"][0], r["high"][0]


# ------------------------------------------------------------------ check values (scipy)
def test_check_value_11_outlier():
    """domain.md 6 #11: x 1..5, y [1,2,3,4,50] -> slope 1, intercept 0, 95 % CI [1, 46]
    (scipy.stats.theilslopes)."""
    x, y = np.arange(1.0, 6.0), np.array([1, 2, 3, 4, 50.0])
    got = _fit_full(x, y, 0.95)
    assert got == pytest.approx((1.0, 0.0, 1.0, 46.0), abs=1e-12)
    assert got == pytest.approx(tuple(theilslopes(y, x, 0.95, method="joint")), abs=1e-12)


def test_check_value_12_outlier_at_end():
    """domain.md 6 #12: x 0..9, y = 2x + 1 with y[9] = 100 -> slope 2, intercept 1 (scipy)."""
    x = np.arange(10.0)
    y = 2 * x + 1
    y[9] = 100
    slope, icpt, _, _ = _fit_full(x, y)
    assert (slope, icpt) == pytest.approx((2.0, 1.0), abs=1e-12)


def test_check_values_13_14_time_to_threshold():
    """domain.md 6 #13/#14 (scipy): slip = 1.0 + 0.1*week, threshold 3.0 -> crossing at
    week 20; with y[5] = 2.5 the 'joint' intercept stays 1.0 (crossing 20.0) while
    'separate' gives 1.1 (19.0). The model uses 'joint', so the forecast stays 20."""
    w = np.arange(12.0)
    y = 1.0 + 0.1 * w
    for bump in (False, True):
        yy = y.copy()
        if bump:
            yy[5] = 2.5
        slope, icpt, _, _ = _fit_full(w, yy)
        assert slope == pytest.approx(0.1, abs=1e-12)
        assert icpt == pytest.approx(1.0, abs=1e-12)
        assert (3.0 - icpt) / slope == pytest.approx(20.0, abs=1e-9)
    sep = theilslopes(yy, w, method="separate")
    assert sep.intercept == pytest.approx(1.1) and (3.0 - sep.intercept) / sep.slope == \
        pytest.approx(19.0)
    # Same case through WearTrend, in days and slip fractions: as of day 11 the level is
    # 0.021 and the 0.03 limit is 9 days away (crossing on day 20).
    ys = list(0.01 + 0.001 * w)
    ys[5] = 0.025
    tr = WearTrend(indicators=("slip_at_load",), slip_limit=0.03, min_days=7,
                   window_days=60).fit(_frame({"u": ys})).predict(_frame({"u": ys}))
    last = tr.filter(pl.col("as_of") == D0 + dt.timedelta(days=11)).row(0, named=True)
    assert last["slope_per_day"] == pytest.approx(0.001, abs=1e-12)
    assert last["level_now"] == pytest.approx(0.021, abs=1e-12)
    assert last["days_to_limit"] == pytest.approx(9.0, abs=1e-9)
    assert last["n_days"] == 12 and last["since"] == D0


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("window", [10, 42, 1000])
def test_moving_windows_match_scipy(seed, window):
    """Every as-of fit equals scipy.stats.theilslopes(method='joint', alpha=0.9) on the
    same window, including ties in y (rounded values) and missing days."""
    rng = np.random.default_rng(seed)
    x = np.sort(rng.choice(150, 110, replace=False)).astype(float)
    y = 0.02 * x + rng.normal(0, 0.5, x.size)
    if seed == 0:
        y = np.round(y, 1)          # many ties: exercises Sen's tie correction
    t = np.arange(150.0)
    res = theil_sen_asof(x, y, t, window=window, confidence=0.9)
    checked = 0
    for i, ti in enumerate(t):
        w = (x <= ti) & (x > ti - window)
        if w.sum() < 2:
            assert np.isnan(res["slope"][i])
            continue
        ref = theilslopes(y[w], x[w], 0.9, method="joint")
        got = (res["slope"][i], res["intercept"][i], res["low"][i], res["high"][i])
        assert got == pytest.approx(tuple(ref), abs=1e-12), ti
        assert res["n"][i] == w.sum()
        checked += 1
    assert checked > 100


# ------------------------------------------------------------------ forecasts
def test_no_crossing_when_lower_bound_not_above_zero():
    rng = np.random.default_rng(3)
    ys = list(0.015 + rng.normal(0, 0.001, 40))
    tr = WearTrend(indicators=("slip_at_load",)).fit(_frame({"u": ys})).predict(_frame({"u": ys}))
    last = tr.sort("as_of").row(-1, named=True)
    assert last["slope_low"] <= 0
    assert last["days_to_limit"] is None and last["days_to_limit_high"] is None
    assert last["note"] == "no crossing predicted"


def test_forecast_capped_at_twice_the_data_span():
    # 10 days of data rising 0.0001/day from 0.01: the 0.05 limit is 390 days away, far
    # beyond 2 x 9 days of span -> no forecast.
    ys = [0.01 + 0.0001 * k for k in range(10)]
    tr = WearTrend(indicators=("slip_at_load",), min_days=7).fit(_frame({"u": ys})) \
        .predict(_frame({"u": ys}))
    last = tr.sort("as_of").row(-1, named=True)
    assert last["slope_low"] > 0
    assert last["days_to_limit"] is None
    assert last["note"].startswith("beyond forecast range")


def test_interval_brackets_the_median_and_limit_reached_is_zero():
    rng = np.random.default_rng(5)
    k = np.arange(40)
    ys = list(0.01 + 0.001 * k + rng.normal(0, 0.0005, k.size))
    tr = WearTrend(indicators=("slip_at_load",)).fit(_frame({"u": ys})).predict(_frame({"u": ys}))
    ok = tr.filter(pl.col("days_to_limit").is_not_null() & (pl.col("days_to_limit") > 0))
    assert ok.height > 5
    assert (ok["days_to_limit_low"] <= ok["days_to_limit"]).all()
    assert (ok["days_to_limit"] <= ok["days_to_limit_high"].fill_null(np.inf)).all()
    # after the level passes 0.05 (day ~40 at 0.001/day from 0.01) -> 0 and a note
    ys2 = list(0.01 + 0.0015 * k)
    f2 = _frame({"u": ys2})
    tr2 = WearTrend(indicators=("slip_at_load",)).fit(f2).predict(f2)
    over = tr2.filter(pl.col("level_now") >= 0.05)
    assert over.height > 0 and (over["days_to_limit"] == 0).all()
    assert (over["note"] == "at or above limit").all()


def test_min_trend_days_and_columns():
    ys = [0.01, 0.011, 0.012, 0.013, 0.014, 0.015, None, None, 0.018]
    tr = WearTrend(indicators=("slip_at_load",), min_days=7).fit(_frame({"u": ys})) \
        .predict(_frame({"u": ys}))
    assert tr.columns == TREND_COLUMNS
    # 7 days with data only on day index 8; as of days 6 and 7 there are 6 values
    assert tr["as_of"].to_list() == [D0 + dt.timedelta(days=8)]
    assert tr["n_days"].to_list() == [7]


def test_no_look_ahead():
    """Trends as of day d are the same whether or not later days are in the frame."""
    rng = np.random.default_rng(11)
    ys = list(0.012 + 0.0004 * np.arange(60) + rng.normal(0, 0.0008, 60))
    full = WearTrend(indicators=("slip_at_load",)).fit(_frame({"u": ys})).predict(_frame({"u": ys}))
    part_frame = _frame({"u": ys[:35]})
    part = WearTrend(indicators=("slip_at_load",)).fit(part_frame).predict(part_frame)
    cut = full.filter(pl.col("as_of") < D0 + dt.timedelta(days=35))
    assert cut.height == part.height > 0
    assert cut.equals(part)


def test_wear_reset_restarts_the_trend():
    ys = [0.01 + 0.0008 * k for k in range(30)] + [0.011 + 0.00001 * k for k in range(20)]
    ud = _frame({"u": ys})
    maint = pl.DataFrame({"unit_id": ["u"], "ts": [dt.datetime(2026, 6, 30, 9, 0,
                                                               tzinfo=dt.timezone.utc)],
                          "action": ["roller replaced"], "resets_wear": [True]})
    tr = WearTrend(indicators=("slip_at_load",)).fit(ud, maint).predict(ud, maint)
    # the action at 09:00 on day 29 leaves that day mixed: the new segment starts on day 30
    new_start = D0 + dt.timedelta(days=30)
    after = tr.filter(pl.col("as_of") >= new_start)
    assert after["since"].min() == new_start
    assert after["as_of"].min() == new_start + dt.timedelta(days=6)     # 7 days of data
    assert (after["slope_per_day"].abs() < 1e-4).all()
    before = tr.filter(pl.col("as_of") < new_start)
    assert before["slope_per_day"].to_list()[-1] == pytest.approx(0.0008)


def test_creep_b_limit_is_implied_by_the_slip_limit():
    """slip at rated load = a + b*load_ref reaches slip_limit at b = (limit - a_ref)/load_ref."""
    n = 30
    ud = _frame({"u": [0.010 + 0.0002 * k for k in range(n)]}, indicator="creep_b",
                extra={"creep_a": 0.004})
    m = WearTrend(indicators=("creep_b", "power_resid_pct"), slip_limit=0.05,
                  load_ref_nm=2.0).fit(ud)
    tr = m.predict(ud)
    assert tr["limit"].unique().to_list() == [pytest.approx((0.05 - 0.004) / 2.0)]
    assert "power_resid_pct" not in tr["indicator"].to_list()   # column absent: skipped


def test_power_residual_has_no_limit():
    ud = _frame({"u": [float(k) for k in range(20)]}, indicator="power_resid_pct")
    tr = WearTrend(indicators=("power_resid_pct",)).fit(ud).predict(ud)
    assert tr["limit"].null_count() == tr.height
    assert tr["days_to_limit"].null_count() == tr.height
    assert (tr["note"] == "no limit (trend only)").all()


def test_speed_24_units_120_days_3_indicators():
    rng = np.random.default_rng(0)
    rows = []
    for u in range(24):
        for d in range(120):
            rows.append({"unit_id": f"U{u:02d}", "day": D0 + dt.timedelta(days=d),
                         "slip_at_load": 0.015 + 1e-4 * d + rng.normal(0, 1e-3),
                         "creep_a": 0.004 + rng.normal(0, 3e-4),
                         "creep_b": 0.011 + rng.normal(0, 5e-4),
                         "power_resid_pct": rng.normal(0, 2)})
    ud = pl.DataFrame(rows)
    t0 = time.process_time()
    tr = WearTrend().fit(ud).predict(ud)
    cpu = time.process_time() - t0
    assert tr.height == 24 * 3 * (120 - 6)
    assert cpu < 6.0, f"trend fits took {cpu:.1f} s of CPU"
