"""Read-side views: ISO weeks, fleet status, changes, evidence frames, data quality.

Runs on the synthetic lake of tests/report_lake.py, whose statuses are planted, so every
expectation below is known in advance.
"""
from __future__ import annotations

import datetime as dt

import polars as pl
import pytest

from fleetwatch import views as vw
from fleetwatch.errors import UsageError
from fleetwatch.views import IsoWeek
from report_lake import FrameLake, frame, synthetic_tables

UTC = dt.timezone.utc


@pytest.fixture(scope="module")
def synth():
    tables, truth = synthetic_tables(units=16)
    return FrameLake(tables), truth


@pytest.fixture(scope="module")
def week(synth):
    return IsoWeek.parse(synth[1].report_week)


# ----------------------------------------------------------------------------- ISO weeks
def test_iso_week_parse_format_and_days():
    wk = IsoWeek.parse("2026-W23")
    assert (wk.year, wk.week, str(wk)) == (2026, 23, "2026-W23")
    assert wk.monday == dt.date(2026, 6, 1) and wk.sunday == dt.date(2026, 6, 7)
    assert IsoWeek.parse("2026w23") == wk
    assert wk.previous() == IsoWeek(2026, 22) and wk.next() == IsoWeek(2026, 24)


def test_iso_8601_year_boundary_2026_w53():
    """ISO 8601: week 1 holds the year's first Thursday, so 2026 (starting on a Thursday)
    has 53 weeks and 2026-12-31 (Thu) and 2027-01-01 (Fri) both lie in 2026-W53; checked
    against Python's datetime.isocalendar as well."""
    for d in (dt.date(2026, 12, 31), dt.date(2027, 1, 1)):
        iso = d.isocalendar()
        assert (iso.year, iso.week) == (2026, 53)
        assert str(IsoWeek.containing(d)) == "2026-W53"
    w53 = IsoWeek.parse("2026-W53")
    assert w53.monday == dt.date(2026, 12, 28) and w53.sunday == dt.date(2027, 1, 3)
    assert w53.next() == IsoWeek(2027, 1) and IsoWeek(2027, 1).monday == dt.date(2027, 1, 4)
    assert IsoWeek.weeks_in_year(2026) == 53 and IsoWeek.weeks_in_year(2025) == 52
    with pytest.raises(UsageError, match="does not exist"):
        IsoWeek.parse("2025-W53")


def test_iso_week_agrees_with_isocalendar_every_day_2019_2031():
    d = dt.date(2019, 1, 1)
    while d < dt.date(2032, 1, 1):
        wk = IsoWeek.containing(d)
        iso = d.isocalendar()
        assert (wk.year, wk.week) == (iso.year, iso.week)
        assert wk.monday <= d <= wk.sunday and wk.monday.weekday() == 0
        d += dt.timedelta(days=3)


@pytest.mark.parametrize("text", ["2026-23", "26-W10", "2026-W00", "2026-W54", "W10", ""])
def test_bad_week_is_a_usage_error(text):
    with pytest.raises(UsageError) as exc:
        IsoWeek.parse(text)
    assert exc.value.exit_code == 2 and exc.value.hint


def test_last_complete_week_follows_the_plant_time_zone():
    # Sunday 23:30 UTC is already Monday 01:30 in Berlin (CEST, UTC+2).
    now = dt.datetime(2026, 8, 2, 23, 30, tzinfo=UTC)
    assert str(IsoWeek.last_complete("UTC", now)) == "2026-W30"
    assert str(IsoWeek.last_complete("Europe/Berlin", now)) == "2026-W31"
    # and behind UTC: Monday 03:00 UTC is still Sunday evening in Chicago (CDT, UTC-5)
    now = dt.datetime(2026, 8, 3, 3, 0, tzinfo=UTC)
    assert str(IsoWeek.last_complete("UTC", now)) == "2026-W31"
    assert str(IsoWeek.last_complete("America/Chicago", now)) == "2026-W30"


def test_week_bounds_in_plant_time_as_utc():
    start, end = IsoWeek(2026, 31).bounds_utc("Europe/Berlin")
    assert start == dt.datetime(2026, 7, 26, 22, 0, tzinfo=UTC)
    assert end == dt.datetime(2026, 8, 2, 22, 0, tzinfo=UTC)
    # the week holding the October DST change is 169 hours long in Berlin
    s, e = IsoWeek(2026, 43).bounds_utc("Europe/Berlin")
    assert (e - s) == dt.timedelta(hours=169)
    with pytest.raises(UsageError, match="time zone"):
        IsoWeek(2026, 31).bounds_utc("Mars/Olympus")


