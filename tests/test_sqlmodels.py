"""SQL models: the loader's checks (errors point at file:line) and the SQL path's physics.

The physics checks run the SQL models on a plain DuckDB connection with a polars frame
registered as ``telemetry`` and compare with ``fleetwatch.physics`` and the check values of
domain.md section 6.
"""
from __future__ import annotations

import datetime as dt
import re
import textwrap

import duckdb
import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings as hsettings, strategies as st

from fleetwatch import physics
from fleetwatch.config import SETTINGS, load_settings
from fleetwatch.fits import solve_motor_sums
from fleetwatch.schema import TABLES
from fleetwatch.sqlmodels import (SqlModelError, describe_models, load_models, model,
                                  run_model)

UTC = dt.timezone.utc
T0 = dt.datetime(2026, 6, 1, tzinfo=UTC)


@pytest.fixture(scope="module")
def cfg(tmp_path_factory):
    return load_settings(tmp_path_factory.mktemp("proj"), env={})


# ---------------------------------------------------------------- loader
def test_every_model_loads_with_description_and_ordered():
    models = load_models()
    names = [m.name for m in models]
    assert {"samples", "motor_sums", "windows", "window_power", "events", "day_stats",
            "efficiency", "unit_days"} <= set(names)
    for m in models:
        assert m.description and len(m.description) > 40, m.name
        assert m.columns, m.name
        for r in m.reads:                    # every model after the models it reads
            if r in names:
                assert names.index(r) < names.index(m.name), (m.name, r)
    setting_names = {s.name for s in SETTINGS}
    for m in models:
        for p in m.params:
            assert p.runtime or p.name in setting_names


def test_output_models_declare_exactly_the_contract_columns():
    for name in ("windows", "events", "unit_days", "efficiency"):
        declared = [c.name for c in model(name).columns]
        assert declared == TABLES[name].column_names, name


def test_describe_models_lists_params_and_columns():
    d = {m["name"]: m for m in describe_models()}
    assert ("window_min", "min", "Length of a window.") in d["windows"]["params"]
    assert d["events"]["columns"][1][0] == "kind"


def _write(tmp_path, name, text):
    p = tmp_path / f"{name}.sql"
    p.write_text(textwrap.dedent(text).lstrip(), encoding="utf-8")
    return p


GOOD_HEADER = """\
    -- name: {name}
    -- What it computes and why.
    -- reads: telemetry
    -- param: window_min  min  Window length.
    """


@pytest.mark.parametrize("body, line, needle", [
    # used but not declared -> the line of use
    ("SELECT 1 AS a\nFROM telemetry\nWHERE x > $gap_min_s\n  AND y < $window_min\n", 7,
     "$gap_min_s is used but not declared"),
    # declared but unused -> the line of the declaration
    ("SELECT 1 AS a FROM telemetry\n", 4, "$window_min is declared but never used"),
    # a $name inside a comment or a string does not count as a use
    ("SELECT '$gap_min_s' AS a -- $gap_min_s\nFROM telemetry\n", 4,
     "$window_min is declared but never used"),
    # parse error -> DuckDB's line
    ("SELECT $window_min AS a\nFROM telemetry\nWHERE ((\n", 7, "does not parse"),
])
def test_loader_errors_point_at_file_and_line(tmp_path, body, line, needle):
    p = _write(tmp_path, "broken",
               GOOD_HEADER.format(name="broken") + textwrap.indent(body, "    "))
    with pytest.raises(SqlModelError) as ei:
        load_models(tmp_path)
    msg = ei.value.message
    assert msg.startswith(f"{p}:{line}: "), msg
    assert needle in msg
    assert ei.value.hint


