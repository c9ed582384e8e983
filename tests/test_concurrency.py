"""Crash safety and concurrent readers, with real processes (deltalake cannot fork).

- SIGKILL an ingest at random points in a batch, several times, then re-run: the lake ends
  complete, without duplicates and with exact accounting.
- A reader process counts rows in a loop while another process ingests: no errors, counts
  never go down, and it never sees part of a batch (telemetry rows = accepted rows of the
  ledger in the same snapshot).
"""
import json
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import polars as pl

from fleetwatch.config import load_settings
from fleetwatch.lake import Lake

ENV = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}

INGEST = textwrap.dedent("""
    import sys
    from fleetwatch.config import load_settings
    from fleetwatch.ingest import ingest_files
    def progress(path, done, total):
        print("progress", done, total, flush=True)
    rep = ingest_files(sys.argv[2:], load_settings(sys.argv[1], env={}), progress=progress)
    print("done", rep.totals, flush=True)
""")

READER = textwrap.dedent("""
    import json, sys, os, time
    from fleetwatch.lake import Lake
    lake, stop = Lake(sys.argv[1]), sys.argv[2]
    reads, errors, partial, decreases, last, seen = 0, [], 0, 0, -1, []
    while True:
        finished = os.path.exists(stop)
        try:
            con = lake.connect(["telemetry", "batches"])
            views = {r[0] for r in con.execute("SELECT view_name FROM duckdb_views()").fetchall()}
            n = con.execute("SELECT count(*) FROM telemetry").fetchone()[0] \\
                if "telemetry" in views else 0
            ok = con.execute("SELECT coalesce(sum(accepted), 0) FROM batches "
                             "WHERE status = 'ok'").fetchone()[0] if "batches" in views else 0
            con.close()
            reads += 1
            partial += n != ok
            decreases += n < last
            last = n
            seen.append(n)
        except Exception as exc:
            errors.append(repr(exc))
        if finished:
            break
    print(json.dumps({"reads": reads, "errors": errors, "partial": partial,
                      "decreases": decreases, "distinct": sorted(set(seen))}))
""")


def _write_export(path: Path, n: int, unit_prefix: str, seed: int):
    """A CSV with n clean rows, then 1 % exact duplicates and 20 corrupt rows."""
    rng = random.Random(seed)
    t0 = datetime(2024, 7, 1, tzinfo=timezone.utc)
    units = [f"{unit_prefix}{k}" for k in range(8)]
    rows = [(units[i % 8], (t0 + timedelta(seconds=60 * (i // 8))).strftime("%Y-%m-%dT%H:%M:%SZ"),
             24.0, 1.5 + (i % 5) * 0.1, 1200.0 + i % 13, 600.0, 2.0) for i in range(n)]
    dups = rng.sample(rows, n // 100)
    bad = [(units[0], f"2024-08-{1 + k % 28:02d}T00:00:00Z", 24.0, 1.5, -1.0, 600.0, 2.0)
           for k in range(20)]
    allrows = rows + dups + bad
    rng.shuffle(allrows)
    df = pl.DataFrame(allrows, schema=["unit_id", "ts", "v_in", "i_in", "n_in", "n_out",
                                       "ratio_cmd"], orient="row")
    df.write_csv(path)
    return {"accepted": n, "duplicates": len(dups), "quarantined": 20, "rows": len(allrows)}


def _project(tmp_path, chunk_rows):
    proj = tmp_path / "proj"
    proj.mkdir()
    (proj / "fleetwatch.toml").write_text(f"ingest_chunk_rows = {chunk_rows}\n")
    return proj


def test_sigkill_during_ingest_then_rerun_is_exact(tmp_path):
    proj = _project(tmp_path, 2500)
    data = tmp_path / "big.csv"
    want = _write_export(data, 24_000, "K", seed=1)
    rng = random.Random(7)
    lake = Lake(proj / "lake")
    killed_mid_batch = 0
    for attempt in range(3):
        proc = subprocess.Popen([sys.executable, "-c", INGEST, str(proj), str(data)], env=ENV,
                                stdout=subprocess.PIPE, text=True)
        # wait until the batch has started writing, then kill at a random moment
        for _ in range(1 + attempt):
            line = proc.stdout.readline()
            if not line.startswith("progress"):
                break
        time.sleep(rng.uniform(0.0, 0.8))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=60)
        proc.stdout.close()
        if proc.returncode == -signal.SIGKILL and lake.pending_batches():
            killed_mid_batch += 1
            # readers never see the half-written batch
            assert lake.read("telemetry").height == 0
    assert killed_mid_batch >= 1
    done = subprocess.run([sys.executable, "-c", INGEST, str(proj), str(data)], env=ENV,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr

    assert lake.pending_batches() == []
    t = lake.read("telemetry")
    assert t.height == want["accepted"]
    assert t.select(pl.struct("unit_id", "ts").is_unique().all()).item()
    assert lake.raw_dataset("telemetry").count_rows() == want["accepted"]   # orphans removed
    b = lake.read("batches").filter(pl.col("status") == "ok")
    assert b.height == 1
    row = b.row(0, named=True)
    assert (row["rows_read"], row["accepted"], row["duplicates"], row["quarantined"]) == \
        (want["rows"], want["accepted"], want["duplicates"], want["quarantined"])
    q = lake.read("quarantine")
    assert q.height == want["quarantined"] and set(q["batch_id"]) == {row["batch_id"]}
    assert lake.raw_dataset("quarantine").count_rows() == want["quarantined"]
    assert set(t["batch_id"]) == {row["batch_id"]}


def test_reader_during_write_sees_whole_batches_only(tmp_path):
    proj = _project(tmp_path, 1000)
    files = []
    expected = 0
    for k in range(4):
        f = tmp_path / f"part{k}.csv"
        expected += _write_export(f, 4000, f"P{k}-", seed=k)["accepted"]
        files.append(f)
    stop = tmp_path / "stop"
    reader = subprocess.Popen([sys.executable, "-c", READER, str(proj / "lake"), str(stop)],
                              env=ENV, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                              text=True)
    writer = subprocess.run([sys.executable, "-c", INGEST, str(proj)] + [str(f) for f in files],
                            env=ENV, capture_output=True, text=True, timeout=300)
    stop.write_text("stop")
    out, err = reader.communicate(timeout=120)
    assert writer.returncode == 0, writer.stderr
    assert reader.returncode == 0, err
    res = json.loads(out.strip().splitlines()[-1])
    assert res["errors"] == []
    assert res["partial"] == 0 and res["decreases"] == 0
    assert res["reads"] >= 5
    assert len(res["distinct"]) >= 2                 # it did read while batches landed
    assert res["distinct"][-1] == expected
    s = load_settings(proj, env={})
    assert Lake.from_settings(s).read("telemetry").height == expected
