"""Ingest benchmark (run on demand; pytest does not collect it).

    python tests/bench/bench_ingest.py --rows 2000000

Generates a CSV of N telemetry rows with DuckDB, then times in the same run, each in its own
process so that its peak RSS can be measured (os.wait4):

1. ``fleetwatch ingest`` of the file into a fresh lake (validation, dedupe, Delta writes);
2. DuckDB's own CSV -> Parquet COPY of the same file (a lower bound: no checks at all).

Prints rows/s and peak RSS of each, and the ingest accounting.
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


def run_measured(args: list[str], env=None) -> tuple[float, int, str]:
    """(wall s, peak RSS in MB, stdout) of one child process."""
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
    return wall, usage.ru_maxrss // 1024, "".join(out_chunks)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=20_000_000, help="rows to generate")
    ap.add_argument("--units", type=int, default=500, help="distinct unit_id values")
    ap.add_argument("--chunk-rows", type=int, default=None, help="ingest_chunk_rows setting")
    ap.add_argument("--workdir", default=None, help="folder for the CSV and the lake")
    ap.add_argument("--keep", action="store_true", help="keep the work folder")
    a = ap.parse_args(argv)

    work = Path(a.workdir or tempfile.mkdtemp(prefix="fleetwatch-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    csv_path = work / "telemetry.csv"
    try:
        wall, rss, _ = run_measured([sys.executable, "-c", GENERATE, str(a.rows), str(a.units),
                                     str(csv_path)], env)
        size_mb = csv_path.stat().st_size / 1e6
        print(f"generated {a.rows:,} rows, {size_mb:,.0f} MB CSV in {wall:.1f} s")

        proj = work / "proj"
        if proj.exists():
            shutil.rmtree(proj)
        proj.mkdir()
        if a.chunk_rows:
            (proj / "fleetwatch.toml").write_text(f"ingest_chunk_rows = {a.chunk_rows}\n")
        wall_i, rss_i, out = run_measured([sys.executable, "-c", INGEST, str(proj),
                                           str(csv_path)], env)
        rep = json.loads(out.strip().splitlines()[-1])

        pq = work / "copy.parquet"
        wall_c, rss_c, _ = run_measured([sys.executable, "-c", COPY, str(csv_path), str(pq)], env)

        print(f"{'step':<36} {'wall s':>8} {'rows/s':>12} {'peak RSS MB':>12}")
        print(f"{'fleetwatch ingest (process)':<36} {wall_i:>8.1f} {a.rows / wall_i:>12,.0f} "
              f"{rss_i:>12,}")
        print(f"{'  of which ingest_files()':<36} {rep['elapsed_s']:>8.1f} "
              f"{a.rows / rep['elapsed_s']:>12,.0f}")
        print(f"{'duckdb CSV -> Parquet COPY':<36} {wall_c:>8.1f} {a.rows / wall_c:>12,.0f} "
              f"{rss_c:>12,}")
        print("ingest accounting:", json.dumps(rep["totals"]), rep["status"])
        print(f"load average at the end: {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    finally:
        if not a.keep and not a.workdir:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
