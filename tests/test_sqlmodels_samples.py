"""The polars samples path (sqlmodels.samples_frame, what analyze runs) equals samples.sql
(the documented reference) row for row, on random telemetry with gaps, ratio changes,
stops, NaN and nulls, several units and a prior sample within the 31-day look-back."""
from __future__ import annotations

import datetime as dt
import math

import duckdb
import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from fleetwatch import physics, sqlmodels
from fleetwatch.config import load_settings
from fleetwatch.sqlmodels import model, run_model, run_samples

UTC = dt.timezone.utc
T0 = dt.datetime(2026, 6, 1, tzinfo=UTC)
SCHEMA = {"unit_id": pl.String, "ts": pl.Datetime("us", "UTC"), "v_in": pl.Float64,
          "i_in": pl.Float64, "p_in": pl.Float64, "n_in": pl.Float64, "n_out": pl.Float64,
          "ratio_cmd": pl.Float64, "t_out": pl.Float64, "temp": pl.Float64}


@pytest.fixture(scope="module")
def cfg(tmp_path_factory):
    return load_settings(tmp_path_factory.mktemp("proj"), env={})


def random_telemetry(seed: int, units: int = 3, n: int = 400) -> pl.DataFrame:
    """Samples at ~60 s with jitter, gaps (some longer than gap_min_s and some of days),
    stops (n_in at or below the floor, 0), ratio changes, repeated values (flatlines),
    NaN and nulls in every signal, and sub-second timestamps."""
    rng = np.random.default_rng(seed)
    parts = []
    for u in range(units):
        step = rng.choice([60.0, 60.0, 60.0, 1.5, 400.0, 3 * 86400.0, 30 * 86400.0],
                          size=n, p=[.6, .1, .1, .1, .05, .03, .02])
        t = np.cumsum(step) + rng.uniform(0, 0.999, n).round(6)
        ratio = np.repeat(rng.choice([0.5, 1.0, 1.0, 2.0], size=n // 20 + 1), 20)[:n]
        n_in = rng.choice([0.0, 50.0, 1500.0, 1500.0, 1500.0, 2900.5], size=n)
        n_out = n_in / ratio * (1 - rng.uniform(0, 0.05, n))
        cols = {"n_in": n_in, "n_out": n_out, "ratio_cmd": ratio,
                "v_in": rng.choice([24.0, 24.0, 23.5], size=n),
                "i_in": rng.choice([1.0, 2.0, 2.0], size=n),
                "t_out": rng.uniform(0, 3, n), "temp": rng.choice([40.0, 40.0, 41.0], size=n)}
        data = {}
        for k, v in cols.items():
            v = v.astype(float)
            v[rng.random(n) < 0.04] = np.nan
            data[k] = [None if rng.random() < 0.04 else float(x) for x in v]
        ts = [T0 + dt.timedelta(seconds=float(x)) for x in t]
        parts.append(pl.DataFrame({"unit_id": f"U{u}", "ts": ts, **data,
                                   "p_in": [None] * n}, schema=SCHEMA))
    df = pl.concat(parts).select(list(SCHEMA))
    df = df.with_columns(p_in=pl.col("v_in") * pl.col("i_in"))
    return df.unique(["unit_id", "ts"]).with_columns(day=pl.col("ts").dt.date())


def both(cfg, df: pl.DataFrame, from_ts, to_ts, context_s=86400.0):
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.register("telemetry", df.sample(fraction=1.0, shuffle=True, seed=1).to_arrow())
    rt = {"from_ts": from_ts, "to_ts": to_ts, "context_s": context_s,
          "alpha_per_k": physics.ALPHA_COPPER_PER_K}
    run_model(con, model("samples"), cfg, rt)
    ref = pl.from_arrow(con.sql("SELECT * FROM samples ORDER BY unit_id, ts").to_arrow_table())
    run_samples(con, cfg, rt, into="samples_pl")
    got = pl.from_arrow(con.sql("SELECT * FROM samples_pl ORDER BY unit_id, ts")
                        .to_arrow_table())
    # the public frame function gives the same rows as the registered view
    frame = sqlmodels.samples_frame(con, cfg, rt).sort("unit_id", "ts")
    assert frame.equals(got), "samples_frame differs from run_samples"
    return ref, got, con


def assert_same(ref: pl.DataFrame, got: pl.DataFrame) -> None:
    assert got.columns == ref.columns
    assert got.height == ref.height
    for name in ref.columns:
        a, b = ref[name], got[name]
        assert a.dtype == b.dtype, name
        assert a.is_null().to_list() == b.is_null().to_list(), name
        if a.dtype == pl.Float64:
            x, y = a.drop_nulls().to_numpy(), b.drop_nulls().to_numpy()
            assert np.array_equal(np.isnan(x), np.isnan(y)), name
            ok = ~np.isnan(x)
            assert np.allclose(x[ok], y[ok], rtol=1e-12, atol=1e-9), name
        else:
            assert a.to_list() == b.to_list(), name


@pytest.mark.parametrize("slice_rows", [None, 1, 257])
@pytest.mark.parametrize("seed", range(6))
def test_polars_samples_equal_samples_sql(cfg, seed, slice_rows, monkeypatch):
    # slice_rows: the polars path builds the frame a slice of whole units at a time; small
    # slices (one unit each, or a few hundred rows) must give the same rows as one slice
    if slice_rows:
        monkeypatch.setattr(sqlmodels, "SAMPLES_SLICE_ROWS", slice_rows)
    df = random_telemetry(seed)
    ts = df["ts"].sort()
    # the range starts mid-data, so rows before it are context and the 31-day look-back
    # gives a prior sample (or none, for a unit whose data is all later)
    from_ts = ts[len(ts) // 3]
    to_ts = ts[2 * len(ts) // 3]
    ref, got, _ = both(cfg, df, from_ts, to_ts)
    assert ref.height > 50
    # what the comparison covers: both outcomes of the flags, gaps, NaN
    assert ref["steady"].sum() > 0 and (~ref["steady"]).sum() > 0
    assert ref["same_n_in"].null_count() > 0 and ref["gap_seg"].max() > 0
    assert ref["in_range"].sum() > 0 and (~ref["in_range"]).sum() > 0
    assert ref["seq"].min() >= 1
    assert_same(ref, got)


def test_prior_sample_gives_first_row_its_previous(cfg):
    df = random_telemetry(11, units=2, n=300)
    ts = df["ts"].sort()
    from_ts = ts[200] + dt.timedelta(days=2)
    ref, got, _ = both(cfg, df, from_ts, from_ts + dt.timedelta(days=20), context_s=3600.0)
    assert_same(ref, got)
    firsts = ref.group_by("unit_id").agg(pl.col("seq").min(), pl.col("prev_ts").first())
    # the scope's first row of a unit with earlier data is the 2nd of the unit (seq 2)
    assert (firsts["seq"] == 2).any()


@hsettings(max_examples=30, deadline=None)
@given(st.lists(st.tuples(st.sampled_from([0.5, 30.0, 60.0, 61.0, 700.0, 5e5]),
                          st.sampled_from([None, math.nan, 0.0, 10.0, 1500.0]),
                          st.sampled_from([None, math.nan, 1.0, 2.0]),
                          st.sampled_from([None, 20.0, 20.0])),
                min_size=1, max_size=40),
       st.integers(0, 39), st.integers(1, 40))
def test_polars_samples_equal_sql_property(cfg, rows, a, span):
    t = T0
    ts, n_in, ratio, v = [], [], [], []
    for step, ni, r, vv in rows:
        t = t + dt.timedelta(seconds=step)
        ts.append(t), n_in.append(ni), ratio.append(r), v.append(vv)
    n = len(ts)
    df = pl.DataFrame({"unit_id": ["A" if i % 3 else "B" for i in range(n)], "ts": ts,
                       "v_in": v, "i_in": v, "p_in": [None] * n, "n_in": n_in,
                       "n_out": n_in, "ratio_cmd": ratio, "t_out": [None] * n,
                       "temp": v}, schema=SCHEMA).with_columns(day=pl.col("ts").dt.date())
    a = min(a, n - 1)
    b = min(a + span, n - 1)
    from_ts, to_ts = ts[a], ts[b] + dt.timedelta(seconds=1)
    ref, got, _ = both(cfg, df, from_ts, to_ts, context_s=120.0)
    assert_same(ref, got)


@pytest.mark.parametrize("years", [0, 9000])
def test_sort_groups_units_in_time_order(years):
    """The Int64-key sort (and its fallback when ~9000 years of microseconds and 64 units
    do not fit in 62 bits) keeps each unit's rows together in ts order, all columns along."""
    from fleetwatch.sqlmodels import _sort_unit_ts

    rng = np.random.default_rng(3)
    n = 2000
    base = dt.datetime(1000 if years else 2026, 1, 1, tzinfo=UTC)
    secs = rng.integers(0, max(1, years) * 365 * 86400, n)
    df = pl.DataFrame({"unit_id": [f"U{u}" for u in rng.integers(0, 64, n)],
                       "ts": [base + dt.timedelta(seconds=int(x), microseconds=i)
                              for i, x in enumerate(secs)]}).with_row_index("i")
    got = _sort_unit_ts(df)
    assert got.height == n and sorted(got["i"].to_list()) == list(range(n))
    runs = got.select((pl.col("unit_id") != pl.col("unit_id").shift(1)).fill_null(True)
                      .sum())[0, 0]
    assert runs == df["unit_id"].n_unique()           # each unit is one contiguous run
    assert got.select((pl.col("ts").diff().over("unit_id").dt.total_microseconds() > 0)
                      .all(ignore_nulls=True))[0, 0]
    ref = df.sort("unit_id", "ts")
    assert got.sort("unit_id", "ts")["i"].to_list() == ref["i"].to_list()


def test_gap_segment_and_settle_clock_restart_per_unit(cfg):
    """No fill crosses units: with no prior sample, each unit starts in gap segment 0 and
    its own settle clock, whatever the unit sorted before it ended with."""
    rows = []
    for u in ("A", "B"):
        t = T0
        for i in range(30):
            t += dt.timedelta(seconds=3600 if i == 20 else 60)   # one gap per unit
            rows.append({"unit_id": u, "ts": t, "n_in": 1500.0, "n_out": 1500.0,
                         "ratio_cmd": 1.0, "v_in": 24.0, "i_in": 1.0, "p_in": 24.0,
                         "t_out": None, "temp": 40.0})
    df = pl.DataFrame(rows, schema=SCHEMA).with_columns(day=pl.col("ts").dt.date())
    ref, got, _ = both(cfg, df, T0, T0 + dt.timedelta(days=1), context_s=0.0)
    assert_same(ref, got)
    for u in ("A", "B"):
        g = got.filter(pl.col("unit_id") == u).sort("ts")
        assert g["gap_seg"].to_list() == [0] * 20 + [21] * 10
        assert g["steady"].to_list()[:3] == [False, False, True]    # 120 s settle


@pytest.mark.parametrize("slice_rows", [1, 3, 5, 100])
def test_unit_slices_cut_only_between_units_and_cover_every_row(slice_rows, monkeypatch):
    monkeypatch.setattr(sqlmodels, "SAMPLES_SLICE_ROWS", slice_rows)
    units = pl.Series(["A"] * 4 + ["B"] + ["C"] * 7 + ["D"] * 2)
    cuts = sqlmodels._unit_slices(units)
    assert cuts[0][0] == 0 and cuts[-1][1] == len(units)
    assert all(b == c for (_, b), (c, _) in zip(cuts, cuts[1:]))     # contiguous
    for i, (a, b) in enumerate(cuts):
        assert a < b
        assert a == 0 or units[a] != units[a - 1]                      # a unit starts
        if i < len(cuts) - 1:
            # long enough, and it would not be without its last unit
            start_of_last = max(j for j in range(a, b) if j == a or units[j] != units[j - 1])
            assert b - a >= slice_rows
            assert start_of_last == a or start_of_last - a < slice_rows
    assert sqlmodels._unit_slices(pl.Series([], dtype=pl.String)) == []


def test_prior_sample_found_a_day_back_or_up_to_31_days_back(cfg, monkeypatch):
    """The polars path reads the day before the scope first and looks further back only for
    units without a sample there: same rows as samples.sql's single 31-day look-back."""
    start = T0 + dt.timedelta(days=60)
    rows = []
    for unit, back in (("A", dt.timedelta(hours=5)), ("B", dt.timedelta(days=5)),
                       ("C", dt.timedelta(days=40)), ("D", dt.timedelta(days=3))):
        for k in range(3):                                  # older samples before the last
            rows.append((unit, start - back - dt.timedelta(minutes=10 * k)))
        if unit != "D":                                     # D: no sample in the scope
            rows += [(unit, start + dt.timedelta(minutes=k)) for k in range(5)]
    n = len(rows)
    df = pl.DataFrame({"unit_id": [r[0] for r in rows], "ts": [r[1] for r in rows],
                       "v_in": [24.0] * n, "i_in": [1.0] * n, "p_in": [24.0] * n,
                       "n_in": [1500.0] * n, "n_out": [1400.0] * n, "ratio_cmd": [1.0] * n,
                       "t_out": [None] * n, "temp": [40.0] * n},
                      schema=SCHEMA).with_columns(day=pl.col("ts").dt.date())
    seen = []
    real = duckdb.DuckDBPyConnection.register

    def spy(con, name, data):
        seen.append(name)
        return real(con, name, data)
    monkeypatch.setattr(duckdb.DuckDBPyConnection, "register", spy, raising=False)
    ref, got, _ = both(cfg, df, start, start + dt.timedelta(hours=1), context_s=60.0)
    assert "_prior_units" in seen                      # B and C were looked up further back
    assert_same(ref, got)
    first = got.group_by("unit_id").agg(pl.col("prev_ts").sort_by("ts").first())
    prev = dict(zip(first["unit_id"], first["prev_ts"]))
    assert prev["A"] == start - dt.timedelta(hours=5)
    assert prev["B"] == start - dt.timedelta(days=5)
    assert prev["C"] is None                            # beyond the 31 days
    assert "D" not in prev


def test_prior_sample_with_a_null_ratio_takes_the_reference_value(cfg):
    """samples.sql takes the previous ratio with arg_max, which skips nulls: when the last
    sample before the scope has no ratio_cmd, the value comes from an older sample (here
    5 days back), and the polars path's one-day look-back must not stop at the null."""
    start = T0 + dt.timedelta(days=60)
    ts = [start - dt.timedelta(days=5), start - dt.timedelta(hours=2)] + \
        [start + dt.timedelta(minutes=k) for k in range(4)]
    ratio = [2.0, None, 1.0, 1.0, 1.0, 1.0]
    n = len(ts)
    df = pl.DataFrame({"unit_id": ["E"] * n, "ts": ts, "v_in": [24.0] * n,
                       "i_in": [1.0] * n, "p_in": [24.0] * n, "n_in": [1500.0] * n,
                       "n_out": [1400.0] * n, "ratio_cmd": ratio, "t_out": [None] * n,
                       "temp": [40.0] * n}, schema=SCHEMA
                      ).with_columns(day=pl.col("ts").dt.date())
    ref, got, _ = both(cfg, df, start, start + dt.timedelta(hours=1), context_s=60.0)
    assert_same(ref, got)
    first = got.sort("ts").row(0, named=True)
    assert first["prev_ts"] == start - dt.timedelta(hours=2)
    assert first["prev_ratio_cmd"] == 2.0