# ----------------------------------------------------------------------------- status
def test_fleet_overview_statuses_order_and_columns(synth, week):
    lake, truth = synth
    ov = vw.fleet_overview(lake, week.sunday)
    assert dict(zip(ov["unit_id"], ov["status"])) == truth.status_end
    ranks = [{"alert": 3, "watch": 2, "normal": 1}[s] for s in ov["status"]]
    assert ranks == sorted(ranks, reverse=True)
    assert ov["urgency"].to_list() == list(range(1, ov.height + 1))
    # event-based alert (no forecast) comes before the wear alert with 8 days to limit
    alerts = ov.filter(pl.col("status") == "alert")
    assert alerts["days_to_limit"].to_list()[0] is None
    assert alerts["days_to_limit"].to_list()[1] == pytest.approx(8.0, abs=1.0)
    row = ov.filter(pl.col("unit_id") == "L1-U01").row(0, named=True)
    assert row["line"] == "L1" and row["causes"] == "wear" and row["main_reason"]
    silent = ov.filter(pl.col("unit_id") == "L1-U07").row(0, named=True)
    assert silent["last_data"].date() == truth.start + dt.timedelta(days=52)


def test_fleet_overview_as_of_an_earlier_day(synth, week):
    lake, truth = synth
    ov = vw.fleet_overview(lake, week.previous().sunday)
    assert dict(zip(ov["unit_id"], ov["status"])) == truth.status_prev_week_end
    assert ov.filter(pl.col("unit_id") == "L1-U05")["status"][0] == "alert"   # stall


def test_status_counts_lists_every_level_with_zero():
    ov = pl.DataFrame({"unit_id": ["a", "b"], "status": ["normal", "normal"]})
    counts = vw.status_counts(ov)
    assert counts.to_dicts() == [{"status": "normal", "count": 2},
                                 {"status": "watch", "count": 0},
                                 {"status": "alert", "count": 0}]
    ov = pl.DataFrame({"unit_id": ["a", "b"], "status": ["unknown", "alert"]})
    assert vw.status_counts(ov)["status"].to_list() == ["unknown", "normal", "watch", "alert"]


def test_health_changes_against_last_week(synth, week):
    lake, truth = synth
    changes = vw.changes_summary(vw.health_changes(lake, week))
    prev, now = truth.status_prev_week_end, truth.status_end
    act = ("watch", "alert")
    assert changes["new"] == sorted(u for u in now if now[u] in act and prev[u] not in act)
    assert changes["cleared"] == sorted(u for u in now if prev[u] in act and now[u] not in act)
    assert changes["still_open"] == sorted(u for u in now if prev[u] in act and now[u] in act)
    assert changes["new"] == ["L1-U02", "L1-U04"] and changes["cleared"] == ["L1-U05"]
    assert changes["new_alerts"] == ["L1-U02"]


def test_suggested_action_maps_causes():
    assert vw.suggested_action("wear") == "inspect roller and preload"
    assert vw.suggested_action("sensor, data") == (
        "check the output speed sensor and wiring; check the logger")
    assert vw.suggested_action(["motor", "motor"]) == "check motor connections and brushes"
    assert vw.suggested_action("") == "review the evidence in the report"
    assert set(vw.CAUSE_ACTIONS) == {"wear", "contamination", "actuator", "sensor", "stall",
                                     "motor", "data"}


# ----------------------------------------------------------------------------- evidence
def test_unit_slip_series_trend_reaches_the_limit_in_the_band(synth, week):
    lake, _ = synth
    s = vw.unit_slip_series(lake, "L1-U01", week.sunday - dt.timedelta(days=90), week.sunday)
    assert s.limit == pytest.approx(0.05) and s.as_of == week.sunday
    assert s.points["day"].max() == week.sunday and s.points.height == 63
    fit = s.trend.filter(pl.col("part") == "fit")
    fc = s.trend.filter(pl.col("part") == "forecast")
    assert fit["day"].min() == dt.date(2026, 6, 22)              # since the trend's start
    assert fc["level"].max() == pytest.approx(0.05, abs=0.001)    # forecast ends at the limit
    b = s.band.row(0, named=True)
    assert b["low"] < b["mid"] < b["high"] and not b["high_open"]
    assert b["mid"] == fc["day"].max()


def test_unit_slip_series_without_forecast(synth, week):
    lake, _ = synth
    s = vw.unit_slip_series(lake, "L2-U01", end=week.sunday)
    assert s.band.height == 0 and s.note == "no crossing predicted"
    assert s.points.height > 0 and s.trend.height > 0


