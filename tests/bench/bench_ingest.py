"""Ingest benchmark (run on demand; pytest does not collect it).

    python tests/bench/bench_ingest.py --rows 2000000

Generates a CSV of N telemetry rows with DuckDB (rows in time order, units interleaved, as a
fleet logger writes them), then times in the same run, each in its own process so that its
peak RSS and CPU time can be measured (os.wait4):

1. ``fleetwatch ingest`` of the file into a fresh lake (validation, dedupe, Delta writes);
2. DuckDB's own CSV -> Parquet COPY of the same file (a lower bound: no checks at all).

Prints wall time, CPU time (user + system, all threads), rows/s and peak RSS of each, the
wall-time ratio, the ingest accounting and the load average before and after each step.
The machines are shared, so run the pair several times (``--pairs``) and compare ratios.

Options: ``--rows N`` (default 20 M), ``--units N`` (500), ``--chunk-rows N`` (the
ingest_chunk_rows setting), ``--csv PATH`` (use an existing CSV, e.g. one kept from an earlier
run, instead of generating one), ``--pairs N`` (ingest + COPY pairs, back to back),
``--no-copy`` (ingest only, e.g. for the memory check on a very large file),
``--workdir DIR`` (a work folder of your own: it and the CSV in it are left in place) and
``--keep`` (keep the temporary work folder).
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

ROOT = Path(__file__).resolve().parents[2]

GENERATE = """
import duckdb, sys
n, units, out = int(sys.argv[1]), int(sys.argv[2]), sys.argv[3]
duckdb.sql(f'''
COPY (
  SELECT 'U' || lpad(CAST(i % {units} AS VARCHAR), 4, '0') AS unit_id,
         strftime(TIMESTAMP '2024-01-01' + to_seconds(10 * (i // {units})),
                  '%Y-%m-%dT%H:%M:%SZ') AS ts,
         round(40 + 8 * sin(i / 977.0), 2) AS v_in,
         round(2.5 + sin(i / 131.0), 3) AS i_in,
         round(1200 + 300 * sin(i / 5003.0), 1) AS n_in,
         round((1200 + 300 * sin(i / 5003.0)) / 2.0 * 0.98, 1) AS n_out,
         2.0 AS ratio_cmd,
         round(1.5 + 0.5 * sin(i / 77.0), 3) AS t_out,
         round(45 + 10 * sin(i / 10007.0), 1) AS temp
  FROM range({n}) t(i)
) TO '{out}' (HEADER, DELIMITER ',')
''')
"""

INGEST = """
import json, sys, time
from fleetwatch.config import load_settings
from fleetwatch.ingest import ingest_files
t0 = time.perf_counter()
rep = ingest_files([sys.argv[2]], load_settings(sys.argv[1], env={}))
print(json.dumps({"elapsed_s": time.perf_counter() - t0, "totals": rep.totals,
                  "status": [f.status for f in rep.files],
                  "messages": [f.message for f in rep.files]}))
"""

COPY = """
import duckdb, sys, time
t0 = time.perf_counter()
con = duckdb.connect()
con.execute(f"COPY (SELECT * FROM read_csv('{sys.argv[1]}')) TO '{sys.argv[2]}' "
            "(FORMAT parquet, COMPRESSION zstd)")