def test_loader_checks_params_against_the_settings_registry(tmp_path):
    p = _write(tmp_path, "m1", """\
        -- name: m1
        -- What it computes and why.
        -- param: window_minutes  min  Not a setting.
        SELECT $window_minutes AS a
        """)
    with pytest.raises(SqlModelError, match=re.escape(f"{p}:3: parameter $window_minutes is "
                                                      "not a setting")):
        load_models(tmp_path)
    p.write_text("-- name: m1\n-- Text.\n-- param: gap_min_s  min  Wrong unit.\n"
                 "SELECT $gap_min_s AS a\n")
    with pytest.raises(SqlModelError, match=re.escape(f"{p}:3: parameter $gap_min_s declared "
                                                      "in 'min' but the setting is in 's'")):
        load_models(tmp_path)
    # a runtime parameter needs no setting
    p.write_text("-- name: m1\n-- Text.\n-- param: from_ts  UTC  runtime: start.\n"
                 "SELECT $from_ts AS a\n")
    assert load_models(tmp_path)[0].runtime_params == ["from_ts"]


def test_loader_header_errors(tmp_path):
    p = _write(tmp_path, "m2", "-- name: other\n-- Text.\nSELECT 1\n")
    with pytest.raises(SqlModelError, match=re.escape(f"{p}:1: model name 'other' differs")):
        load_models(tmp_path)
    p.write_text("-- name: m2\nSELECT 1\n")
    with pytest.raises(SqlModelError, match="no description"):
        load_models(tmp_path)
    p.write_text("-- name: m2\n-- Text.\nSELECT 1; SELECT 2\n")
    with pytest.raises(SqlModelError, match=re.escape(f"{p}:3: a model holds exactly one")):
        load_models(tmp_path)


def test_loader_finds_cycles(tmp_path):
    _write(tmp_path, "a", "-- name: a\n-- Text.\n-- reads: b\nSELECT * FROM b\n")
    _write(tmp_path, "b", "-- name: b\n-- Text.\n-- reads: a\nSELECT * FROM a\n")
    with pytest.raises(SqlModelError, match="cycle"):
        load_models(tmp_path)


def test_run_model_reports_a_missing_runtime_parameter(cfg):
    con = duckdb.connect()
    with pytest.raises(SqlModelError, match=r"samples\.sql:\d+: runtime parameter \$from_ts"):
        run_model(con, model("samples"), cfg, {})


def test_run_model_error_names_the_model_file(cfg):
    con = duckdb.connect()            # no telemetry view at all
    rt = {"from_ts": T0, "to_ts": T0, "context_s": 0.0}
    with pytest.raises(SqlModelError, match=r"samples\.sql:\d+: model 'samples' failed"):
        run_model(con, model("samples"), cfg, rt)


# ---------------------------------------------------------------- SQL path physics
def telemetry_frame(rows: dict) -> pl.DataFrame:
    """Telemetry as ingest writes it (columns per schema.py), from column lists."""
    n = len(rows["ts"])
    base = {"unit_id": ["U1"] * n, "v_in": [None] * n, "i_in": [None] * n, "p_in": None,
            "t_out": [None] * n, "temp": [None] * n, "batch_id": ["b1"] * n}
    base.update(rows)
    df = pl.DataFrame({k: base[k] for k in ("unit_id", "ts", "v_in", "i_in", "p_in", "n_in",
                                            "n_out", "ratio_cmd", "t_out", "temp",
                                            "batch_id")},
                      schema={"unit_id": pl.String, "ts": pl.Datetime("us", "UTC"),
                              "v_in": pl.Float64, "i_in": pl.Float64, "p_in": pl.Float64,
                              "n_in": pl.Float64, "n_out": pl.Float64,
                              "ratio_cmd": pl.Float64, "t_out": pl.Float64,
                              "temp": pl.Float64, "batch_id": pl.String})
    df = df.with_columns(p_in=pl.coalesce("p_in", pl.col("v_in") * pl.col("i_in")))
    return df.with_columns(day=pl.col("ts").dt.date())


def sql_con(df: pl.DataFrame) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.register("telemetry", df.to_arrow())
    return con


