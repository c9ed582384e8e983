"""Health rules on hand-built scenarios (fleetwatch.models.health) and the status command.

Persistence follows the on-/off-delay idea of ANSI/ISA-18.2-2016 as summarised in
domain.md 3.4 (k of n days to raise, m clean days to clear: common practice, no source).
"""
from __future__ import annotations

import datetime as dt
import json

import numpy as np
import polars as pl
import pytest

from fleetwatch.errors import EXIT_FAIL_ON, EXIT_OK, UsageError
from fleetwatch.models import HealthRules, compute_health
from fleetwatch.models.health import HEALTH_COLUMNS
from fleetwatch.schema import table
from fleetwatch.status import (STATUS_KEYS, fail_on_exit_code, fleet_status,
                               format_status_table)

D0 = dt.date(2026, 6, 1)
N_DAYS = 40


def _day(k: int) -> dt.date:
    return D0 + dt.timedelta(days=k)


def _unit(uid="u", days=N_DAYS, seed=0, **mods) -> list[dict]:
    """A steady unit: slip at rated load ~1.5 %, offset a ~0.4 %, compliance ~0.011/N*m.

    ``mods``: column -> {day index: value} overrides (e.g. gross_slip_events={20: 3}).
    """
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(days):
        a = 0.004 + rng.normal(0, 2e-4)
        b = 0.011 + rng.normal(0, 3e-4)
        r = {"unit_id": uid, "day": _day(k), "creep_a": a, "creep_b": b, "slip_at_load": a + b,
             "power_resid_pct": rng.normal(0, 1.0), "gross_slip_events": 0, "stall_events": 0,
             "flatline_events": 0, "gap_events": 0, "completeness": 1.0}
        for col, per_day in mods.items():
            if k in per_day:
                r[col] = per_day[k]
        r["slip_at_load"] = r["creep_a"] + r["creep_b"] if "slip_at_load" not in mods \
            else r["slip_at_load"]
        rows.append(r)
    return rows


def _frame(*units: list[dict]) -> pl.DataFrame:
    return pl.DataFrame([r for u in units for r in u])


def _scores(ud: pl.DataFrame, high: dict[str, set[int]] | None = None,
            value: float = 0.7) -> pl.DataFrame:
    """A scores table: 0.45 everywhere, ``value`` on the given unit/day indexes."""
    high = high or {}
    sc = [value if (k := (d - D0).days) in high.get(u, set()) else 0.45
          for u, d in zip(ud["unit_id"], ud["day"])]
    return ud.select("unit_id", "day").with_columns(
        pl.Series("score", sc), pl.lit("slip_at_load z=+5.0").alias("top_features"))


def _status(h: pl.DataFrame, uid="u") -> list[str]:
    return h.filter(pl.col("unit_id") == uid).sort("day")["status"].to_list()


def _health(ud, scores=None, trends=None, maint=None, **params) -> pl.DataFrame:
    m = HealthRules(**params).fit(ud, maint)
    return m.predict(ud, trends=trends, scores=scores if scores is not None else _scores(ud),
                     maintenance=maint)


# ------------------------------------------------------------------ persistence
def test_score_needs_k_of_n_days_and_clears_after_m_clean_days():
    # a robust-z excursion on compliance backs the high scores (anomaly_min_z gate)
    bump = {k: 0.02 for k in (20, 23, 24, 30)}
    ud = _frame(_unit(creep_b=bump))
    sc = _scores(ud, {"u": {20, 23, 24, 30}})
    st = _status(_health(ud, sc))
    assert st[20] == "normal"                       # 1 day of 3: not raised
    assert st[22] == "normal"
    assert st[23] == "normal"                       # last 3 days 21-23: only day 23
    assert st[24] == "watch"                        # 23 and 24: 2 of 3 -> raised
    assert st[25:27] == ["watch", "watch"]          # held during 2 clean days
    assert st[27] == "normal"                       # 3rd clean day (25, 26, 27) -> cleared
    assert st[30] == "normal"                       # a single day again: not raised