def test_creep_this_week_against_reference(synth, week):
    lake, _ = synth
    wear = vw.creep_week_vs_reference(lake, "L1-U01", week)
    healthy = vw.creep_week_vs_reference(lake, "L2-U01", week)
    assert set(wear.points["period"]) == {"this week", "reference"}
    assert wear.b_ratio > 2.0                        # preload lost: compliance grew
    assert healthy.b_ratio == pytest.approx(1.0, abs=0.05)
    assert wear.lines["series"].n_unique() == 4      # 2 periods x 2 ratio bins
    assert wear.points.filter(pl.col("period") == "this week").height <= 150
    both = vw.creep_for_units(lake, ["L1-U01", "L2-U01"], week)   # batch = one by one
    assert both["L1-U01"].b_ratio == pytest.approx(wear.b_ratio)
    assert both["L2-U01"].points.equals(healthy.points)


def test_unit_events_filters_by_unit_kind_and_time(synth, week):
    lake, _ = synth
    t0, t1 = week.bounds_utc()
    all_week = vw.unit_events(lake, start=t0, end=t1)
    assert set(all_week["kind"]) == {"gross_slip", "stall", "flatline"}
    assert all_week["start_ts"].min() >= t0 and all_week["start_ts"].max() < t1
    only = vw.unit_events(lake, ["L1-U02"], kinds=["gross_slip"], start=week.monday,
                          end=week.sunday)              # bare dates: whole days
    assert set(only["unit_id"]) == {"L1-U02"} and only.height == 4 * 5
    assert only["duration_s"].to_list()[0] == pytest.approx(180.0)


def test_data_quality_completeness_quarantine_and_silent_units(synth, week):
    lake, _ = synth
    dq = vw.data_quality(lake, week.monday, week.sunday)
    assert dq.silent_units == ["L1-U07"]
    comp = dict(zip(dq.completeness["unit_id"], dq.completeness["completeness"]))
    assert comp["L1-U07"] == 0.0 and comp["L1-U01"] == pytest.approx(1.0)
    # patchy logger: half the samples on days whose index is a multiple of 5 (day 60 here)
    assert comp["L2-U06"] == pytest.approx((6 + 0.5) / 7)
    q = {r["rule"]: (r["rows_in_period"], r["rows_total"]) for r in dq.quarantine.to_dicts()}
    assert q == {"not_numeric": (2, 2), "out_of_range": (1, 1), "bad_timestamp": (0, 2)}
    t = dq.totals()
    assert t["quarantined_rows_in_period"] == 3 and t["quarantined_rows_total"] == 5
    assert t["units_silent"] == 1 and t["units"] == 16


def test_missing_tables_read_empty_with_contract_columns():
    lake = FrameLake({"health": frame("health")})
    ev = vw.unit_events(lake)
    assert ev.height == 0 and "description" in ev.columns
    assert vw.fleet_overview(lake).height == 0
    assert vw.data_quality(lake, dt.date(2026, 1, 1), dt.date(2026, 1, 7)).silent_units == []


def test_window_series_are_bucketed_to_a_point_budget(synth):
    lake, _ = synth
    full = vw.ratio_series(lake, "L1-U03")
    small = vw.ratio_series(lake, "L1-U03", max_points=100)
    assert full.height > 1000 and 50 <= small.height <= 101
    assert small["ratio_error"].mean() == pytest.approx(full["ratio_error"].mean(), rel=0.05)
    p = vw.power_series(lake, "L1-U01", max_points=200)
    assert p["efficiency"].drop_nulls().len() > 0 and set(p["method"]) == {"measured"}
    p2 = vw.power_series(lake, "L1-U02", max_points=200)
    assert p2["efficiency"].drop_nulls().len() == 0 and p2["power_resid_pct"].len() > 0
    assert vw.temperature_series(lake, "L1-U01", max_points=50).height <= 51


def test_bucketed_commanded_ratio_is_a_set_point_that_was_commanded():
    # three windows per bucket commanded 2.0, 2.0 and 3.0: an average (2.33) was never
    # commanded; the series gives a commanded value and the range, and the chart a band
    import duckdb

    from fleetwatch import charts as ch

    t0 = dt.datetime(2026, 3, 2, tzinfo=dt.timezone.utc)
    n = 600
    cmd = [(2.0, 2.0, 3.0)[i % 3] for i in range(n)]
    w = pl.DataFrame({
        "unit_id": ["U1"] * n,
        "window_start": [t0 + dt.timedelta(minutes=10 * i) for i in range(n)],
        "steady_samples": [60] * n, "ratio_cmd_mean": cmd,
        "ratio_act_mean": [c * 1.02 for c in cmd], "ratio_error": [0.02] * n})
    con = duckdb.connect()
    con.register("windows", w)
    r = vw.ratio_series(con, "U1", max_points=100)
    assert r.height < n
    assert set(r["ratio_cmd"].to_list()) <= {2.0, 3.0}
    assert (r["ratio_cmd_lo"] == 2.0).all() and (r["ratio_cmd_hi"] == 3.0).all()
    assert r["ratio_act"].mean() == pytest.approx(sum(cmd) / n * 1.02, rel=0.01)
    spec = ch.ratio_chart(r).to_dict()
    marks = [m.get("mark", {}) for m in spec["vconcat"][0]["layer"]]
    assert any(isinstance(m, dict) and m.get("type") == "area" for m in marks)
    # one window per point: no range, no band
    one = vw.ratio_series(con, "U1", max_points=10_000)
    assert one.height == n and (one["ratio_cmd_lo"] == one["ratio_cmd_hi"]).all()
    assert "layer" not in ch.ratio_chart(one).to_dict()["vconcat"][0]


