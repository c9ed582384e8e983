"""Benchmark of ``fleetwatch analyze`` (run on demand; not collected by pytest).

    python tests/bench/bench_analyze.py                         # 200 units x 365 d at 60 s
    python tests/bench/bench_analyze.py --units 20 --days 60    # scaled down
    python tests/bench/bench_analyze.py --workdir /tmp/fwbench --keep --json

Steps (each measured phase runs in its own child process, so its peak RSS is its own):

1. simulate the fleet with ``fleetwatch.simulate.simulate_fleet`` (CSV files);
2. load the telemetry into a lake, all days but the last, one Delta append per month. This
   bypasses ``ingest`` (its validation is benchmarked elsewhere): DuckDB reads the CSVs,
   drops the rows that do not parse and the duplicates. The maintenance log goes through
   ``ingest_files``;
3. the floor: DuckDB's bare scan of the telemetry columns analyze reads (count and sums);
4. ``analyze(full=True)``;
5. append the last day and run the default incremental ``analyze``.

Prints wall time, CPU time (user + system, less sensitive to a busy machine) and peak RSS
per phase (and JSON with ``--json``).
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve()
ROOT = HERE.parents[2]

_CSV_SQL = """
SELECT drive::VARCHAR AS unit_id,
       TRY_CAST(time AS TIMESTAMPTZ) AS ts,
       TRY_CAST(motor_volts AS DOUBLE) AS v_in,
       TRY_CAST(motor_amps AS DOUBLE) AS i_in,
       TRY_CAST(motor_volts AS DOUBLE) * TRY_CAST(motor_amps AS DOUBLE) AS p_in,
       TRY_CAST(input_speed_rpm AS DOUBLE) AS n_in,
       TRY_CAST(output_speed_rpm AS DOUBLE) AS n_out,
       TRY_CAST(ratio_setpoint AS DOUBLE) AS ratio_cmd,
       TRY_CAST(torque_out_nm AS DOUBLE) AS t_out,
       TRY_CAST(temperature_c AS DOUBLE) AS temp