def run_samples(con, cfg, df, **extra):
    t_end = df["ts"].max() + dt.timedelta(seconds=1)
    rt = {"from_ts": df["ts"].min(), "to_ts": t_end, "context_s": 86400.0,
          "alpha_per_k": physics.ALPHA_COPPER_PER_K, **extra}
    run_model(con, model("samples"), cfg, rt)
    return rt


speeds = st.floats(min_value=0.5, max_value=5000.0, allow_nan=False)


@hsettings(max_examples=25, deadline=None)
@given(data=st.lists(st.tuples(speeds, speeds, st.floats(0.2, 5.0), st.floats(-50.0, 50.0)),
                     min_size=1, max_size=30))
def test_sql_slip_ratio_and_power_equal_physics(data):
    cfg = load_settings("/nonexistent-fleetwatch-project", env={})
    n_in, n_out, ratio, t_out = (np.array(c, dtype=float) for c in zip(*data))
    df = telemetry_frame({"ts": [T0 + dt.timedelta(minutes=k) for k in range(len(data))],
                          "n_in": n_in, "n_out": n_out, "ratio_cmd": ratio, "t_out": t_out,
                          "v_in": np.full(len(data), 24.0), "i_in": np.full(len(data), 2.0)})
    con = sql_con(df)
    run_samples(con, cfg, df)
    got = pl.from_arrow(con.sql("SELECT slip, ratio_act, omega_in, omega_out, p_out_w "
                                "FROM samples ORDER BY ts").to_arrow_table())
    np.testing.assert_allclose(got["slip"], physics.slip(n_in, n_out, ratio), rtol=1e-12,
                               atol=1e-12)
    np.testing.assert_allclose(got["ratio_act"], physics.actual_ratio(n_in, n_out), rtol=1e-12)
    np.testing.assert_allclose(got["omega_in"], physics.omega_from_rpm(n_in), rtol=1e-12)
    np.testing.assert_allclose(got["p_out_w"], physics.mech_power_w(t_out, n_out), rtol=1e-12,
                               atol=1e-9)


def test_ratio_and_slip_check_value_through_sql(cfg):
    # domain.md section 6 #2 (derived): n_in 1450, n_out 570, i_cmd 2.5 -> i_act 2.5439, s 1.724 %
    df = telemetry_frame({"ts": [T0], "n_in": [1450.0], "n_out": [570.0], "ratio_cmd": [2.5]})
    con = sql_con(df)
    run_samples(con, cfg, df)
    ratio_act, slip = con.sql("SELECT ratio_act, slip FROM samples").fetchall()[0]
    assert ratio_act == pytest.approx(2.5439, abs=5e-5)
    assert slip == pytest.approx(0.01724, abs=5e-6)


def test_steady_flag_follows_settle_time_and_speed_floor(cfg):
    # 60 s samples; ratio changes at minute 5; stop at minutes 10-11; gap after minute 15
    mins = list(range(0, 16)) + [40, 41, 42, 43]
    ratio = [2.0 if m < 5 else 2.5 for m in mins]
    n_in = [0.0 if m in (10, 11) else 1400.0 for m in mins]
    df = telemetry_frame({"ts": [T0 + dt.timedelta(minutes=m) for m in mins], "n_in": n_in,
                          "n_out": [n / r if n else 0.0 for n, r in zip(n_in, ratio)],
                          "ratio_cmd": ratio})
    con = sql_con(df)
    run_samples(con, cfg, df)
    steady = dict(con.sql("SELECT epoch(ts - $t0)::INT // 60, steady FROM samples",
                          params={"t0": T0}).fetchall())
    settle_min = cfg.steady_settle_s / 60        # 2 min by default
    assert settle_min == 2
    expect = {0: False, 1: False, 2: True, 3: True, 4: True,     # first sample starts the clock
              5: False, 6: False, 7: True, 8: True, 9: True,     # ratio change at 5
              10: False, 11: False, 12: False, 13: True, 14: True, 15: True,  # stop 10-11
              40: False, 41: False, 42: True, 43: True}          # 25 min pause > gap_min_s
    assert steady == expect


