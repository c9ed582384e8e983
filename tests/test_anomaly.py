"""Isolation forest over per-unit robust z-scores (fleetwatch.models.anomaly).

Properties from Liu, Ting & Zhou, "Isolation Forest", ICDM 2008, with the check values of
domain.md section 6 #15-#17 (recomputed there with scikit-learn 1.9.1).
"""
from __future__ import annotations

import datetime as dt
import math

import numpy as np
import polars as pl
import pytest
from sklearn.ensemble import IsolationForest
from sklearn.ensemble._iforest import _average_path_length

from fleetwatch.models import RelativeIsolationForest, average_path_length

D0 = dt.date(2026, 6, 1)


def _fleet(n_units=8, days=60, seed=0, step_unit=None, step_day=40, step=0.02,
           offsets=None) -> pl.DataFrame:
    """Units with their own baselines; optionally one unit's compliance steps up."""
    rng = np.random.default_rng(seed)
    rows = []
    for u in range(n_units):
        a0 = (offsets or {}).get(u, 0.003 + 0.002 * u)     # very different baselines
        b0 = 0.008 + 0.001 * u
        for d in range(days):
            a = a0 + rng.normal(0, 4e-4)
            b = b0 + rng.normal(0, 6e-4) + (step if (u == step_unit and d >= step_day) else 0)
            rows.append({"unit_id": f"U{u}", "day": D0 + dt.timedelta(days=d),
                         "creep_a": a, "creep_b": b, "slip_at_load": a + b,
                         "power_resid_pct": rng.normal(0, 1.5)})
    return pl.DataFrame(rows)


# ------------------------------------------------------------------ paper properties
def test_c_n_check_values_15():
    """domain.md 6 #15: c(1..) = 0, 1, 1.20739, 10.24477, 12.96994 (sklearn
    _average_path_length and the paper's formula c(n) = 2H(n-1) - 2(n-1)/n)."""
    n = np.array([1, 2, 3, 256, 1000])
    want = [0.0, 1.0, 1.20739, 10.24477, 12.96994]
    assert _average_path_length(n) == pytest.approx(want, abs=1e-5)
    assert average_path_length(n) == pytest.approx(want, abs=1e-5)
    # exact harmonic number for 256 differs slightly (domain.md: 10.24869)
    h255 = sum(1.0 / i for i in range(1, 256))
    assert 2 * h255 - 2 * 255 / 256 == pytest.approx(10.24869, abs=1e-5)


def test_constant_data_scores_one_half_16():
    """domain.md 6 #16: E[h] = c(n) on constant training data -> s = 0.5 exactly."""
    ud = pl.DataFrame({"unit_id": ["a"] * 30 + ["b"] * 30,
                       "day": [D0 + dt.timedelta(days=k) for k in range(30)] * 2,
                       "slip_at_load": [0.02] * 60, "creep_b": [0.01] * 60})
    m = RelativeIsolationForest(features=("slip_at_load", "creep_b")).fit(ud)
    sc = m.score(ud)
    assert sc["score"].to_list() == pytest.approx([0.5] * 60, abs=1e-12)


def test_sklearn_defaults_17():
    """domain.md 6 #17 (sklearn 1.9.1): 1001 rows -> 100 trees, max_samples 256, depth 8,
    offset_ -0.5, decision_function = score_samples + 0.5; and our wrapper's defaults."""
    X = np.random.default_rng(0).normal(size=(1001, 3))
    f = IsolationForest(random_state=0).fit(X)
    assert len(f.estimators_) == 100 and f.max_samples_ == 256
    assert {e.get_params()["max_depth"] for e in f.estimators_} == {8}
    assert math.ceil(math.log2(256)) == 8
    assert f.offset_ == -0.5
    assert np.allclose(f.decision_function(X), f.score_samples(X) + 0.5)
    m = RelativeIsolationForest()
    assert (m.n_estimators, m.max_samples, m.random_state) == (100, 256, 0)


