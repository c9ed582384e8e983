"""analyze on a simulated fleet: simulate -> ingest -> analyze (incremental), checked against
the simulator's answer key and against physics, not against the simulator's fault shapes.

The fleet is ``tests.fixtures_fleet.build_fleet``: 8 drives, 45 days, 5-minute logging, one
unit of each fault kind; June is ingested and analyzed first, July afterwards (incremental).
"""
from __future__ import annotations

import datetime as dt
import json
import socket
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from pyarrow import table as pa_table

from fleetwatch.analyze import DERIVED, analyze
from fleetwatch.config import load_settings
from fleetwatch.errors import ConfigError, LakeError, LockHeldError
from fleetwatch.lake import Lake
from fleetwatch.schema import TABLES
from fixtures_fleet import build_fleet

UTC = dt.timezone.utc


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    return build_fleet(tmp_path_factory.mktemp("fleet"))


#: Tables of the health stage (run_models) and their keys.
MODEL_KEYS = {"scores": ["unit_id", "day"], "trends": ["unit_id", "indicator", "as_of"],
              "health": ["unit_id", "day"]}


@pytest.fixture(scope="module")
def tables(fleet):
    lake = Lake.from_settings(fleet.settings)
    return {n: lake.read(n) for n in (*DERIVED, *MODEL_KEYS)}


def _assert_same_tables(before: dict, lake: Lake) -> None:
    """Every derived and health-stage table of ``lake`` equals ``before`` (row for row)."""
    for name in (*DERIVED, *MODEL_KEYS):
        key = MODEL_KEYS.get(name) or list(TABLES[name].key)
        inc = before[name].sort(key)
        full = lake.read(name).sort(key)
        assert inc.height == full.height, name
        for col in inc.columns:
            a, b = inc[col], full[col]
            if a.dtype.is_float():
                np.testing.assert_allclose(a.to_numpy(), b.to_numpy(), rtol=1e-9, atol=1e-9,
                                           err_msg=f"{name}.{col}")
            else:
                assert a.to_list() == b.to_list(), f"{name}.{col}"


def _ts(s: str) -> dt.datetime:
    return dt.datetime.fromisoformat(s.replace("Z", "+00:00"))


# ---------------------------------------------------------------- contract and runs
def test_reports_say_what_was_done(fleet):
    a, b = fleet.first, fleet.second
    assert a.full and "first analyze" in a.reason
    assert not b.full and "day(s) with new or changed telemetry" in b.reason
    # the second run recomputes from the day before the new month (or before a unit's last
    # sample before it: a pause that ends in new data is whole), not from the start and not
    # from that day's Monday: the state holds the week's earlier motor sums
    assert dt.date(2026, 6, 1) < b.from_day <= dt.date(2026, 6, 30)
    assert b.days_recomputed < 45 and b.units == 8
    assert set(a.tables) == set(DERIVED) and all(v > 0 for v in a.tables.values())
    assert "health models ran" in b.models
    again = analyze(fleet.settings)
    assert again.tables == {} and "no new telemetry" in again.reason


def test_derived_tables_have_exactly_the_contract_columns(fleet):
    lake = Lake.from_settings(fleet.settings)
    con = lake.connect(list(DERIVED))
    for name in DERIVED:
        cols = con.execute(f"DESCRIBE {name}").fetchall()
        got = [(c[0], c[1]) for c in cols]
        want = [(c.name, c.type.replace("TIMESTAMPTZ", "TIMESTAMP WITH TIME ZONE"))
                for c in TABLES[name].columns]
        assert got == want, name
        dup = con.execute(f"SELECT count(*) - count(DISTINCT ({', '.join(TABLES[name].key)})) "
                          f"FROM {name}").fetchall()[0][0]
        assert dup == 0, f"{name}: duplicate keys"


def test_incremental_equals_full_rebuild(fleet, tables):
    rep = analyze(fleet.settings, full=True)
    assert rep.full and rep.days_recomputed == 45
    assert "health models ran (" in rep.models          # --full: the models over all days
    _assert_same_tables(tables, Lake.from_settings(fleet.settings))