def test_persistence_settings_are_used():
    bump = {k: 0.02 for k in (20, 21)}
    ud = _frame(_unit(creep_b=bump))
    sc = _scores(ud, {"u": {20, 21}})
    assert _status(_health(ud, sc, persist_k=3, persist_n=3))[19:25] == ["normal"] * 6
    st = _status(_health(ud, sc, persist_k=1, persist_n=1, clear_m=1))
    assert st[19:23] == ["normal", "watch", "watch", "normal"]


def test_event_alerts_rise_at_once_and_clear_after_m_days():
    ud = _frame(_unit(gross_slip_events={20: 3}), _unit("v", stall_events={25: 2}, seed=1),
                _unit("w", gross_slip_events={20: 2}, seed=2))
    h = _health(ud)
    st = _status(h, "u")
    assert st[19:24] == ["normal", "alert", "alert", "alert", "normal"]
    row = h.filter((pl.col("unit_id") == "u") & (pl.col("day") == _day(20))).row(0, named=True)
    assert "3 gross-slip event(s) on 2026-06-21" in row["reasons"]
    assert "[events, unit_days 2026-06-21]" in row["reasons"]
    assert row["causes"] == "contamination" and row["since"] == _day(20)
    assert _status(h, "v")[25] == "alert"
    assert "stall" in h.filter((pl.col("unit_id") == "v") & (pl.col("day") == _day(25)))[
        "causes"][0]
    assert _status(h, "w")[20] == "normal"          # 2 < 3 events a day, one day only


def test_flatline_is_a_sensor_watch_at_once():
    ud = _frame(_unit(flatline_events={30: 1, 31: 1}, gross_slip_events={31: 5}))
    ev = pl.DataFrame({"unit_id": ["u"], "kind": ["flatline"], "day": [_day(30)],
                       "signal": ["n_out"]})
    m = HealthRules().fit(ud)
    h = m.predict(ud, scores=_scores(ud), events=ev)
    st = _status(h)
    assert st[29:32] == ["normal", "watch", "alert"]
    r30 = h.filter(pl.col("day") == _day(30)).row(0, named=True)
    assert r30["causes"] == "sensor" and "flatline (n_out)" in r30["reasons"]
    # gross slip next to a flatline is blamed on the sensor, not on the contact
    assert h.filter(pl.col("day") == _day(31))["causes"][0] == "sensor"


def test_since_is_the_first_day_of_the_current_status_run():
    ud = _frame(_unit(gross_slip_events={20: 3, 22: 1, 23: 1}))
    h = _health(ud).sort("day")
    rows = {(d - D0).days: (s, since) for d, s, since in
            zip(h["day"], h["status"], h["since"])}
    assert rows[19] == ("normal", D0)
    assert rows[20] == ("alert", _day(20))
    # the alert is held for 3 days not at alert level (21, 22, 23); on day 23 gross slip on
    # 2 of the last 3 days (22, 23) still holds a watch: a new run starts
    assert rows[22] == ("alert", _day(20))
    assert rows[23] == ("watch", _day(23))
    assert rows[25] == ("watch", _day(23))
    assert rows[26] == ("normal", _day(26))          # 3 clean days: 24, 25, 26


# ------------------------------------------------------------------ slip level and trends
def _wear_unit(rate=0.0008, start=15, days=70, seed=0, uid="u"):
    rows = _unit(uid, days=days, seed=seed)
    for r in rows:
        k = (r["day"] - D0).days
        if k >= start:
            r["creep_b"] += rate * (k - start)
        r["slip_at_load"] = r["creep_a"] + r["creep_b"]
    return rows


