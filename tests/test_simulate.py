"""Tests of fleetwatch.simulate: determinism, answer-key bookkeeping, visible faults.

The faults are checked by a plain analysis of the CSV files with fleetwatch.physics (no
lake): steady samples, motor constants fitted from the data, slip at about rated load.
"""
from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from fleetwatch import config
from fleetwatch import physics as ph
from fleetwatch import simulate as sim
from fleetwatch.errors import UsageError

ARGS = dict(units=8, days=40, period_s=120.0, seed=5, start="2026-06-01")
NUMERIC = ["motor_volts", "motor_amps", "input_speed_rpm", "output_speed_rpm",
           "ratio_setpoint", "torque_out_nm", "temperature_c"]
REPO = Path(__file__).resolve().parents[1]
DEFAULTS = {s.name: s.default for s in config.SETTINGS}


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    out = tmp_path_factory.mktemp("fleet")
    res = sim.simulate_fleet(out, **ARGS)
    key = json.loads(res.answer_key.read_text(encoding="utf-8"))
    raw = pl.concat([pl.read_csv(f, infer_schema=False).with_columns(
                         pl.lit(f.name).alias("file"),
                         (pl.int_range(pl.len()) + 2).alias("line"))
                     for f in sorted(out.glob("telemetry_*.csv"))])
    return {"out": out, "res": res, "key": key, "raw": raw}


def _parsed(raw: pl.DataFrame) -> pl.DataFrame:
    """Cast the raw strings; a value that does not parse becomes null."""
    return raw.with_columns(
        [pl.col(c).cast(pl.Float64, strict=False).alias(c + "_f") for c in NUMERIC]
        + [pl.col("time").str.strptime(pl.Datetime("us", "UTC"), "%Y-%m-%dT%H:%M:%SZ",
                                       strict=False).alias("ts")])


def _bad_row_mask(p: pl.DataFrame) -> pl.Expr:
    bad_num = pl.lit(False)
    for c in NUMERIC:
        bad_num = bad_num | (pl.col(c).is_not_null() & pl.col(c + "_f").is_null())
    return (pl.col("drive").is_null() | (pl.col("drive") == "") | pl.col("ts").is_null()
            | bad_num | (pl.col("input_speed_rpm_f") < 0) | (pl.col("output_speed_rpm_f") < 0))


@pytest.fixture(scope="module")
def clean(fleet):
    """Valid, de-duplicated rows with steady-state flags and physics columns."""
    p = _parsed(fleet["raw"])
    p = p.filter(~_bad_row_mask(p)).unique(subset=["drive", "time"], keep="first")
    p = p.sort("drive", "ts")
    out = {}
    for (unit,), g in p.group_by("drive", maintain_order=True):
        ts = g["ts"].to_numpy().astype("datetime64[s]").astype(np.int64)
        n_in = g["input_speed_rpm_f"].to_numpy()
        n_out = g["output_speed_rpm_f"].to_numpy()
        ratio = g["ratio_setpoint_f"].to_numpy()
        v = g["motor_volts_f"].to_numpy()
        i = g["motor_amps_f"].to_numpy()
        temp = g["temperature_c_f"].to_numpy()
        # steady (design.md 5): n_in above steady_n_in_min_rpm, ratio_cmd unchanged for
        # steady_settle_s; also require the previous sample to be running (no start-up)
        chg = np.r_[True, ratio[1:] != ratio[:-1]]
        last = np.maximum.accumulate(np.where(chg, np.arange(ratio.size), 0))
        prev_run = np.r_[False, n_in[:-1] > DEFAULTS["steady_n_in_min_rpm"]]
        steady = ((n_in > DEFAULTS["steady_n_in_min_rpm"]) & prev_run
                  & (ts - ts[last] >= DEFAULTS["steady_settle_s"]))
        omega = ph.omega_from_rpm(n_in)
        # R rises with winding temperature: fit v = R20*(1+alpha*(T-20))*i + k_e*omega
        i_eff = i * ph.winding_resistance(1.0, temp)
        r20, k_e, resid, _ = ph.fit_motor_constants(v[steady], i_eff[steady], omega[steady])
        out[unit] = dict(ts=ts, n_in=n_in, n_out=n_out, ratio=ratio, v=v, i=i, temp=temp,
                         steady=steady, slip=ph.slip(n_in, n_out, ratio),
                         t_m=ph.shaft_torque_nm(k_e, i, sim.I0_A), r20=r20, k_e=k_e,
                         resid=resid, t_out=g["torque_out_nm_f"].to_numpy())
    return out