def test_one_new_day_incremental_equals_full_rebuild(fleet, monkeypatch):
    """The daily case: take the last day out, analyze, put it back and analyze again. Only
    the last days are recomputed (the health stage resumes from its saved state; the weekly
    motor fits add the state's day sums; the reference fits of units whose reference period
    is over come from the state's files) and every table equals a full rebuild on the same
    data."""
    from fleetwatch import fits
    lake = Lake.from_settings(fleet.settings)
    last = lake.read("telemetry", columns=["day"])["day"].max()
    rows = lake.read("telemetry", filter_sql=f"day = DATE '{last.isoformat()}'")
    assert rows.height > 0
    with lake.writer("test"):
        lake.delete_where("telemetry", f"day = '{last.isoformat()}'")
    analyze(fleet.settings)
    with lake.writer("test"):
        lake.append("telemetry", rows)
    ref_rows = []
    real = fits.creep_reference_bins

    def counting(ref_cw, segments):
        ref_rows.append(ref_cw.height)
        return real(ref_cw, segments)
    monkeypatch.setattr(fits, "creep_reference_bins", counting)
    rep = analyze(fleet.settings)
    assert not rep.full and rep.days_recomputed <= 9
    assert rep.from_day >= last - dt.timedelta(days=9)
    # the health stage resumed at the Monday of the first recomputed day or later
    start = dt.date.fromisoformat(rep.models.split("health models ran from ")[1][:10])
    monday = rep.from_day - dt.timedelta(days=rep.from_day.weekday())
    assert start.weekday() == 0 and monday <= start <= last
    # the state keeps the day sums up to the new day and names the reference-fit files
    meta = Path(lake.path) / "_fleetwatch"
    state = json.loads((meta / "_analyze_state.json").read_text())
    assert state["motor_day_sums"]["days"][-1] == last.isoformat()
    token = state["ref_cache"]["token"]
    assert sorted(p.name for p in meta.glob("analyze_ref_*")) == [
        f"analyze_ref_bins_{token}.parquet", f"analyze_ref_power_{token}.parquet"]
    inc = {n: lake.read(n) for n in (*DERIVED, *MODEL_KEYS)}
    incremental_ref_rows = sum(ref_rows)
    ref_rows.clear()
    full = analyze(fleet.settings, full=True)
    assert full.full
    # the incremental run refitted no unit whose reference period was long over
    assert incremental_ref_rows < sum(ref_rows) / 2
    _assert_same_tables(inc, lake)


def test_windows_are_stored_month_by_month_and_a_new_day_leaves_old_files(fleet,
                                                                           monkeypatch):
    """windows and efficiency are written in (month, unit, time) order in files of a bounded
    size, so the daily run's replacement of its recent days rewrites only the files that
    hold those days: every older file stays as it was."""
    import deltalake

    import fleetwatch.analyze as A
    monkeypatch.setattr(A, "STREAM_FILE_BYTES", 150_000)
    monkeypatch.setattr(A, "STREAM_ROW_GROUP", 4096)
    lake = Lake.from_settings(fleet.settings)
    last = lake.read("telemetry", columns=["day"])["day"].max()
    rows = lake.read("telemetry", filter_sql=f"day = DATE '{last.isoformat()}'")
    with lake.writer("test"):
        lake.delete_where("telemetry", f"day = '{last.isoformat()}'")
    analyze(fleet.settings, full=True)

    def files(name):
        adds = pl.from_arrow(pa_table(deltalake.DeltaTable(
            str(Path(lake.path) / name)).get_add_actions(flatten=True)))
        return {r["path"]: (r["min.day"], r["max.day"]) for r in adds.iter_rows(named=True)}
    before = {n: files(n) for n in ("windows", "efficiency")}
    for n, f in before.items():
        assert len(f) >= 3, n
        # month-major order: no file holds days of more than two months
        assert all((b.year * 12 + b.month) - (a.year * 12 + a.month) <= 1
                   for a, b in f.values()), n
    with lake.writer("test"):
        lake.append("telemetry", rows)
    rep = analyze(fleet.settings)
    assert not rep.full
    for n in ("windows", "efficiency"):
        after = files(n)
        old = {p for p, (a, b) in before[n].items() if b < rep.from_day}
        assert old and old <= set(after), n          # untouched: same files, same paths
        assert set(before[n]) - set(after)            # the recent ones were rewritten