# ------------------------------------------------------------------ relative features
def test_step_on_one_unit_scores_high_and_names_the_feature():
    ud = _fleet(step_unit=3)
    m = RelativeIsolationForest(reference_days=14).fit(ud)
    sc = m.score(ud)
    step = sc.filter((pl.col("unit_id") == "U3") & (pl.col("day") >= D0 + dt.timedelta(40)))
    rest = sc.filter(~((pl.col("unit_id") == "U3") & (pl.col("day") >= D0 + dt.timedelta(40))))
    assert step["score"].min() > 0.6
    assert step["score"].min() > rest["score"].quantile(0.9)
    assert all(t.split(" ")[0] in ("creep_b", "slip_at_load") for t in step["top_features"])
    assert all("z=+" in t for t in step["top_features"])


def test_baselines_are_per_unit():
    """A unit whose own normal is far from the others is not anomalous: features are
    relative to each unit's reference."""
    ud = _fleet(offsets={0: 0.04})       # U0 runs at 4 % offset, the others below 2 %
    sc = RelativeIsolationForest().fit(ud).score(ud)
    u0 = sc.filter(pl.col("unit_id") == "U0")["score"]
    others = sc.filter(pl.col("unit_id") != "U0")["score"]
    assert u0.median() < 0.55
    assert abs(u0.median() - others.median()) < 0.05


def test_reference_restarts_after_wear_reset():
    # U2's slip drops for good at day 30 (new roller): without the maintenance entry that
    # looks anomalous; with it, the new level is the new reference.
    ud = _fleet(step_unit=2, step_day=30, step=-0.006)
    maint = pl.DataFrame({"unit_id": ["U2"],
                          "ts": [dt.datetime(2026, 7, 1, tzinfo=dt.timezone.utc)],
                          "action": ["roller replaced"], "resets_wear": [True]})
    late = (pl.col("unit_id") == "U2") & (pl.col("day") >= D0 + dt.timedelta(days=44))
    no_reset = RelativeIsolationForest().fit(ud).score(ud).filter(late)["score"]
    with_reset = RelativeIsolationForest().fit(ud, maint).score(ud, maint)
    # beyond the reference hull an isolation forest saturates (here ~0.58 with 5 features);
    # what matters is that the new level stops looking unusual once it is the reference
    assert no_reset.median() > 0.55
    assert with_reset.filter(late)["score"].median() < no_reset.median() - 0.08
    ref = with_reset.filter((pl.col("unit_id") == "U2") & pl.col("is_reference"))
    assert ref["day"].min() == D0 and D0 + dt.timedelta(days=30) in ref["day"].to_list()


def test_scale_floor_keeps_tiny_changes_small():
    # perfectly steady reference, then a 0.05 % change: MAD = 0 would make it infinite
    days = [D0 + dt.timedelta(days=k) for k in range(30)]
    ud = pl.DataFrame({"unit_id": ["u"] * 30, "day": days,
                       "slip_at_load": [0.02] * 20 + [0.0205] * 10})
    m = RelativeIsolationForest(features=("slip_at_load",)).fit(ud)
    z = m.transform(ud)["z_slip_at_load"].to_list()
    assert z[-1] == pytest.approx(0.5)            # 0.0005 / floor 0.001


def test_missing_feature_and_unknown_unit():
    ud = _fleet(n_units=4, days=30)
    m = RelativeIsolationForest(features=("slip_at_load", "efficiency")).fit(ud)
    other = _fleet(n_units=1, days=30, seed=9).with_columns(pl.lit("NEW").alias("unit_id"))
    sc = m.score(other)
    assert sc.height == 30 and sc["score"].is_not_null().all()
    assert sc["is_reference"].sum() == 14


def test_reproducible_with_fixed_seed():
    ud = _fleet(step_unit=1)
    a = RelativeIsolationForest(random_state=0).fit(ud).score(ud)
    b = RelativeIsolationForest(random_state=0).fit(ud).score(ud)
    c = RelativeIsolationForest(random_state=1).fit(ud).score(ud)
    assert a.equals(b)
    assert not a["score"].equals(c["score"])


def test_days_without_features_get_no_score():
    ud = _fleet(n_units=3, days=30).with_columns(
        pl.when(pl.col("day") == D0 + dt.timedelta(days=20)).then(None)
        .otherwise(pl.col(c)).alias(c) for c in ("creep_a", "creep_b", "slip_at_load",
                                                   "power_resid_pct"))
    sc = RelativeIsolationForest().fit(ud).score(ud)
    assert sc.height == 3 * 29
    assert D0 + dt.timedelta(days=20) not in sc["day"].to_list()