def _epoch(iso: str) -> int:
    return int(dt.datetime.strptime(iso, "%Y-%m-%dT%H:%M:%SZ")
               .replace(tzinfo=dt.timezone.utc).timestamp())


def _day_start(iso_date: str) -> int:
    return _epoch(iso_date + "T00:00:00Z")


def _units_with(key: dict, condition: str) -> list[str]:
    return [u for u, t in key["units"].items() if t["condition"] == condition]


def _weekly_slip_at_ref(d: dict, until: int | None = None, since: int | None = None):
    """Weekly steady slip at rated load, at the unit's most used ratio set point.

    Per week, fit creep against load s = a + b*T_m (design.md 5) over steady samples and
    evaluate it at load_ref_nm; the last week may be partial.
    """
    load = DEFAULTS["load_ref_nm"]
    sel = d["steady"] & (d["t_m"] > 0.4) & (d["t_m"] < 1.8) & np.isfinite(d["slip"])
    sel &= d["slip"] < DEFAULTS["gross_slip_limit"]
    vals, counts = np.unique(d["ratio"][sel], return_counts=True)
    top = vals[np.argmax(counts)]
    sel &= d["ratio"] == top
    t0 = d["ts"][0] if since is None else since
    t1 = d["ts"][-1] + 1 if until is None else until
    sel &= (d["ts"] >= t0) & (d["ts"] < t1)
    week = (d["ts"] - t0) // (7 * 86400)
    out = []
    for w in range(int(-(-(t1 - t0) // (7 * 86400)))):
        m = sel & (week == w)
        if m.sum() >= 30 and np.ptp(d["t_m"][m]) > 0.3:
            b, a = np.polyfit(d["t_m"][m], d["slip"][m], 1)
            out.append(float(a + b * load))
    return np.array(out)


# ---------------------------------------------------------------- determinism
def test_same_seed_same_bytes_other_seed_differs(fleet, tmp_path):
    again = sim.simulate_fleet(tmp_path / "again", **ARGS)
    first = {f.name: f.read_bytes() for f in fleet["res"].files}
    second = {f.name: f.read_bytes() for f in again.files}
    assert first.keys() == second.keys()
    for name in first:
        assert first[name] == second[name], name
    other = sim.simulate_fleet(tmp_path / "other", **{**ARGS, "seed": ARGS["seed"] + 1})
    name = "telemetry_L1_2026-06.csv"
    assert (tmp_path / "other" / name).read_bytes() != first[name]


def test_result_describes_the_files(fleet):
    res = fleet["res"]
    names = sorted(f.name for f in res.files)
    assert names == sorted(p.name for p in fleet["out"].iterdir())
    assert {"maintenance.csv", "answer_key.json", "mapping.toml",
            "maintenance_mapping.toml"} <= set(names)
    # one file per line and month: 40 days from June 1 span June and July
    assert sorted(n for n in names if n.startswith("telemetry_")) == [
        f"telemetry_{ln}_{m}.csv" for ln in ("L1", "L2", "L3") for m in ("2026-06", "2026-07")]
    assert res.rows == fleet["raw"].height
    assert res.answer_key.name == "answer_key.json" and res.elapsed_s > 0


def test_progress_reaches_its_total(tmp_path):
    calls = []
    sim.simulate_fleet(tmp_path / "p", units=2, days=2, period_s=600, seed=1,
                       progress=lambda done, total: calls.append((done, total)))
    assert calls and calls[-1][0] == calls[-1][1]
    assert [c[0] for c in calls] == sorted(c[0] for c in calls)


# ---------------------------------------------------------------- answer key bookkeeping
def test_answer_key_lists_every_unit(fleet):
    key, raw = fleet["key"], fleet["raw"]
    assert key["schema_version"] == sim.SCHEMA_VERSION and key["seed"] == ARGS["seed"]
    units = key["units"]
    assert len(units) == ARGS["units"]
    in_files = set(raw["drive"].drop_nulls().unique().to_list()) - {""}
    assert in_files == set(units)
    assert all(u.startswith(t["line"] + "-U") for u, t in units.items())
    # 8 units: every fault kind once, two healthy
    assert sorted(t["condition"] for t in units.values()) == sorted(
        ["healthy", "healthy", "wear", "wear_replaced", "contamination", "actuator", "stall",
         "sensor_flatline"])
    for t in units.values():
        assert (t["fault_start"] is None) == (t["condition"] == "healthy")
        assert (t["replacement_day"] is not None) == (t["condition"] == "wear_replaced")
    # about one instrumented unit per line; torque logged there only
    inst = sorted(u for u, t in units.items() if t["instrumented"])
    assert [u[:2] for u in inst] == ["L1", "L2", "L3"]
    with_torque = set(raw.filter(pl.col("torque_out_nm").is_not_null())["drive"].to_list())
    assert with_torque - {"", None} == set(inst)  # empty unit id: an injected corrupt row


def test_answer_key_settings_match_project_defaults(fleet):
    s = fleet["key"]["settings"]
    assert s["slip_limit"] == DEFAULTS["slip_limit"]
    assert s["load_ref_nm"] == DEFAULTS["load_ref_nm"]
    assert s["gross_slip_limit"] == DEFAULTS["gross_slip_limit"]
    assert s["max_start_ratio"] == DEFAULTS["max_start_ratio"]


def test_duplicate_and_corrupt_counts_match_the_files(fleet):
    key, raw = fleet["key"], fleet["raw"]
    p = _parsed(raw).with_columns(_bad_row_mask(_parsed(raw)).alias("bad"))
    total_dup = total_bad = 0
    for name, info in key["files"].items():
        f = p.filter(pl.col("file") == name)
        assert f.height == info["rows"], name
        data_cols = ["drive", "time"] + NUMERIC
        dups = f.height - f.select(data_cols).unique().height
        assert dups == info["duplicate_rows"], name
        bad_lines = sorted(f.filter(pl.col("bad"))["line"].to_list())
        assert bad_lines == sorted(c["line"] for c in info["corrupt"]), name
        assert info["corrupt_rows"] == len(bad_lines)
        total_dup += dups
        total_bad += len(bad_lines)
    t = key["totals"]
    assert (t["duplicate_rows"], t["corrupt_rows"]) == (total_dup, total_bad)
    assert t["rows"] == raw.height == t["clean_rows"] + total_dup + total_bad
    assert total_bad >= 3
    # about 0.2 % duplicates
    assert 0.001 < total_dup / raw.height < 0.004
    kinds = {c["kind"] for f in key["files"].values() for c in f["corrupt"]}
    assert len(kinds) >= 3


def test_rows_sorted_by_time_then_drive(fleet):
    p = _parsed(fleet["raw"])
    for (name,), f in p.group_by("file"):
        ok = f.filter(pl.col("ts").is_not_null() & (pl.col("drive") != "")
                      & pl.col("drive").is_not_null())
        keys = ok.select("ts", "drive")
        assert keys.equals(keys.sort("ts", "drive", maintain_order=True)), name
        assert ok["time"].str.contains(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ$").all()


def test_limit_crossing_day_follows_the_daily_truth(fleet):
    key = fleet["key"]
    start = dt.date.fromisoformat(ARGS["start"])
    for unit, t in key["units"].items():
        daily = np.array(t["slip_at_ref_by_day"])
        assert daily.size == ARGS["days"]
        over = np.flatnonzero(daily >= key["settings"]["slip_limit"])
        expect = (start + dt.timedelta(days=int(over[0]))).isoformat() if over.size else None
        assert t["limit_crossing_day"] == expect, unit
        if t["condition"] == "healthy":
            assert t["limit_crossing_day"] is None
            assert np.ptp(daily) < 1e-9
            assert 0.005 < daily[0] < 0.04  # normal creep of a loaded friction drive


def test_wear_units_cross_late_enough_to_show_a_trend(fleet):
    key = fleet["key"]
    for unit in _units_with(key, "wear") + _units_with(key, "wear_replaced"):
        t = key["units"][unit]
        dn = t["day_numbers"]
        assert dn["limit_crossing"] is not None, unit
        assert dn["limit_crossing"] >= 0.3 * ARGS["days"]
        assert dn["limit_crossing"] - dn["fault_start"] >= 0.15 * ARGS["days"]


def test_wear_crossing_scales_with_days(tmp_path):
    # 120 days at hourly logging (cheap): crossings of plain wear units between ~day 50 and 110
    res = sim.simulate_fleet(tmp_path / "long", units=24, days=120, period_s=3600, seed=3)
    key = json.loads(res.answer_key.read_text())
    wear = _units_with(key, "wear")
    assert len(wear) >= 2 and len(_units_with(key, "wear_replaced")) >= 1
    crossings = [key["units"][u]["day_numbers"]["limit_crossing"] for u in wear]
    assert all(c is not None and 45 <= c <= 112 for c in crossings), crossings
    assert key["counts"]["faulty"] == 8


def test_replacement_is_logged_and_resets_the_slip(fleet):
    key = fleet["key"]
    maint = pl.read_csv(fleet["out"] / "maintenance.csv")
    assert maint.columns == list(sim.MAINTENANCE_COLUMNS)
    for unit in _units_with(key, "wear_replaced"):
        t = key["units"][unit]
        rows = maint.filter((pl.col("drive") == unit) & (pl.col("action") == "roller replaced"))
        assert rows.height == 1
        assert rows["time"][0].startswith(t["replacement_day"])
        assert t["replacement_day"] > t["limit_crossing_day"]
        daily = t["slip_at_ref_by_day"]
        after = daily[t["day_numbers"]["replacement"] + 1:]
        assert after and max(after) < key["settings"]["slip_limit"]
    # ordinary entries exist and do not reset wear
    assert {"inspection", "lubrication"} <= set(maint["action"].to_list())
    mapping = (fleet["out"] / "maintenance_mapping.toml").read_text()
    assert "resets_wear" in mapping and '"roller replaced"' in mapping


def test_mapping_files_parse(fleet):
    import tomllib
    m = tomllib.loads((fleet["out"] / "mapping.toml").read_text())
    assert m["columns"]["unit_id"] == "drive"
    cols = set(fleet["raw"].columns)
    for v in m["columns"].values():
        assert (v if isinstance(v, str) else v["column"]) in cols
    mm = tomllib.loads((fleet["out"] / "maintenance_mapping.toml").read_text())
    assert mm["maintenance"]["resets_wear"] == ["roller replaced", "cones reground"]


# ---------------------------------------------------------------- physics in the data
def test_motor_constants_recoverable_from_the_logs(fleet, clean):
    for unit, t in fleet["key"]["units"].items():
        d = clean[unit]
        assert d["r20"] == pytest.approx(t["r_ohm"], rel=0.03), unit
        assert d["k_e"] == pytest.approx(t["k_e"], rel=0.01), unit
        assert d["resid"] < 0.2  # volts: sensor noise only
        # the answer key's constants are those of the plant: 0.8 ohm +/-10 %, 0.30 V*s/rad +/-5 %
        assert 0.72 - 1e-9 <= t["r_ohm"] <= 0.88 + 1e-9
        assert 0.285 - 1e-9 <= t["k_e"] <= 0.315 + 1e-9


def test_operating_point_ranges(fleet, clean):
    for unit in _units_with(fleet["key"], "healthy"):
        d = clean[unit]
        s = d["steady"]
        untuned = fleet["key"]["units"][unit]["recipes"]["tuning"] == "untuned"
        lo, hi = np.percentile(d["n_in"][s], [5, 95])
        # old recipes slow the motor down to 0.5-0.8 of its speed for the same output speed
        assert (500 if untuned else 1050) <= lo and hi <= 1460, (lo, hi)
        t5, t50, t95 = np.percentile(d["t_m"][s], [5, 50, 95])
        assert 0.3 < t5 and 0.6 < t50 < 1.6 and t95 < 2.5
        # steady running stays below the stall threshold; start-up peaks below the
        # controller's current limit (12-15 A)
        assert np.nanmax(d["i"][s]) < DEFAULTS["stall_i_a"]
        assert np.nanmax(d["i"]) < sim.CURRENT_LIMIT_A[0]
        assert (d["n_in"] == 0).mean() > 0.3  # idle nights and weekends
        ratios = d["ratio"][s]
        assert ratios.min() >= 0.5
        assert ratios.max() <= (sim.STEEP_RECIPE_RATIOS.max() if untuned else
                                sim.MAX_START_RATIO)
        # idle: no current, no speed
        idle = d["n_in"] == 0
        assert np.nanmax(d["i"][idle]) < 0.1


def test_untuned_recipes_in_the_answer_key(fleet):
    """About half the units run old recipes part of the time; the key says which, with
    each product's ratios and the true saving of running it at its least-power ratio."""
    rec = {u: t["recipes"] for u, t in fleet["key"]["units"].items()}
    untuned = [u for u, r in rec.items() if r["tuning"] == "untuned"]
    assert len(untuned) == round(len(rec) * sim.UNTUNED_SHARE)
    for u, r in rec.items():
        assert r["input_kwh_per_week"] > 0 and r["steady_hours_per_week"] > 0
        for p in r["products"]:
            assert 0.5 <= p["ratio_old"] <= p["ratio_tuned"]
            assert p["ratio_old"] <= sim.MAX_START_RATIO
        if u in untuned:
            assert 0.0 < r["true_saving_kwh_per_week"] < 0.1 * r["input_kwh_per_week"]
        else:
            assert r["true_saving_kwh_per_week"] == 0.0
            assert all(p["ratio_old"] == p["ratio_tuned"] for p in r["products"])


def test_untuned_recipe_runs_the_same_duty_with_more_current(fleet):
    """Physics of an old recipe (simulate.true_operating_point): the same output speed and
    torque at a shallower ratio need a slower motor, more current and more input power than
    at the product's least-power ratio."""
    key = fleet["key"]
    for u, t in key["units"].items():
        for p in t["recipes"]["products"]:
            if "least_power_ratio" not in p:
                continue
            n_out = 1300.0 / p["ratio_tuned"]
            t_out = 0.9 * p["ratio_tuned"]
            old = sim.true_operating_point(key, u, n_out, t_out, p["ratio_old"], 40.0)
            best = sim.true_operating_point(key, u, n_out, t_out, p["least_power_ratio"], 40.0)
            assert old["i_in"] > best["i_in"] and old["n_in_rpm"] < best["n_in_rpm"]
            assert old["p_in_w"] >= best["p_in_w"] - 0.5


def test_no_start_in_a_steep_ratio_except_the_stall_fault(fleet, clean):
    """Products steeper than max_start_ratio are entered while running; a drive stops in
    (and so starts in) a ratio at or below it. Only the stall unit's fault starts steeper."""
    steep_seen = False
    for unit, t in fleet["key"]["units"].items():
        d = clean[unit]
        running = d["n_in"] > DEFAULTS["stall_n_in_max_rpm"]
        step = np.diff(d["ts"])
        # a start seen in the log (a logger gap can hide the start itself)
        start = running[1:] & ~running[:-1] & (step == np.median(step))
        steep_seen |= bool((d["ratio"][d["steady"]] > sim.MAX_START_RATIO).any())
        if t["condition"] == "stall":
            continue
        assert (d["ratio"][1:][start] <= sim.MAX_START_RATIO + 1e-6).all(), unit
    assert steep_seen


def test_torque_efficiency_on_instrumented_units(fleet, clean):
    for unit, t in fleet["key"]["units"].items():
        if not t["instrumented"] or t["condition"] != "healthy":
            continue
        d = clean[unit]
        s = d["steady"] & np.isfinite(d["t_out"])
        eta_t = ph.torque_efficiency(d["t_m"][s], d["t_out"][s], d["ratio"][s])
        assert 0.8 < np.median(eta_t) < 0.97
        light = s & (d["t_m"] < 0.6)
        heavy = s & (d["t_m"] > 1.2)
        if light.sum() > 20 and heavy.sum() > 20:  # efficiency drops at light load
            e = lambda m: np.median(ph.torque_efficiency(d["t_m"][m], d["t_out"][m],
                                                         d["ratio"][m]))
            assert e(light) < e(heavy)


# ---------------------------------------------------------------- faults visible in the logs
def test_wear_rises_week_over_week_while_healthy_stay_flat(fleet, clean):
    key = fleet["key"]
    for unit in _units_with(key, "wear") + _units_with(key, "wear_replaced"):
        t = key["units"][unit]
        until = _day_start(t["limit_crossing_day"]) + 86400
        meds = _weekly_slip_at_ref(clean[unit], until=until)
        assert meds.size >= 2, unit
        assert meds[-1] - meds[0] > 0.008, (unit, meds)
        assert np.corrcoef(np.arange(meds.size), meds)[0, 1] > 0.7, (unit, meds)
    for unit in _units_with(key, "healthy"):
        meds = _weekly_slip_at_ref(clean[unit])
        assert meds.size >= 4
        assert np.ptp(meds) < 0.006, (unit, meds)
        assert meds.max() < DEFAULTS["slip_limit"]


def test_wear_replaced_slip_returns_to_baseline(fleet, clean):
    for unit in _units_with(fleet["key"], "wear_replaced"):
        t = fleet["key"]["units"][unit]
        d = clean[unit]
        rep = _day_start(t["replacement_day"]) + 86400
        before = _weekly_slip_at_ref(d, until=_day_start(t["fault_start"]) + 7 * 86400)
        after = _weekly_slip_at_ref(d, since=rep)
        assert before.size and after.size
        assert abs(np.median(after) - np.median(before)) < 0.006


def _gross(d: dict) -> np.ndarray:
    return d["steady"] & (d["slip"] > DEFAULTS["gross_slip_limit"])


def test_contamination_gross_slip_only_after_onset(fleet, clean):
    key = fleet["key"]
    for unit in _units_with(key, "contamination"):
        d = clean[unit]
        onset = _epoch(key["units"][unit]["fault_start_ts"])
        g = _gross(d)
        assert not g[d["ts"] < onset].any()
        assert g[d["ts"] >= onset].sum() >= 3
        # a burst: gross slip starts within days of the onset
        first = d["ts"][g & (d["ts"] >= onset)].min()
        assert first - onset < 4 * 86400
        # the ordinary (non-gross) slip jumps at the onset at all loads
        s = d["steady"] & ~g
        pre = np.median(d["slip"][s & (d["ts"] < onset) & (d["ts"] > onset - 7 * 86400)])
        post = np.median(d["slip"][s & (d["ts"] >= onset) & (d["ts"] < onset + 86400)])
        assert post > pre + 0.005
    for unit in _units_with(key, "healthy") + _units_with(key, "stall"):
        assert not _gross(clean[unit]).any(), unit


def test_stall_unit_has_high_current_at_standstill_after_onset(fleet, clean):
    key = fleet["key"]
    stall_i, still = DEFAULTS["stall_i_a"], DEFAULTS["stall_n_in_max_rpm"]
    for unit, t in key["units"].items():
        d = clean[unit]
        stalled = (d["i"] > stall_i) & (d["n_in"] < still)
        if t["condition"] != "stall":
            assert not stalled.any(), unit
            continue
        onset = _epoch(t["fault_start_ts"])
        assert stalled.sum() >= 3
        assert d["ts"][stalled].min() == onset
        # the current sits near the controller limit, the ratio asked for is steep
        assert np.all(d["i"][stalled] > 11.0) and np.all(d["i"][stalled] < 15.5)
        assert np.all(d["ratio"][stalled] > DEFAULTS["max_start_ratio"])
        # locked rotor: the voltage is only the resistive drop V = I*R (hot winding)
        r_est = d["v"][stalled] / d["i"][stalled]
        assert np.all((r_est > 0.7 * t["r_ohm"]) & (r_est < 1.5 * t["r_ohm"]))


def test_flatline_unit_output_speed_frozen_while_input_varies(fleet, clean):
    key = fleet["key"]
    for unit in _units_with(key, "sensor_flatline"):
        d = clean[unit]
        onset = _epoch(key["units"][unit]["fault_start_ts"])
        after, before = d["ts"] >= onset, d["ts"] < onset
        running_after = after & (d["n_in"] > 300)
        assert running_after.sum() > 100
        assert np.unique(d["n_out"][after]).size == 1
        assert np.std(d["n_in"][running_after]) > 20.0
        assert np.unique(d["n_out"][before & (d["n_in"] > 300)]).size > 100


def test_actuator_offset_is_load_independent(fleet, clean):
    key = fleet["key"]
    for unit in _units_with(key, "actuator"):
        d = clean[unit]
        onset = _epoch(key["units"][unit]["fault_start_ts"])
        s = d["steady"]
        light = s & (d["t_m"] < 0.9)
        heavy = s & (d["t_m"] >= 0.9)
        week_pre = (d["ts"] < onset) & (d["ts"] >= onset - 7 * 86400)
        week_post = (d["ts"] >= onset) & (d["ts"] < onset + 7 * 86400)
        # compare at the same ratio set point, light and heavy load separately
        shifts = []
        for m in (light, heavy):
            r_pre = d["ratio"][m & week_pre]
            r_post = d["ratio"][m & week_post]
            common = np.intersect1d(r_pre, r_post)
            for r in common:
                a = d["slip"][m & week_pre & (d["ratio"] == r)]
                b = d["slip"][m & week_post & (d["ratio"] == r)]
                if a.size > 10 and b.size > 10:
                    shifts.append(np.median(b) - np.median(a))
        assert shifts, unit
        shifts = np.array(shifts)
        assert np.all(np.abs(shifts) > 0.01)
        assert np.all(np.sign(shifts) == np.sign(shifts[0]))


# ---------------------------------------------------------------- arguments and folders
@pytest.mark.parametrize("bad", [dict(units=0), dict(days=0), dict(period_s=1.5),
                                 dict(period_s=0), dict(start="2026-13-01"), dict(seed=-1)])
def test_bad_arguments_raise_usage_error(tmp_path, bad):
    with pytest.raises(UsageError):
        sim.simulate_fleet(tmp_path / "x", **{**dict(units=2, days=1, period_s=600), **bad})


def test_foreign_telemetry_files_are_not_overwritten(tmp_path):
    folder = tmp_path / "plant"
    folder.mkdir()
    mine = folder / "telemetry_L1_2026-06.csv"
    mine.write_text("real plant data\n")
    with pytest.raises(UsageError):
        sim.simulate_fleet(folder, units=2, days=1, period_s=600)
    assert mine.read_text() == "real plant data\n"


def test_rerun_replaces_an_earlier_simulation(tmp_path):
    folder = tmp_path / "fleet"
    sim.simulate_fleet(folder, units=2, days=40, period_s=3600, seed=1)
    assert (folder / "telemetry_L1_2026-07.csv").exists()
    sim.simulate_fleet(folder, units=2, days=3, period_s=3600, seed=1)
    assert not (folder / "telemetry_L1_2026-07.csv").exists()
    key = json.loads((folder / "answer_key.json").read_text())
    assert key["args"]["days"] == 3


def test_fault_plan_scales_with_fleet_size():
    assert sim.fault_plan(1) == ["wear"]
    for units in range(8, 40):
        kinds = sim.fault_plan(units)
        assert set(kinds) == set(sim.CONDITIONS) - {"healthy"}
        assert units - len(kinds) >= 2
    big = sim.fault_plan(24)
    assert len(big) == 8 and big.count("wear") >= 2 and big.count("wear_replaced") == 1
    for units in (2, 3, 5, 7):
        assert 1 <= len(sim.fault_plan(units)) < units


# ---------------------------------------------------------------- committed sample data
def test_sample_data_is_reproducible(tmp_path):
    res = sim.simulate_fleet(tmp_path / "sample", **sim.SAMPLE_ARGS)
    committed = REPO / "sample_data"
    for f in res.files:
        assert (committed / f.name).read_bytes() == f.read_bytes(), f.name
    total = sum(p.stat().st_size for p in committed.iterdir() if p.is_file())
    assert total <= 10_000_000
    key = json.loads(res.answer_key.read_text())
    # the demo shows every fault and the wear unit crosses its limit inside the span
    conds = {t["condition"] for t in key["units"].values()}
    assert conds == set(sim.CONDITIONS)
    assert all(key["units"][u]["limit_crossing_day"] for u in _units_with(key, "wear"))