def test_plan_recomputes_from_new_or_removed_days_and_whole_pauses(tmp_path):
    import duckdb
    from fleetwatch.analyze import plan_analysis, state_after

    cfg = load_settings(tmp_path, env={})
    t0 = dt.datetime(2026, 6, 1, tzinfo=UTC)            # a Monday
    hours = [t0 + dt.timedelta(hours=h) for h in range(24 * 20)]       # June 1-20

    def frame(rows):
        return pl.DataFrame(rows, schema={"unit_id": pl.String,
                                          "ts": pl.Datetime("us", "UTC")}, orient="row"
                            ).with_columns(day=pl.col("ts").dt.date())

    base = [("U1", t) for t in hours] + [("U2", t) for t in hours if t.day <= 14]
    con = duckdb.connect()
    con.register("telemetry", frame(base).to_arrow())
    first = plan_analysis(con, cfg, None, False, False)
    assert first.full and first.from_day == dt.date(2026, 6, 1)
    state = state_after(first)
    assert plan_analysis(con, cfg, state, False, True).empty
    assert plan_analysis(con, cfg, state, True, True).full
    # one new day for U1: from the Monday on or before June 20 (the day before)
    new_day = [("U1", t0 + dt.timedelta(days=20, hours=h)) for h in range(24)]
    con.register("telemetry", frame(base + new_day).to_arrow())
    p = plan_analysis(con, cfg, state, False, True)
    assert not p.full and p.from_day == dt.date(2026, 6, 15)
    assert p.to_day == dt.date(2026, 6, 22)
    # with the week's earlier per-day motor sums in the state and U1's motor fitted before
    # that week, the run starts on the day before U1's previous sample (June 20, 23:00)
    # instead of that day's Monday
    week = [f"2026-06-{d:02d}" for d in range(15, 20)]
    st2 = dict(state, motor_day_sums={"days": week, "rows": []},
               motor_first_usable={"U1": "2026-06-01", "U2": "2026-06-01"})
    p2 = plan_analysis(con, cfg, st2, False, True)
    assert p2.from_day == dt.date(2026, 6, 19) and p2.to_day == dt.date(2026, 6, 22)
    # one of those days missing from the state, or U1 first fitted in that week: its Monday
    st3 = dict(st2, motor_day_sums={"days": [d for d in week if d != "2026-06-16"],
                                    "rows": []})
    assert plan_analysis(con, cfg, st3, False, True).from_day == dt.date(2026, 6, 15)
    st4 = dict(st2, motor_first_usable={"U1": "2026-06-15"})
    assert plan_analysis(con, cfg, st4, False, True).from_day == dt.date(2026, 6, 15)
    # U2 comes back after six silent days: its pause starts on June 14
    back = [("U2", t0 + dt.timedelta(days=20, hours=h)) for h in range(24)]
    con.register("telemetry", frame(base + new_day + back).to_arrow())
    assert plan_analysis(con, cfg, state, False, True).from_day == dt.date(2026, 6, 8)
    # rows removed from June 17 also count as a change
    gone = [r for r in base if r[1].day != 17]
    con.register("telemetry", frame(gone).to_arrow())
    assert plan_analysis(con, cfg, state, False, True).from_day == dt.date(2026, 6, 15)
    # ... and with the day sums at hand still from the Monday (whose rows went is unknown)
    assert plan_analysis(con, cfg, st2, False, True).from_day == dt.date(2026, 6, 15)
    # a change inside the reference period (the first 14 days) redoes it from its start
    gone = [r for r in base if r[1].day != 10 or r[0] != "U1"]
    con.register("telemetry", frame(gone).to_arrow())
    assert plan_analysis(con, cfg, state, False, True).from_day == dt.date(2026, 6, 1)
    # another window length is another analysis: everything again
    con.register("telemetry", frame(base).to_arrow())
    other = cfg.replace(window_min=15)
    assert plan_analysis(con, other, state, False, True).full