def test_dc_motor_worked_example_through_sql(cfg):
    """domain.md section 6 #8 (derived from the DC motor model, domain.md 1.4):
    V 24, I 2, R 1.5, 2000 rpm, I_0 0.2 A -> E 21 V, omega 209.44, k 0.100268,
    T_shaft 0.18048 N*m, P_shaft 37.8 W. The fit must recover R and k from samples that
    obey V = I*R + k*omega, and windows/window_power must give T_shaft and P_shaft."""
    r_ohm, k = 1.5, 21.0 / physics.omega_from_rpm(2000.0)
    assert k == pytest.approx(0.100268, abs=1e-6)
    mins = np.arange(60)
    i = np.where(mins < 30, 2.0, 1.0 + 0.1 * (mins % 7))      # first window at the example
    n = np.where(mins < 30, 2000.0, 1500.0 + 50.0 * (mins % 5))
    v = physics.motor_voltage_v(i, physics.omega_from_rpm(n), r_ohm, k)
    assert v[0] == pytest.approx(24.0)
    df = telemetry_frame({"ts": [T0 + dt.timedelta(minutes=int(m)) for m in mins],
                          "v_in": v, "i_in": i, "n_in": n, "n_out": n / 2.0,
                          "ratio_cmd": np.full(60, 2.0), "t_out": np.full(60, 0.3)})
    con = sql_con(df)
    rt = run_samples(con, cfg, df)
    run_model(con, model("motor_sums"), cfg, rt)
    sums = pl.from_arrow(con.sql("SELECT * FROM motor_sums").to_arrow_table())
    fit = solve_motor_sums(sums)
    assert fit["r_ohm"][0] == pytest.approx(1.5, rel=1e-9)
    assert fit["k_e"][0] == pytest.approx(0.100268, rel=1e-5)
    con.register("motor_constants", fit.select("unit_id", "week_start", "r_ohm", "k_e")
                 .with_columns(i0_a=pl.lit(0.2)).to_arrow())
    run_model(con, model("windows"), cfg.replace(sample_period_s=60.0), rt)
    run_model(con, model("window_power"), cfg, rt)
    w = con.sql("SELECT i_in_mean, n_in_mean, p_in_mean FROM windows "
                "WHERE window_start = $t", params={"t": T0 + dt.timedelta(minutes=10)}
                ).fetchall()[0]
    assert w == pytest.approx((2.0, 2000.0, 48.0))            # V*I = 48 W at the example
    p_shaft = con.sql("SELECT p_shaft_mean_w FROM window_power WHERE window_start = $t",
                      params={"t": T0 + dt.timedelta(minutes=10)}).fetchall()[0][0]
    assert p_shaft == pytest.approx(37.8, rel=1e-4)
    # windows.load_mean is t_out where logged; the motor-model load without t_out:
    df2 = df.with_columns(t_out=pl.lit(None, pl.Float64))
    con2 = sql_con(df2)
    run_samples(con2, cfg, df2)
    con2.register("motor_constants", fit.select("unit_id", "week_start", "r_ohm", "k_e")
                  .with_columns(i0_a=pl.lit(0.2)).to_arrow())
    run_model(con2, model("windows"), cfg, rt)
    load, src = con2.sql("SELECT load_mean, load_source FROM windows WHERE window_start = $t",
                         params={"t": T0 + dt.timedelta(minutes=10)}).fetchall()[0]
    assert src == "motor_model"
    assert load == pytest.approx(0.18048, rel=1e-4)