def test_progressive_wear_watch_then_alert_with_days_to_limit():
    ud = _frame(_wear_unit())
    out = compute_health(ud)
    h = out["health"].sort("day")
    st = h["status"].to_list()
    # slip 1.5 % + 0.08 %/day from day 15 reaches 5 % on day ~59
    first_watch = st.index("watch")
    first_alert = st.index("alert")
    assert 15 < first_watch < first_alert
    assert 59 - first_watch >= 14                  # flagged >= 14 days before the limit
    assert 40 < first_alert <= 59 - 10
    row = h.row(first_alert, named=True)
    assert row["days_to_limit"] < 14
    assert "wear" in row["causes"]
    assert "steady slip at rated load" in row["reasons"] and "limit 5.00 % in ~" in row["reasons"]
    assert "[trends, unit_days " in row["reasons"]


def test_step_in_compliance_is_contamination_and_offset_is_actuator():
    ud = _frame(_unit("c", days=50, creep_b={k: 0.03 for k in range(30, 50)}),
                _unit("a", days=50, seed=3, creep_a={k: 0.012 for k in range(30, 50)}))
    h = compute_health(ud)["health"]
    c = h.filter(pl.col("unit_id") == "c").sort("day")
    a = h.filter(pl.col("unit_id") == "a").sort("day")
    assert c["status"][29] == "normal" and c["status"][31] != "normal"
    assert "contamination" in c["causes"][31]
    assert a["status"][29] == "normal" and a["status"][31] != "normal"
    assert "actuator" in a["causes"][31]
    assert "offset (creep a)" in a["reasons"][31]


def test_wear_reset_clears_wear_states_and_restarts_reference():
    rows = _wear_unit(days=70)
    for r in rows:                                       # new roller on day 50 (10:00)
        k = (r["day"] - D0).days
        if k >= 50:
            r["creep_b"] = 0.010 + (r["creep_b"] - 0.011 - 0.0008 * (k - 15)) / 2
            r["slip_at_load"] = r["creep_a"] + r["creep_b"]
    ud = _frame(rows)
    maint = pl.DataFrame({"unit_id": ["u", "u"],
                          "ts": [dt.datetime(2026, 7, 21, 10, tzinfo=dt.timezone.utc),
                                 dt.datetime(2026, 7, 5, 9, tzinfo=dt.timezone.utc)],
                          "action": ["roller replaced", "inspection"],
                          "resets_wear": [True, False]})
    out = compute_health(ud, maint)
    h = out["health"].sort("day")
    st = h["status"].to_list()
    assert st[48] in ("watch", "alert")
    assert st[50] == "normal"                            # cleared on the day of the action
    assert "wear reset: 'roller replaced' on 2026-07-21" in h["reasons"][50]
    assert all(s == "normal" for s in st[50:])
    tr = out["trends"].filter(pl.col("as_of") > _day(50))
    assert tr["since"].min() == _day(51)


def test_days_without_evidence_neither_raise_nor_clear():
    # a compliance step from day 20; days 23-26 the drive stands still (no steady data):
    # the watch holds through them and clears only after 3 clean days with data
    rows = _unit(creep_b={k: 0.03 for k in range(20, 23)})
    for r in rows:
        r["steady_samples"] = 800
        if 23 <= (r["day"] - D0).days <= 26:
            r.update(steady_samples=0, creep_a=None, creep_b=None, slip_at_load=None,
                     power_resid_pct=None)
    rows_ud = _frame(rows)
    st = _status(compute_health(rows_ud)["health"])
    assert st[21] == "watch"
    assert st[23:27] == ["watch"] * 4
    assert st[27:29] == ["watch", "watch"] and st[29] == "normal"


def test_ill_conditioned_fit_is_not_an_anomaly_or_actuator():
    # offset a up and compliance b down by the same slip at rated load: the fitted line
    # pivots (narrow load range), slip at rated load is unchanged
    ud = _frame(_unit(creep_a={k: 0.012 for k in (25, 26, 27)},
                      creep_b={k: 0.003 for k in (25, 26, 27)}))
    sc = _scores(ud, {"u": {25, 26, 27}}, value=0.75)
    h = _health(ud, sc)
    assert _status(h) == ["normal"] * N_DAYS