FROM read_csv($files, all_varchar = true, header = true)
"""


def _settings(work: Path, period_s: float):
    sys.path.insert(0, str(ROOT))
    from fleetwatch.config import load_settings
    return load_settings(work / "project", overrides={"sample_period_s": period_s}, env={})


# ---------------------------------------------------------------- phases (child processes)
def phase_simulate(work: Path, a: dict) -> dict:
    from fleetwatch.simulate import simulate_fleet
    res = simulate_fleet(work / "sim", units=a["units"], days=a["days"],
                         period_s=a["period_s"], seed=a["seed"], start=a["start"])
    return {"rows": res.rows}


def _append(lake, con, where: str, batch: str) -> int:
    tbl = con.sql(f"""
        SELECT * EXCLUDE (rn), '{batch}' AS batch_id FROM (
            SELECT *, row_number() OVER (PARTITION BY unit_id, ts ORDER BY v_in) AS rn
            FROM staged WHERE {where})
        WHERE rn = 1 ORDER BY unit_id, ts""").to_arrow_table()
    if tbl.num_rows:
        lake.append("telemetry", tbl)
    return tbl.num_rows


def phase_load(work: Path, a: dict) -> dict:
    import duckdb
    from fleetwatch.ingest import ingest_files
    from fleetwatch.lake import Lake
    s = _settings(work, a["period_s"])
    sim = work / "sim"
    ingest_files([sim / "maintenance.csv"], s, mapping=sim / "maintenance_mapping.toml",
                 kind="maintenance")
    files = sorted(str(p) for p in sim.glob("telemetry_*.csv"))
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute("SET memory_limit = '3GB'")
    con.execute(f"SET temp_directory = '{work / 'duck_tmp'}'")
    con.execute("CREATE TABLE staged AS SELECT * FROM (" + _CSV_SQL + ") "
                "WHERE unit_id <> '' AND ts IS NOT NULL AND n_in >= 0 AND n_out >= 0 "
                "AND v_in IS NOT NULL AND i_in IS NOT NULL AND ratio_cmd IS NOT NULL",
                {"files": files})
    last_day = con.sql("SELECT max(ts)::DATE FROM staged").fetchall()[0][0]
    months = [r[0] for r in con.sql(
        "SELECT DISTINCT strftime(ts, '%Y-%m') FROM staged ORDER BY 1").fetchall()]
    lake = Lake.from_settings(s)
    rows = 0
    with lake.writer("bench"):
        for m in months:
            rows += _append(lake, con, f"strftime(ts, '%Y-%m') = '{m}' AND ts::DATE < "
                            f"DATE '{last_day}'", f"bench-{m}")
    con.execute(f"COPY (SELECT * FROM staged WHERE ts::DATE = DATE '{last_day}') "
                f"TO '{work / 'last_day.parquet'}' (FORMAT parquet)")
    return {"rows": rows, "last_day": str(last_day)}


def phase_scan(work: Path, a: dict) -> dict:
    from fleetwatch.lake import Lake
    lake = Lake.from_settings(_settings(work, a["period_s"]))
    con = lake.connect(["telemetry"])
    t0 = time.perf_counter()
    r = con.sql("SELECT count(*), sum(v_in), sum(i_in), sum(p_in), sum(n_in), sum(n_out), "
                "sum(ratio_cmd), sum(t_out), sum(temp) "
                "FROM telemetry").fetchall()[0]
    return {"rows": r[0], "scan_s": time.perf_counter() - t0}


def phase_analyze(work: Path, a: dict, full: bool) -> dict:
    from fleetwatch.analyze import analyze
    rep = analyze(_settings(work, a["period_s"]), full=full)
    return rep.as_dict()


def phase_append_last_day(work: Path, a: dict) -> dict:
    import duckdb
    from fleetwatch.lake import Lake
    lake = Lake.from_settings(_settings(work, a["period_s"]))
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    con.execute(f"CREATE TABLE staged AS SELECT * FROM '{work / 'last_day.parquet'}'")
    with lake.writer("bench"):
        rows = _append(lake, con, "true", "bench-last-day")
    return {"rows": rows}


def phase_drop_last_day(work: Path, a: dict) -> dict:
    """For --reuse: take the last day out again, so the incremental run has new data."""
    import duckdb
    from fleetwatch.lake import Lake
    last = duckdb.sql(f"SELECT max(ts)::DATE FROM '{work / 'last_day.parquet'}'").fetchall()[0][0]
    lake = Lake.from_settings(_settings(work, a["period_s"]))
    with lake.writer("bench"):
        lake.delete_where("telemetry", f"day = '{last}'")
    return {"dropped_day": str(last)}


PHASES = {
    "simulate": phase_simulate,
    "load": phase_load,
    "scan": phase_scan,
    "analyze_full": lambda w, a: phase_analyze(w, a, True),
    "append_last_day": phase_append_last_day,
    "analyze_incremental": lambda w, a: phase_analyze(w, a, False),
    "drop_last_day": phase_drop_last_day,
}


def _run_child(phase: str, work: Path, args: dict) -> dict:
    """Run one phase in a child process; returns its result, wall time and peak RSS."""
    t0 = time.perf_counter()
    p = subprocess.Popen([sys.executable, str(HERE), "--child", phase, "--workdir", str(work),
                          "--args", json.dumps(args)], stdout=subprocess.PIPE, text=True,
                         env={**os.environ, "PYTHONPATH": str(ROOT)})
    out = p.stdout.read()
    _, status, ru = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    if p.returncode != 0:
        raise SystemExit(f"phase {phase} failed with exit code {p.returncode}")
    res = json.loads(out.strip().splitlines()[-1])
    return {"phase": phase, "wall_s": round(wall, 2),
            "cpu_s": round(ru.ru_utime + ru.ru_stime, 2),
            "peak_rss_mb": round(ru.ru_maxrss / 1024), "result": res}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=200)
    ap.add_argument("--days", type=int, default=365)
    ap.add_argument("--period-s", type=float, default=60.0)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--start", default="2026-01-05")
    ap.add_argument("--workdir", type=Path, default=None,
                    help="Folder for the CSVs and the lake (default: a temp folder).")
    ap.add_argument("--keep", action="store_true", help="Keep the work folder.")
    ap.add_argument("--reuse", action="store_true",
                    help="Skip simulate and load when the work folder already has a lake.")
    ap.add_argument("--json", action="store_true", help="Print the results as JSON.")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    ap.add_argument("--args", help=argparse.SUPPRESS)
    ns = ap.parse_args(argv)

    if ns.child:
        res = PHASES[ns.child](ns.workdir, json.loads(ns.args))
        print(json.dumps(res, default=str))
        return 0

    args = {"units": ns.units, "days": ns.days, "period_s": ns.period_s, "seed": ns.seed,
            "start": ns.start}
    work = ns.workdir or Path(tempfile.mkdtemp(prefix="fleetwatch-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    results = []
    try:
        phases = ["simulate", "load", "scan", "analyze_full", "append_last_day",
                  "analyze_incremental"]
        if ns.reuse and (work / "project" / "lake" / "telemetry").is_dir():
            phases = ["drop_last_day", "scan", "analyze_full", "append_last_day",
                      "analyze_incremental"]
        for ph in phases:
            r = _run_child(ph, work, args)
            results.append(r)
            if not ns.json:
                print(f"{ph:<22} {r['wall_s']:>9.1f} s wall {r['cpu_s']:>9.1f} s CPU  "
                      f"peak RSS {r['peak_rss_mb']:>6} MB  "
                      f"{json.dumps(r['result'], default=str)[:150]}", flush=True)
    finally:
        if not ns.keep and ns.workdir is None:
            shutil.rmtree(work, ignore_errors=True)
    if ns.json:
        print(json.dumps({"args": args, "phases": results}, indent=1, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