# ---------------------------------------------------------------- physics against the key
def test_motor_constants_recover_the_true_r_and_k_e(fleet, tables):
    mf = tables["motor_fits"]
    for unit, t in fleet.key["units"].items():
        m = mf.filter((pl.col("unit_id") == unit) & (pl.col("n") >= 30))
        assert m.height >= 5, unit
        # R referred to 20 degC via the logged temperature (domain.md 1.4, alpha from memory)
        assert m["r_ohm"].median() == pytest.approx(t["motor"]["r_ohm_20c"], rel=0.05), unit
        assert m["k_e"].median() == pytest.approx(t["motor"]["k_e_v_s_per_rad"], rel=0.05), unit
        # no motor fault is simulated: weekly constants stay within a few per cent
        assert m["r_drift_pct"].abs().max() < 3.0, unit
        assert m["k_e_drift_pct"].abs().max() < 1.0, unit


def _creep_b(ud, unit, d0, d1):
    x = ud.filter((pl.col("unit_id") == unit) & (pl.col("day") >= d0) & (pl.col("day") < d1))
    return x["creep_b"].drop_nulls().median()


def test_compliance_flat_on_healthy_units_and_rising_on_worn_ones(fleet, tables):
    ud = tables["unit_days"]
    start = dt.date(2026, 6, 1)
    ref = (start, start + dt.timedelta(days=14))
    late = (start + dt.timedelta(days=31), start + dt.timedelta(days=45))
    change = {}
    for unit in fleet.key["units"]:
        change[unit] = _creep_b(ud, unit, *late) / _creep_b(ud, unit, *ref) \
            if _creep_b(ud, unit, *late) is not None else None
    healthy = fleet.units("healthy") + fleet.units("stall")   # stalls do not touch the contact
    worn = fleet.units("wear")
    assert healthy and worn
    for u in healthy:
        assert 0.85 < change[u] < 1.15, (u, change[u])
    for u in worn:
        assert change[u] > 1.5, (u, change[u])
    # the weekly per-bin fits tell the same story
    cf = tables["creep_fits"]
    for u in worn:
        w = cf.filter(pl.col("unit_id") == u)
        ref_b = w.filter(pl.col("is_reference"))["b"].median()
        last_b = w.filter(pl.col("week_start") == w["week_start"].max())["b"].median()
        assert last_b > 1.5 * ref_b


def test_slip_at_load_tracks_the_true_slip_at_rated_load(fleet, tables):
    """The key's slip_at_ref_by_day is the noise-free usage-averaged slip at load_ref_nm
    (1 N*m motor torque); the daily robust creep fit must land near it while the contact
    is in its micro-slip range."""
    ud = tables["unit_days"]
    start = dt.date.fromisoformat(fleet.key["args"]["start"])
    for unit, t in fleet.key["units"].items():
        if t["condition"] in ("sensor_flatline", "actuator", "contamination"):
            continue
        truth = pl.DataFrame({"day": [start + dt.timedelta(days=i)
                                      for i in range(len(t["slip_at_ref_by_day"]))],
                              "truth": t["slip_at_ref_by_day"]})
        d = ud.filter(pl.col("unit_id") == unit).join(truth, on="day").filter(
            pl.col("slip_at_load").is_not_null() & (pl.col("truth") < 0.04))
        err = (d["slip_at_load"] - d["truth"]).abs().median()
        assert err < 0.005, (unit, err)


def test_actuator_fault_shows_as_a_load_independent_offset(fleet, tables):
    ud = tables["unit_days"]
    for unit in fleet.units("actuator"):
        onset = _ts(fleet.key["units"][unit]["fault_start_ts"]).date()
        d = ud.filter(pl.col("unit_id") == unit).drop_nulls("creep_a")
        before = d.filter(pl.col("day") < onset)
        after = d.filter(pl.col("day") > onset + dt.timedelta(days=1))
        spread = (before["creep_a"] - before["creep_a"].median()).abs().median()
        shift = abs(after["creep_a"].median() - before["creep_a"].median())
        assert shift > 0.01 and shift > 20 * spread, (shift, spread)
        # the compliance b barely moves: the offset does not depend on load
        assert after["creep_b"].median() == pytest.approx(before["creep_b"].median(), rel=0.3)