def test_wear_reset_also_clears_gross_slip_of_the_old_contact():
    ud = _frame(_unit(gross_slip_events={30: 4}))
    maint = pl.DataFrame({"unit_id": ["u"],
                          "ts": [dt.datetime(2026, 7, 2, 6, tzinfo=dt.timezone.utc)],
                          "action": ["roller replaced"], "resets_wear": [True]})
    st = _status(_health(ud, maint=maint))
    assert st[30] == "alert" and st[31] == "normal"


def test_large_departure_of_slip_at_load_rises_at_once_moderate_needs_two_days():
    # margin = max(3 sigma, 25 % of (5 % - 1.5 %)) ~ 0.9 points; 2 x margin ~ 1.8 points
    ud = _frame(_unit("big", slip_at_load={k: 0.045 for k in range(30, 40)}),
                _unit("mid", seed=5, slip_at_load={k: 0.028 for k in range(30, 40)}),
                _unit("low", seed=6, slip_at_load={k: -0.01 for k in range(30, 40)}),
                _unit("part", seed=7, slip_at_load={k: 0.045 for k in range(30, 40)},
                      completeness={30: 0.3}))
    h = compute_health(ud)["health"]
    assert _status(h, "big")[29:31] == ["normal", "watch"]        # same day
    assert _status(h, "mid")[29:32] == ["normal", "normal", "watch"]   # k = 2 of 3
    low = h.filter((pl.col("unit_id") == "low") & (pl.col("day") == _day(30))).row(0, named=True)
    assert low["status"] == "watch" and "below this unit's reference" in low["reasons"]
    assert _status(h, "part")[29:32] == ["normal", "normal", "watch"]  # partial day: wait


def test_rising_trend_with_a_small_level_margin_is_a_watch():
    # slip rises 0.02 points a day from day 20: by day ~40 the fitted level is ~0.4 points
    # (> 10 % of the 3.5-point gap, > 3 sigma) above the reference with a significant slope,
    # still below the 25 % level-only margin
    rows = _unit(days=45)
    for r in rows:
        k = (r["day"] - D0).days
        r["creep_b"] = 0.011 + 0.0002 * max(0, k - 20)
        r["slip_at_load"] = 0.015 + 0.0002 * max(0, k - 20)
    h = compute_health(_frame(rows))["health"].sort("day")
    st = h["status"].to_list()
    first = st.index("watch")
    assert 35 <= first <= 44
    assert "rising" in h["reasons"][first] and h["causes"][first] == "wear"
    assert 0.015 + 0.0002 * (first - 20) < 0.015 + 0.25 * 0.035     # below the level margin


def test_output_columns_match_the_contract():
    ud = _frame(_unit(), _unit("v", seed=4))
    h = _health(ud)
    assert h.columns == HEALTH_COLUMNS == table("health").column_names
    assert set(h["status"].unique()) <= {"normal", "watch", "alert"}
    assert h.height == ud.height


def test_invalid_persistence_settings_raise():
    from fleetwatch.errors import ModelError
    ud = _frame(_unit())
    with pytest.raises(ModelError):
        HealthRules(persist_k=4, persist_n=3).fit(ud)


# ------------------------------------------------------------------ status command
def _health_table() -> pl.DataFrame:
    return pl.DataFrame({
        "unit_id": ["A", "A", "B", "B", "C"],
        "day": [_day(0), _day(1), _day(0), _day(1), _day(1)],
        "status": ["normal", "watch", "alert", "normal", "alert"],
        "since": [_day(0), _day(1), _day(0), _day(1), _day(0)],
        "days_to_limit": [None, 30.0, 3.0, None, 9.04],
        "reasons": ["ok", "slip rising", "gross slip", "ok", "limit near"],
        "causes": [None, "wear", "contamination", None, "wear"],
    })