print(time.perf_counter() - t0)
"""


def run_measured(args: list[str], env=None) -> tuple[float, int, str, float]:
    """(wall s, peak RSS in MB, stdout, CPU s) of one child process; the CPU time's kernel
    part (page faults, memory handed back) is kept in LAST_SYS_S."""
    global LAST_SYS_S
    t0 = time.perf_counter()
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                            text=True)
    out_chunks = []
    # read stdout fully before reaping, so the pipe never blocks the child
    out, err = proc.stdout.read(), proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"{args[:3]} failed ({proc.returncode}):\n{err}")
    out_chunks.append(out)
    LAST_SYS_S = usage.ru_stime
    return wall, usage.ru_maxrss // 1024, "".join(out_chunks), usage.ru_utime + usage.ru_stime


LAST_SYS_S = 0.0


def _load() -> str:
    return "{:.1f}/{:.1f}".format(*os.getloadavg()[:2])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=20_000_000, help="rows to generate")
    ap.add_argument("--units", type=int, default=500, help="distinct unit_id values")
    ap.add_argument("--chunk-rows", type=int, default=None, help="ingest_chunk_rows setting")
    ap.add_argument("--csv", default=None, help="an existing CSV to use instead of generating")
    ap.add_argument("--pairs", type=int, default=1, help="ingest + COPY pairs to run")
    ap.add_argument("--no-copy", action="store_true", help="skip DuckDB's COPY")
    ap.add_argument("--workdir", default=None, help="folder for the CSV and the lake")
    ap.add_argument("--keep", action="store_true", help="keep the work folder")
    a = ap.parse_args(argv)

    work = Path(a.workdir or tempfile.mkdtemp(prefix="fleetwatch-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    try:
        if a.csv:
            csv_path = Path(a.csv)
            with open(csv_path, "rb") as fh:
                rows = sum(b.count(b"\n") for b in iter(lambda: fh.read(1 << 24), b"")) - 1
        else:
            csv_path = work / "telemetry.csv"
            rows = a.rows
            wall, _, _, _ = run_measured([sys.executable, "-c", GENERATE, str(a.rows),
                                            str(a.units), str(csv_path)], env)
            print(f"generated {rows:,} rows in {wall:.1f} s")
        size_mb = csv_path.stat().st_size / 1e6
        print(f"input: {csv_path} ({rows:,} rows, {size_mb:,.0f} MB)")
        print(f"{'step':<30} {'wall s':>7} {'CPU s':>7} {'rows/s':>10} {'peak RSS MB':>11} "
              f"{'load before/after (1/5 min)':>28}")
        ratios = []
        for _ in range(a.pairs):
            proj = work / "proj"
            if proj.exists():
                shutil.rmtree(proj)
            proj.mkdir()
            if a.chunk_rows:
                (proj / "fleetwatch.toml").write_text(f"ingest_chunk_rows = {a.chunk_rows}\n")
            before = _load()
            wall_i, rss_i, out, cpu_i = run_measured([sys.executable, "-c", INGEST, str(proj),
                                                      str(csv_path)], env)
            rep = json.loads(out.strip().splitlines()[-1])
            sys_i = LAST_SYS_S
            print(f"{'fleetwatch ingest (process)':<30} {wall_i:>7.1f} {cpu_i:>7.1f} "
                  f"{rows / wall_i:>10,.0f} {rss_i:>11,} {before + ' -> ' + _load():>28}"
                  f"  (kernel {sys_i:.1f} s)")
            print(f"{'  of which ingest_files()':<30} {rep['elapsed_s']:>7.1f}")
            if rep["totals"]["rows_read"] != rows or rep["status"] != ["ok"]:
                print("ingest accounting:", json.dumps(rep["totals"]), rep["status"])
            shutil.rmtree(proj, ignore_errors=True)
            if a.no_copy:
                continue
            pq = work / "copy.parquet"
            before = _load()
            wall_c, rss_c, _, cpu_c = run_measured([sys.executable, "-c", COPY, str(csv_path),
                                                    str(pq)], env)
            pq.unlink(missing_ok=True)
            print(f"{'duckdb CSV -> Parquet COPY':<30} {wall_c:>7.1f} {cpu_c:>7.1f} "
                  f"{rows / wall_c:>10,.0f} {rss_c:>11,} {before + ' -> ' + _load():>28}"
                  f"  (kernel {LAST_SYS_S:.1f} s)")
            ratios.append(wall_i / wall_c)
            print(f"{'  ratio ingest / COPY':<30} {wall_i / wall_c:>7.2f} {cpu_i / cpu_c:>7.2f}")
        print("ingest accounting:", json.dumps(rep["totals"]), rep["status"])
        if ratios:
            print("wall ratios: " + ", ".join(f"{r:.2f}" for r in ratios))
        print(f"{os.cpu_count()} cores")
    finally:
        if not a.keep and not a.workdir:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