def test_gross_slip_events_follow_contamination_onset_and_not_before(fleet, tables):
    ev = tables["events"].filter(pl.col("kind") == "gross_slip")
    for unit in fleet.units("contamination"):
        onset = _ts(fleet.key["units"][unit]["fault_start_ts"])
        mine = ev.filter(pl.col("unit_id") == unit)
        assert mine.height >= 1
        assert mine["start_ts"].min() >= onset
        assert (mine["peak"] > fleet.settings.gross_slip_limit).all()
    # no gross slip on units whose contact is sound
    for unit in fleet.units("healthy") + fleet.units("stall") + fleet.units("actuator") \
            + fleet.units("sensor_flatline"):
        assert ev.filter(pl.col("unit_id") == unit).height == 0, unit


def test_stall_events_match_the_injected_stalls(fleet, tables):
    ev = tables["events"].filter(pl.col("kind") == "stall")
    for unit, t in fleet.key["units"].items():
        mine = ev.filter(pl.col("unit_id") == unit)
        assert mine["samples"].sum() == t["events"]["stall_samples"], unit
        if t["condition"] == "stall":
            assert mine.height >= 3
            assert mine["start_ts"].min() == _ts(t["fault_start_ts"])
            assert (mine["peak"] > fleet.settings.stall_i_a).all()
            # they happen at starts in steep ratios (above the advisor's start limit)
            assert (mine["ratio_cmd"] > fleet.settings.max_start_ratio).all()


def test_ratio_changes_while_stopped_match_the_key(fleet, tables):
    """Exact, except where a logger gap hides when the command changed (then the log cannot
    tell a change at standstill from one while running): at most one per gap."""
    ev = tables["events"].filter(pl.col("kind") == "ratio_change_stopped")
    total = 0
    for unit, t in fleet.key["units"].items():
        found = ev.filter(pl.col("unit_id") == unit).height
        gaps = len(t["gaps"]) + len(fleet.key["line_gaps"][t["line"]])
        assert abs(found - t["events"]["ratio_changes_while_stopped"]) <= gaps, unit
        total += t["events"]["ratio_changes_while_stopped"]
    assert ev.height >= 0.9 * total


def test_flatline_only_on_the_stuck_sensor_after_onset(fleet, tables):
    ev = tables["events"].filter(pl.col("kind") == "flatline")
    for unit, t in fleet.key["units"].items():
        mine = ev.filter(pl.col("unit_id") == unit)
        if t["condition"] == "sensor_flatline":
            assert set(mine["signal"]) == {"n_out"}
            assert mine["start_ts"].min() == _ts(t["fault_start_ts"])
            assert mine["description"][0].startswith("n_out stuck at ")
        else:
            assert mine.height == 0, unit


def test_every_logger_gap_is_a_data_gap_event(fleet, tables):
    ev = tables["events"].filter(pl.col("kind") == "data_gap")
    line_gaps = fleet.key["line_gaps"]
    for unit, t in fleet.key["units"].items():
        mine = ev.filter(pl.col("unit_id") == unit)
        for a, b in t["gaps"] + line_gaps[t["line"]]:
            a, b = _ts(a), _ts(b)
            hit = mine.filter((pl.col("start_ts") < b) & (pl.col("end_ts") >= a))
            assert hit.height >= 1, (unit, a, b)
        assert (mine["peak"] > fleet.settings.gap_min_s).all()


def test_efficiency_measured_only_where_torque_is_logged(fleet, tables):
    eff = tables["efficiency"]
    for unit, t in fleet.key["units"].items():
        mine = eff.filter(pl.col("unit_id") == unit)
        methods = set(mine["method"])
        if t["instrumented"]:
            assert methods == {"measured"}
            e = mine["efficiency"].drop_nulls()
            # elastomer friction-wheel variators: roughly 75-90 % (domain.md 2.5, from
            # memory), times the motor's own efficiency here (electrical input power)
            assert 0.5 < e.median() < 0.95
            v = mine["variator_efficiency"].drop_nulls()
            assert e.median() < v.median() < 1.0
        else:
            assert methods == {"residual_only"}
            assert mine["efficiency"].null_count() == mine.height
        # the residual of a sound unit is centred on zero
        if t["condition"] in ("healthy", "stall"):
            assert abs(mine["power_resid_pct"].median()) < 2.0