def test_fleet_status_latest_day_worst_first_and_exact_keys():
    rows = fleet_status(_health_table())
    assert [r["unit_id"] for r in rows] == ["C", "A", "B"]
    assert all(tuple(r) == STATUS_KEYS for r in rows)
    assert rows[0] == {"unit_id": "C", "status": "alert", "since": "2026-06-01",
                       "days_to_limit": 9.0, "reasons": "limit near"}
    assert rows[2]["days_to_limit"] is None
    json.dumps(rows)                                    # plain JSON types


def test_fail_on_exit_codes():
    rows = fleet_status(_health_table())
    assert fail_on_exit_code(rows, None) == EXIT_OK
    assert fail_on_exit_code(rows, "alert") == EXIT_FAIL_ON
    assert fail_on_exit_code(rows, "watch") == EXIT_FAIL_ON
    calm = [r for r in rows if r["status"] != "alert"]
    assert fail_on_exit_code(calm, "alert") == EXIT_OK
    assert fail_on_exit_code([r for r in rows if r["status"] == "normal"], "watch") == EXIT_OK
    with pytest.raises(UsageError):
        fail_on_exit_code(rows, "normal")


def test_status_table_prints_the_word_not_only_a_colour():
    text = format_status_table(fleet_status(_health_table()))
    for word in ("alert", "watch", "normal"):
        assert word in text
    assert "3 units: 1 alert, 1 watch, 1 normal" in text


def _cli(args, capsys):
    from fleetwatch.cli import main
    with pytest.raises(SystemExit) as exc:
        main(args)
    out = capsys.readouterr()
    return exc.value.code, out.out, out.err


def test_status_command_json_table_and_fail_on(tmp_path, capsys):
    from fleetwatch.lake import Lake
    Lake(tmp_path / "lake").overwrite("health", _health_table())
    p = ["--project", str(tmp_path), "status"]
    code, out, _ = _cli(p + ["--json"], capsys)
    assert code == 0
    rows = json.loads(out)
    assert [tuple(r) for r in rows] == [STATUS_KEYS] * 3
    assert rows[0]["unit_id"] == "C" and rows[0]["days_to_limit"] == 9.0
    code, out, _ = _cli(p, capsys)
    assert code == 0 and "alert" in out and "watch" in out and "normal" in out
    assert _cli(p + ["--json", "--fail-on", "alert"], capsys)[0] == EXIT_FAIL_ON
    assert _cli(p + ["--fail-on", "watch"], capsys)[0] == EXIT_FAIL_ON
    code, _, err = _cli(p + ["--fail-on", "normal"], capsys)
    assert code == 2 and "Error: --fail-on must be 'watch' or 'alert', got 'normal'" in err


def test_status_command_without_health_table(tmp_path, capsys):
    code, out, err = _cli(["--project", str(tmp_path), "status", "--json"], capsys)
    assert code == 1 and out == ""
    assert "Error: no health table in the lake" in err
    assert "Hint: Ingest logs and run `fleetwatch analyze` first." in err


def test_actuator_reason_on_a_day_without_a_fit_names_when_it_was_last_seen():
    """A held actuator state on a day with no steady running (no creep fit) must still read
    as a sentence with dates, not print a missing number."""
    from fleetwatch.models.health import _Channel

    ch = _Channel("actuator")
    ch.since, ch.last_hit = dt.date(2026, 7, 15), dt.date(2026, 7, 17)
    text = HealthRules()._why_actuator({"creep_a": None, "creep_a__med": 0.0045}, ch,
                                       dt.date(2026, 7, 18), None)
    assert "n/a" not in text
    assert "since 2026-07-15" in text and "last on 2026-07-17" in text
    assert "0.45 %" in text
    with_fit = HealthRules()._why_actuator({"creep_a": 0.031, "creep_a__med": 0.0045}, ch,
                                           dt.date(2026, 7, 18), None)
    assert "3.10 %" in with_fit
