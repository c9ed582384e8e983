"""One contract test for every model class: scikit-learn's estimator contract (style.md 9)
and the run_models stage contract (schema.py tables, no writer lock)."""
from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.utils.estimator_checks import (check_get_params_invariance,
                                            check_no_attributes_set_in_init,
                                            check_parameters_default_constructible,
                                            check_set_params)

from fleetwatch.errors import FleetwatchError, LakeError, ModelError
from fleetwatch.models import (HealthRules, NotFittedModelError, RelativeIsolationForest,
                               WearTrend, run_models)
from fleetwatch.schema import table

D0 = dt.date(2026, 6, 1)


def _unit_days(n_units=3, days=30, seed=0) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    rows = []
    for u in range(n_units):
        for k in range(days):
            a, b = 0.004 + rng.normal(0, 2e-4), 0.011 + rng.normal(0, 3e-4)
            rows.append({"unit_id": f"U{u}", "day": D0 + dt.timedelta(days=k), "creep_a": a,
                         "creep_b": b, "slip_at_load": a + b,
                         "power_resid_pct": rng.normal(0, 1.0), "gross_slip_events": 0,
                         "stall_events": 0, "flatline_events": 0})
    return pl.DataFrame(rows)


def _use(model, ud):
    """Call the model's scoring method (the one that needs a fitted model)."""
    if isinstance(model, RelativeIsolationForest):
        return model.score(ud)
    return model.predict(ud)


MODELS = [RelativeIsolationForest, WearTrend, HealthRules]


@pytest.mark.parametrize("cls", MODELS, ids=lambda c: c.__name__)
def test_estimator_contract(cls):
    name = cls.__name__
    est = cls()
    # sklearn's own checks that apply to estimators fitted on tables, not on X arrays
    check_parameters_default_constructible(name, est)
    check_no_attributes_set_in_init(name, est)
    check_get_params_invariance(name, est)
    check_set_params(name, est)
    params = est.get_params()
    assert params and all(not k.endswith("_") for k in params)
    # clone gives an unfitted copy with equal parameters
    ud = _unit_days()
    fitted = cls().fit(ud)
    twin = clone(fitted)
    assert twin.get_params() == fitted.get_params()
    assert not [k for k in vars(twin) if k.endswith("_")]
    # using before fit raises a ModelError that sklearn also recognises
    with pytest.raises(NotFittedError) as exc:
        _use(cls(), ud)
    assert isinstance(exc.value, NotFittedModelError)
    assert isinstance(exc.value, ModelError) and isinstance(exc.value, FleetwatchError)
    assert exc.value.exit_code == 1 and "fit" in exc.value.hint
    # fit returns self, learns attributes ending in '_', leaves the parameters alone
    est2 = cls()
    before = est2.get_params()
    assert est2.fit(ud) is est2
    learned = [k for k in vars(est2) if k.endswith("_") and not k.startswith("_")]
    assert learned
    assert est2.get_params() == before
    out = _use(est2, ud)
    assert isinstance(out, pl.DataFrame) and out.height > 0
    # set_params changes behaviour of a new fit (parameters are really used)
    if cls is WearTrend:
        assert clone(est2).set_params(min_days=25).fit(ud).predict(ud).height < out.height


# ------------------------------------------------------------------ run_models
class _FakeLake:
    """Just enough of Lake for run_models: read and overwrite; taking the lock fails."""

    def __init__(self, tables):
        self.tables = dict(tables)
        self.written = {}

    def read(self, name):
        if name not in self.tables:
            raise LakeError(f"no table {name}")
        return self.tables[name]

    def overwrite(self, name, data):
        self.written[name] = pl.from_arrow(data)
        return 1

    def writer(self, purpose):                         # analyze already holds it
        raise AssertionError("run_models must not take the writer lock")


class _Settings:
    reference_days = 14
    load_ref_nm = 1.0
    random_state = 0
    slip_limit = 0.05
    forecast_confidence = 0.9
    min_trend_days = 7
    trend_window_days = 42
    alert_horizon_days = 14.0
    watch_horizon_days = 45.0
    watch_score = 0.62
    persist_k, persist_n, clear_m = 2, 3, 3
    gross_slip_events_per_day = 3.0
    stall_repeat = 2


def test_run_models_writes_the_contract_tables_without_the_lock():
    ud = _unit_days(days=40)
    maint = pl.DataFrame({"unit_id": ["U1"], "ts": [dt.datetime(2026, 6, 25, 8,
                                                                tzinfo=dt.timezone.utc)],
                          "action": ["roller replaced"], "note": [None],
                          "resets_wear": [True], "batch_id": ["b"]})
    lake = _FakeLake({"unit_days": ud, "maintenance": maint})     # no events table
    res = run_models(lake, _Settings())
    assert set(lake.written) == {"scores", "trends", "health"}
    for name, df in lake.written.items():
        assert df.columns == table(name).column_names, name
        assert res[name] == df.height > 0
    assert res["units"] == 3 and sum(res["status_counts"].values()) == 3
    h = lake.written["health"]
    assert h.height == ud.height
    assert "wear reset" in h.filter((pl.col("unit_id") == "U1")
                                    & (pl.col("day") == dt.date(2026, 6, 25)))["reasons"][0]


def test_run_models_without_unit_days_is_a_clear_error():
    with pytest.raises(LakeError):
        run_models(_FakeLake({}), _Settings())
    empty = _unit_days().head(0)
    with pytest.raises(ModelError, match="unit_days is empty"):
        run_models(_FakeLake({"unit_days": empty}), _Settings())