def test_unit_days_count_the_events_of_each_day(fleet, tables):
    ud, ev = tables["unit_days"], tables["events"]
    counts = ev.group_by("unit_id", "day", "kind").len()
    for kind, col in (("stall", "stall_events"), ("gross_slip", "gross_slip_events"),
                      ("data_gap", "gap_events")):
        c = counts.filter(pl.col("kind") == kind).select("unit_id", "day", n="len")
        j = ud.join(c, on=["unit_id", "day"], how="left").with_columns(
            pl.col("n").fill_null(0))
        assert (j[col] == j["n"]).all(), kind
    assert ud.filter(pl.col("samples") > 0)["completeness"].max() <= 1.0 + 1e-9
    assert ud.height == 8 * 45


# ---------------------------------------------------------------- errors and the CLI
def test_analyze_without_telemetry_says_what_to_do(tmp_path):
    s = load_settings(tmp_path, env={})
    with pytest.raises(LakeError, match="no telemetry") as ei:
        analyze(s)
    assert "fleetwatch ingest" in ei.value.hint


def test_analyze_refuses_a_window_that_does_not_divide_a_day(tmp_path):
    s = load_settings(tmp_path, overrides={"window_min": 7}, env={})
    with pytest.raises(ConfigError, match="does not divide a day") as ei:
        analyze(s)
    assert ei.value.exit_code == 2


def test_analyze_refuses_while_another_process_writes(tmp_path):
    s = load_settings(tmp_path, env={})
    meta = s.lake_path / "_fleetwatch"
    meta.mkdir(parents=True)
    holder = {"pid": 1, "host": socket.gethostname(), "purpose": "ingest",
              "since": "2026-01-01T00:00:00Z", "token": "x"}
    (meta / "writer.lock").write_text(json.dumps(holder))   # pid 1 is alive: not stale
    with pytest.raises(LockHeldError, match="purpose 'ingest'"):
        analyze(s)


def test_cli_analyze_json_and_error_lines(fleet, tmp_path, capsys, monkeypatch):
    from fleetwatch.cli import main

    monkeypatch.setenv("FLEETWATCH_SAMPLE_PERIOD_S", str(fleet.settings.sample_period_s))
    with pytest.raises(SystemExit) as ei:
        main(["--project", str(fleet.project), "analyze", "--json"])
    assert ei.value.code == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["reason"].startswith("no new telemetry") and rep["tables"] == {}
    assert rep["models"].startswith("health models ran")
    with pytest.raises(SystemExit) as ei:
        main(["--project", str(tmp_path), "analyze"])
    assert ei.value.code == 1
    err = capsys.readouterr().err.splitlines()
    assert err[0] == "Error: the lake has no telemetry yet"
    assert err[1].startswith("Hint: Ingest drive logs first")


def test_chunk_tables_keep_their_column_types_through_parquet_parts(fleet, monkeypatch):
    """analyze moves each chunk's window-level tables out of DuckDB into Parquet parts and
    reads them back as views: every column must come back with the type the SQL model
    produced (DuckDB writes some types, HUGEINT for one, as another Parquet type)."""
    from fleetwatch import analyze as an
    real = an._park_chunk
    seen: dict[str, tuple[list, list]] = {}

    def checking(con, parts, k):
        before = {n: con.sql(f"DESCRIBE {n}").fetchall() for n in an.CHUNK_TABLES}
        real(con, parts, k)
        for n in an.CHUNK_TABLES:
            after = con.sql(f"DESCRIBE SELECT * FROM read_parquet("
                            f"'{parts / n / f'part-{k:05d}.parquet'}')").fetchall()
            seen[n] = ([r[:2] for r in before[n]], [r[:2] for r in after])
    monkeypatch.setattr(an, "_park_chunk", checking)
    analyze(fleet.settings, full=True)
    assert set(seen) == set(an.CHUNK_TABLES)
    for name, (before, after) in seen.items():
        assert before == after, name


def test_analyze_works_in_a_temp_folder_whose_name_has_a_quote(fleet, tmp_path, monkeypatch):
    """The run's temp folder (spill files, chunk parts) goes into SQL text: a quote in its
    path must not break the statement."""
    import tempfile
    odd = tmp_path / "it's here"
    odd.mkdir()
    monkeypatch.setattr(tempfile, "tempdir", str(odd))
    rep = analyze(fleet.settings, full=True)
    assert rep.full and rep.tables["windows"] > 0
    assert list(odd.iterdir()) == []                    # the run cleaned up after itself