def test_buckets_are_round_lengths_within_the_point_budget():
    day = 86400
    assert vw.bucket_seconds(90 * day, 300) == 8 * 3600          # 270 points of 8 h
    assert vw.bucket_seconds(30 * day, 300) == 3 * 3600
    assert vw.bucket_seconds(365 * day, 300) == 2 * day
    assert vw.bucket_seconds(3650 * day, 100) == 3650 * day // 100   # past the list: exact
    for span in (3600, 7 * day, 63 * day, 400 * day):
        for pts in (50, 300, 2000):
            b = vw.bucket_seconds(span, pts)
            assert span / b <= pts and (b in vw.NICE_BUCKETS_S or b > 14 * day)


def test_bucketed_series_start_on_round_utc_times(synth):
    lake, _ = synth
    r = vw.ratio_series(lake, "L1-U03", max_points=100)
    step = vw.bucket_seconds((r["ts"].max() - r["ts"].min()).total_seconds(), 100)
    assert all(int(t.timestamp()) % step == 0 for t in r["ts"].to_list())


def test_fleet_slip_distribution_quantiles(synth):
    lake, truth = synth
    d = vw.fleet_slip_distribution(lake)
    assert d.height == 9 and d["units"].max() == 16
    for r in d.iter_rows(named=True):
        assert r["p10"] <= r["p25"] <= r["p50"] <= r["p75"] <= r["p90"] <= r["max"]
    assert d["max"][-1] > 0.04          # the wear unit near its limit in the last week


def test_motor_energy_history_scores(synth, week):
    lake, _ = synth
    md = vw.motor_drift(lake, start=week.monday, end=week.sunday)
    assert md.height == 15                       # the silent unit has no fit this week
    assert md.filter(pl.col("unit_id") == "L1-U06")["r_drift_pct"][0] == pytest.approx(18.0)
    en = vw.energy_summary(lake, week.monday, week.sunday)
    assert en["energy_in_kwh"].is_sorted(descending=True, nulls_last=True)
    measured = set(en.filter(pl.col("efficiency_mean").is_not_null())["unit_id"])
    assert measured == {"L1-U01", "L1-U04", "L1-U07", "L1-U10", "L2-U03", "L2-U06"} - {"L1-U07"}
    hh = vw.health_history(lake, "L1-U05", week.monday, week.sunday)
    assert hh["status"].to_list() == ["alert", "alert", "normal", "normal", "normal",
                                      "normal", "normal"]
    sc = vw.anomaly_scores(lake, ["L1-U01", "L1-U02"], week.monday, week.sunday)
    assert sc.height == 14 and sc["score"].min() >= 0.6


def test_last_data_prefers_recent_telemetry(synth, week):
    lake, _ = synth
    t_last = dt.datetime(2026, 8, 2, 23, 59, 30, tzinfo=UTC)
    tele = frame("telemetry", {"unit_id": ["L1-U01", "L1-U01"],
                               "ts": [t_last - dt.timedelta(minutes=1), t_last],
                               "p_in": [1.0, 1.0], "n_in": [1.0, 1.0], "n_out": [1.0, 1.0],
                               "ratio_cmd": [1.0, 1.0], "batch_id": ["b", "b"],
                               "day": [t_last.date()] * 2})
    with_tele = FrameLake({**lake.tables, "telemetry": tele})
    ov = vw.fleet_overview(with_tele, week.sunday)
    last = dict(zip(ov["unit_id"], ov["last_data"]))
    assert last["L1-U01"] == t_last                                  # exact sample time
    assert last["L1-U02"] == dt.datetime(2026, 8, 2, 23, 0, tzinfo=UTC)   # last window
    earlier = vw.fleet_overview(with_tele, week.sunday - dt.timedelta(days=1))
    assert dict(zip(earlier["unit_id"], earlier["last_data"]))["L1-U01"] < t_last