def test_locked_rotor_example_through_sql(cfg):
    """domain.md section 6 #7 (OpenStax College Physics 2012, ch. 23, problem 42): 6.00 V,
    back-EMF 4.50 V at 3.00 A -> R = 0.500 ohm and a starting current of 12.0 A. Samples
    that obey V = I*R + E give R = 0.5 through the SQL fit, and a start attempt with the
    rotor held (E = 0, I = V/R) is one stall event with peak 12.0 A."""
    r_ohm = (6.0 - 4.5) / 3.0
    assert r_ohm == pytest.approx(0.5)
    k = 4.5 / physics.omega_from_rpm(1000.0)                  # 4.5 V back-EMF at 1000 rpm
    mins = np.arange(40)
    i = 3.0 + 0.2 * (mins % 4)
    n = 1000.0 + 40.0 * (mins % 3)
    v = physics.motor_voltage_v(i, physics.omega_from_rpm(n), r_ohm, k)
    i_lock = physics.locked_rotor_current_a(6.0, r_ohm)
    assert i_lock == pytest.approx(12.0)
    # minutes 40-41 standing still, minute 42 the locked start at 6 V
    i = np.r_[i, 0.0, 0.0, i_lock]
    n = np.r_[n, 0.0, 0.0, 0.0]
    v = np.r_[v, 0.0, 0.0, 6.0]
    df = telemetry_frame({"ts": [T0 + dt.timedelta(minutes=int(m)) for m in range(43)],
                          "v_in": v, "i_in": i, "n_in": n, "n_out": n / 1.5,
                          "ratio_cmd": np.full(43, 1.5)})
    con = sql_con(df)
    rt = run_samples(con, cfg, df)
    run_model(con, model("motor_sums"), cfg, rt)
    fit = solve_motor_sums(pl.from_arrow(con.sql("SELECT * FROM motor_sums").to_arrow_table()))
    assert fit["r_ohm"][0] == pytest.approx(0.5, rel=1e-9)
    run_model(con, model("events"), cfg, rt)
    ev = con.sql("SELECT kind, peak, samples FROM events").fetchall()
    assert ev == [("stall", pytest.approx(12.0), 1)]


# ---------------------------------------------------------------- events on crafted data
def _drive(minutes, **cols):
    base = {"ts": [T0 + dt.timedelta(minutes=float(m)) for m in minutes]}
    base.update(cols)
    return telemetry_frame(base)


def _events(cfg, df):
    con = sql_con(df)
    rt = run_samples(con, cfg, df)
    run_model(con, model("events"), cfg, rt)
    return pl.from_arrow(con.sql("SELECT * FROM events ORDER BY start_ts").to_arrow_table())


def test_gross_slip_needs_consecutive_samples_and_a_settled_ratio(cfg):
    m = np.arange(30)
    n_in = np.full(30, 1400.0)
    slip = np.full(30, 0.01)
    slip[[5]] = 0.3                 # one sample: below gross_slip_min_samples (2)
    slip[[10, 11, 12]] = [0.2, 0.25, 0.15]   # an episode of three samples
    ratio = np.full(30, 2.0)
    ratio[20:] = 1.0                 # the ratio change sample and the next look like slip
    slip[[20, 21]] = 0.4
    df = _drive(m, n_in=n_in, n_out=n_in / ratio * (1 - slip), ratio_cmd=ratio)
    ev = _events(cfg, df)
    g = ev.filter(pl.col("kind") == "gross_slip")
    assert g.height == 1
    row = g.row(0, named=True)
    assert row["samples"] == 3
    assert row["peak"] == pytest.approx(0.25)
    assert row["start_ts"] == T0 + dt.timedelta(minutes=10)
    assert row["description"] == "gross slip for 3 min, peak 25 % at ratio 2.00"


def test_flatline_gap_and_ratio_change_while_stopped(cfg):
    m = np.r_[np.arange(0, 100), np.arange(130, 150)]
    n_in = np.where((m >= 60) & (m < 70), 0.0, 1400.0 + (m % 3))
    n_out = n_in / 2.0 + 0.1 * (m % 5)
    n_out[(m >= 10) & (m < 50)] = 555.5       # 39 min stuck while running
    ratio = np.where(m < 65, 2.0, 2.5)        # changed at minute 65 while standing still
    df = _drive(m, n_in=n_in, n_out=np.where(n_in > 0, n_out, 0.0), ratio_cmd=ratio)
    ev = _events(cfg, df)
    kinds = ev["kind"].to_list()
    assert kinds.count("flatline") == 1
    f = ev.filter(pl.col("kind") == "flatline").row(0, named=True)
    assert (f["signal"], f["samples"], f["peak"]) == ("n_out", 40, 39 * 60.0)
    r = ev.filter(pl.col("kind") == "ratio_change_stopped").row(0, named=True)
    assert r["ratio_cmd"] == 2.5 and r["peak"] == pytest.approx(0.5)
    g = ev.filter(pl.col("kind") == "data_gap").row(0, named=True)
    assert g["peak"] == 31 * 60.0
    assert g["start_ts"] == T0 + dt.timedelta(minutes=99)
    assert "running before and running after" in g["description"]
    # the stuck n_out makes slip wild, but a flatlined speed is no gross slip
    assert "gross_slip" not in kinds


def test_gap_after_standstill_is_idle_unless_the_logger_records_idle(cfg):
    # a logger that goes quiet when the drive stops: a pause after a standstill sample
    m = np.r_[np.arange(0, 30), np.arange(300, 330)]
    n_in = np.where(m == 29, 0.0, 1400.0)
    df = _drive(m, n_in=n_in, n_out=n_in / 2, ratio_cmd=np.full(m.size, 2.0))
    assert "data_gap" not in _events(cfg, df)["kind"].to_list()
    # the same pause from a logger seen recording a long standstill is a data gap
    m2 = np.r_[np.arange(0, 30), np.arange(300, 400)]
    n2 = np.where((m2 == 29) | (m2 >= 320), 0.0, 1400.0)
    df2 = _drive(m2, n_in=n2, n_out=n2 / 2, ratio_cmd=np.full(m2.size, 2.0))
    assert _events(cfg, df2)["kind"].to_list().count("data_gap") == 1


def test_clock_step_back_shows_as_crowded_samples(cfg):
    # 60 s logging; at minute 100 the clock is set back by 30 min 30 s: after ingest sorts
    # by time, minutes 69.5..100 hold two interleaved series.
    first = np.arange(0, 100)
    second = np.arange(100, 160) - 30.5
    m = np.sort(np.r_[first, second])
    n_in = np.full(m.size, 1400.0)
    df = _drive(m, n_in=n_in, n_out=n_in / 2, ratio_cmd=np.full(m.size, 2.0))
    ev = _events(cfg, df)
    cj = ev.filter(pl.col("kind") == "clock_jump")
    assert cj.height == 1
    assert cj["peak"][0] == pytest.approx(30.5 * 60, abs=60)
    assert "stepped back" in cj["description"][0]
    # a logger with a few seconds of jitter raises nothing
    rng = np.random.default_rng(1)
    jitter = np.arange(0, 160) + rng.uniform(-0.1, 0.1, 160)
    n_in = 1400.0 + rng.normal(0, 1, 160)
    df2 = _drive(jitter, n_in=n_in, n_out=n_in / 2 * 0.99, ratio_cmd=np.full(160, 2.0))
    assert _events(cfg, df2).height == 0


def test_sql_reference_documents_every_model_table_and_column():
    import re
    from pathlib import Path
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    doc = readme.split("## SQL reference", 1)[1].split("\n## ", 1)[0]
    for m in load_models():
        assert f"`{m.name}.sql`" in doc, m.name
    for name in ("windows", "events", "unit_days", "motor_fits", "creep_fits", "efficiency"):
        assert f"### {name}\n" in doc, name
        section = re.split(r"\n###? ", doc.split(f"### {name}\n", 1)[1], maxsplit=1)[0]
        for col in TABLES[name].column_names:
            assert col in section, f"{name}.{col} is not described in the README's SQL reference"
