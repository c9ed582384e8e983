"""The Delta lake store: schema contract, reads, writes, batch gate, lock, compaction."""
import json
import os
import socket
import subprocess
import sys
import textwrap
from datetime import date, datetime, timedelta, timezone

import polars as pl
import pytest

from fleetwatch.errors import LakeError, LockHeldError
from fleetwatch.lake import INGEST_BATCH_PREFIX, Lake, StaleLockWarning, arrow_schema
from fleetwatch.schema import TABLES

T0 = datetime(2024, 5, 1, 23, 0, tzinfo=timezone.utc)


def _tele(n=10, unit="U1", batch="fixture-1", start=T0, step_s=600):
    ts = [start + timedelta(seconds=step_s * i) for i in range(n)]
    return pl.DataFrame({
        "ts": ts, "unit_id": [unit] * n,            # wrong order on purpose
        "p_in": [100.0 + i for i in range(n)], "n_in": [1000.0] * n, "n_out": [500.0] * n,
        "ratio_cmd": [2] * n,                       # integers: must be cast to DOUBLE
        "batch_id": [batch] * n,
    })


def test_append_enforces_the_contract(tmp_path):
    lake = Lake(tmp_path / "lake")
    v = lake.append("telemetry", _tele())
    assert v == 0 and lake.version("telemetry") == 0
    df = lake.read("telemetry")
    assert df.columns == TABLES["telemetry"].column_names
    assert df.schema["ts"] == pl.Datetime("us", "UTC")
    assert df.schema["ratio_cmd"] == pl.Float64
    assert df["v_in"].null_count() == 10                 # optional column filled with null
    # day is the UTC date of ts: 23:00 + 10 x 10 min crosses midnight
    assert df["day"].unique().sort().to_list() == [date(2024, 5, 1), date(2024, 5, 2)]
    assert sorted(p.name for p in (tmp_path / "lake" / "telemetry").iterdir()
                  if p.name.startswith("day=")) == ["day=2024-05-01", "day=2024-05-02"]
    assert lake.dataset("telemetry").schema.field("ts").type.tz == "UTC"


def test_append_refuses_unknown_and_missing_columns(tmp_path):
    lake = Lake(tmp_path / "lake")
    with pytest.raises(LakeError, match="not in its contract: wheel_size"):
        lake.append("telemetry", _tele().with_columns(wheel_size=pl.lit(1.0)))
    with pytest.raises(LakeError, match="required columns missing: n_out"):
        lake.append("telemetry", _tele().drop("n_out"))
    assert not lake.has_table("telemetry")


def test_latest_dataset_follows_commits_made_while_it_is_kept_open(tmp_path):
    # ingest's lake lookups keep the table open between chunks; a lookup must still see
    # every row committed since (from this thread or a writer thread), or dedupe would miss
    lake = Lake(tmp_path / "lake")
    with lake.writer("test"):
        assert lake.latest_dataset("telemetry") is None
        lake.append("telemetry", _tele(5, batch="b1"))
        assert lake.latest_dataset("telemetry").count_rows() == 5
        lake.append("telemetry", _tele(7, unit="U2", batch="b2"))
        ds = lake.latest_dataset("telemetry", file_pruning_predicate="unit_id = 'U2'")
        assert ds.count_rows() == 7
        assert lake.latest_dataset("telemetry").count_rows() == 12
        lake.delete_where("telemetry", "batch_id = 'b1'")
        assert lake.latest_dataset("telemetry").count_rows() == 7
        kept = lake._kept_table("telemetry")
        assert kept is not None and lake._kept_table("telemetry") is kept
    assert lake._kept_table("telemetry") is not kept   # dropped with the lock: others may write


def test_appends_under_the_lock_keep_a_table_open_per_thread(tmp_path):
    # ingest's writer threads append chunk after chunk; each keeps its own open table, and
    # an append whose snapshot is behind another thread's commit still lands (after it)
    import threading

    lake = Lake(tmp_path / "lake")
    with lake.writer("test"):
        assert lake.append("telemetry", _tele(3, batch="b0")) == 0
        kept = lake._kept_table("telemetry")
        assert kept is not None and lake._kept_table("telemetry") is kept
        errors = []

        def work(k):
            try:
                for j in range(3):
                    lake.append("telemetry", _tele(2, unit=f"T{k}", batch=f"t{k}-{j}",
                                                   start=T0 + timedelta(days=k + 1, hours=j)))
            except Exception as exc:  # reported below
                errors.append(exc)

        threads = [threading.Thread(target=work, args=(k,)) for k in range(2)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        assert not errors
        assert lake.append("telemetry", _tele(1, unit="Z", batch="z")) == 7
        assert lake.version("telemetry") == 7
    assert lake._kept_table("telemetry") is not kept       # kept only under the lock
    assert lake.read("telemetry").height == 3 + 12 + 1


def test_non_utc_input_is_stored_as_the_same_instant(tmp_path):
    lake = Lake(tmp_path / "lake")
    df = _tele(2).with_columns(pl.col("ts").dt.convert_time_zone("Europe/Lisbon"))
    lake.append("telemetry", df)
    got = lake.read("telemetry")["ts"].to_list()
    assert got == [T0, T0 + timedelta(minutes=10)]


def test_read_missing_table_gives_empty_contract_frame(tmp_path):
    lake = Lake(tmp_path / "lake")
    df = lake.read("health")
    assert df.height == 0 and df.columns == TABLES["health"].column_names
    assert lake.version("health") is None and lake.table_names() == []
    with pytest.raises(LakeError, match="does not exist"):
        lake.dataset("health")


def test_read_columns_and_filter(tmp_path):
    lake = Lake(tmp_path / "lake")
    lake.append("telemetry", _tele(5, "U1"))
    lake.append("telemetry", _tele(3, "U2"))
    got = lake.read("telemetry", columns=["unit_id", "p_in"], filter_sql="unit_id = 'U2'")
    assert got.columns == ["unit_id", "p_in"] and got.height == 3
    with pytest.raises(LakeError):
        lake.read("telemetry", filter_sql="no_such_column > 1")


def test_versions_overwrite_and_replace_where(tmp_path):
    lake = Lake(tmp_path / "lake")
    lake.append("telemetry", _tele(4))
    lake.append("telemetry", _tele(4, "U2"))
    assert lake.versions() == {"telemetry": 1}
    lake.overwrite("telemetry", _tele(2))
    assert lake.read("telemetry").height == 2
    assert lake.version("telemetry") == 2
    day = {"unit_id": ["U1"], "day": [date(2024, 5, 1)], "samples": [1], "steady_samples": [1],
           "completeness": [1.0], "slip_mean": [0.01], "slip_p95": [0.02], "slip_at_load": [0.01],
           "creep_a": [0.0], "creep_b": [0.01], "ratio_error": [0.0], "energy_in_wh": [1.0],
           "gross_slip_events": [0], "stall_events": [0], "ratio_change_stopped_events": [0],
           "flatline_events": [0], "gap_events": [0], "clock_jump_events": [0]}
    lake.append("unit_days", pl.DataFrame(day))
    lake.append("unit_days", pl.DataFrame(day).with_columns(day=pl.lit(date(2024, 5, 2))))
    new = pl.DataFrame(day).with_columns(day=pl.lit(date(2024, 5, 2)), slip_mean=pl.lit(0.5))
    lake.replace_where("unit_days", new, "day >= '2024-05-02'")
    got = lake.read("unit_days").sort("day")
    assert got["slip_mean"].to_list() == [0.01, 0.5]


def test_connect_registers_views_in_utc(tmp_path):
    lake = Lake(tmp_path / "lake")
    lake.append("telemetry", _tele(10))
    con = lake.connect()
    assert con.execute("SELECT current_setting('TimeZone')").fetchone()[0] == "UTC"
    n, days = con.execute("SELECT count(*), count(DISTINCT ts::DATE) FROM telemetry").fetchone()
    assert (n, days) == (10, 2)
    with pytest.raises(Exception):
        con.execute("SELECT * FROM health")          # derived tables absent until written
    con.close()


def test_uncommitted_ingest_batch_is_invisible_and_recovered(tmp_path):
    lake = Lake(tmp_path / "lake")
    lake.append("telemetry", _tele(3, batch="fixture"))           # not an ingest batch
    bid = INGEST_BATCH_PREFIX + "test-1"
    with lake.writer("test"):
        lake.begin_batch(bid)
        lake.append("telemetry", _tele(5, "U9", batch=bid))
        # readers see only the fixture rows while the batch has no ledger row
        assert lake.read("telemetry").height == 3
        assert lake.connect().execute("SELECT count(*) FROM telemetry").fetchone()[0] == 3
        assert lake.raw_dataset("telemetry").count_rows() == 8
        # as if the writer was killed here: the next writer removes the batch's rows
        assert lake.recover() == [bid]
    assert lake.pending_batches() == []
    assert lake.raw_dataset("telemetry").count_rows() == 3


def test_committed_batch_becomes_visible(tmp_path):
    lake = Lake(tmp_path / "lake")
    bid = INGEST_BATCH_PREFIX + "test-2"
    with lake.writer("test"):
        lake.begin_batch(bid)
        lake.append("telemetry", _tele(5, batch=bid))
        assert lake.read("telemetry").height == 0
        now = datetime.now(timezone.utc)
        lake.append("batches", pl.DataFrame({
            "batch_id": [bid], "kind": ["telemetry"], "source_file": ["x.csv"],
            "content_sha256": ["0" * 64], "rows_read": [5], "accepted": [5], "quarantined": [0],
            "duplicates": [0], "status": ["ok"], "started_at": [now], "finished_at": [now]}))
        lake.end_batch(bid)
    assert lake.read("telemetry").height == 5
    assert lake.recover() == []


HOLD = textwrap.dedent("""
    import sys
    from fleetwatch.lake import Lake
    with Lake(sys.argv[1]).writer("analyze (test holder)"):
        print("locked", flush=True)
        sys.stdin.read()
""")


def test_second_writer_gets_lock_held_error_naming_the_holder(tmp_path):
    path = tmp_path / "lake"
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(path)], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "locked"
        with pytest.raises(LockHeldError) as err:
            with Lake(path).writer("ingest"):
                pass
        msg = err.value.message
        assert f"pid {proc.pid}" in msg and socket.gethostname() in msg
        assert "analyze (test holder)" in msg and "since" in msg
        # with a timeout the second writer waits, then still fails while the holder lives
        with pytest.raises(LockHeldError):
            with Lake(path, lock_timeout_s=0.3).writer("ingest"):
                pass
    finally:
        proc.stdin.close()
        proc.wait(timeout=30)
    with Lake(path).writer("ingest"):               # released: free again
        pass
    assert not (path / "_fleetwatch" / "writer.lock").exists()


def test_stale_lock_of_dead_process_is_taken_over(tmp_path):
    path = tmp_path / "lake"
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (path / "_fleetwatch").mkdir(parents=True)
    lock = path / "_fleetwatch" / "writer.lock"
    lock.write_text(json.dumps({"pid": dead.pid, "host": socket.gethostname(),
                                "purpose": "ingest", "since": "2024-01-01T00:00:00+00:00",
                                "token": "old"}))
    with pytest.warns(StaleLockWarning, match=f"pid {dead.pid}"):
        with Lake(path).writer("compact") as lake:
            held = lake.lock_holder()
            assert held["pid"] == os.getpid() and held["purpose"] == "compact"
    assert not lock.exists()


def test_lock_of_other_host_is_not_taken_over(tmp_path):
    path = tmp_path / "lake"
    (path / "_fleetwatch").mkdir(parents=True)
    (path / "_fleetwatch" / "writer.lock").write_text(json.dumps(
        {"pid": 999999, "host": "another-host.example", "purpose": "analyze", "since": "x"}))
    with pytest.raises(LockHeldError, match="another-host.example"):
        with Lake(path).writer("ingest"):
            pass


def test_writer_is_reentrant_in_one_process(tmp_path):
    lake = Lake(tmp_path / "lake")
    with lake.writer("outer"):
        with lake.writer("inner"):
            assert lake.lock_holder()["purpose"] == "outer"
        assert lake.lock_holder()["purpose"] == "outer"
    assert lake.lock_holder() is None


def test_compact_keeps_row_counts(tmp_path):
    lake = Lake(tmp_path / "lake")
    for i in range(6):
        lake.append("telemetry", _tele(20, f"U{i}"))
    before = lake.connect().execute(
        "SELECT count(*), sum(p_in), count(DISTINCT (unit_id, ts)) FROM telemetry").fetchone()
    files_before = len(list((tmp_path / "lake" / "telemetry").rglob("*.parquet")))
    with lake.writer("compact"):
        res = lake.compact(retention_hours=0)
    after = lake.connect().execute(
        "SELECT count(*), sum(p_in), count(DISTINCT (unit_id, ts)) FROM telemetry").fetchone()
    assert after == before == (120, pytest.approx(before[1]), 120)
    assert res["telemetry"]["rows"] == 120
    assert res["telemetry"]["files_after"] < res["telemetry"]["files_before"]
    # vacuum with retention 0 removed the replaced files from disk
    assert len(list((tmp_path / "lake" / "telemetry").rglob("*.parquet"))) < files_before


def test_arrow_schema_matches_contract():
    for name, t in TABLES.items():
        assert arrow_schema(name).names == t.column_names


def _file_rows(lake: Lake, name: str) -> list[pl.DataFrame]:
    """The rows of each Parquet file of a table, in file order."""
    from deltalake import DeltaTable
    dt = DeltaTable(str(lake.path / name))
    return [pl.read_parquet(uri, hive_partitioning=False) for uri in dt.file_uris()]


@pytest.mark.parametrize("order", ["sorted", "time_major", "shuffled", "reversed"])
def test_rows_are_sorted_by_unit_and_time_in_every_file(tmp_path, order):
    # three units, 40 samples each; time_major is a fleet logger's order (units interleaved)
    n = 40
    ts = [T0 + timedelta(seconds=60 * i) for i in range(n)]
    frames = [_tele(n, unit=u).with_columns(pl.Series("ts", ts),
                                            p_in=pl.int_range(0, n).cast(pl.Float64) + k * 1000)
              for k, u in enumerate(["U2", "U10", "U1"])]
    df = pl.concat(frames)
    df = {"sorted": df.sort("unit_id", "ts"),
          "time_major": df.sort("ts", maintain_order=True),
          "shuffled": df.sample(fraction=1.0, shuffle=True, seed=7),
          "reversed": df.sort("unit_id", "ts", descending=True)}[order]
    lake = Lake(tmp_path / "lake")
    lake.append("telemetry", df)
    files = _file_rows(lake, "telemetry")
    assert sum(f.height for f in files) == 3 * n
    for f in files:
        keys = f.select("unit_id", "ts")
        assert keys.equals(keys.sort("unit_id", "ts")), order
    got = lake.read("telemetry").sort("unit_id", "ts")
    want = df.sort("unit_id", "ts")
    assert got["p_in"].to_list() == want["p_in"].to_list()   # rows kept together


def test_sort_by_key_is_stable_and_puts_missing_keys_last():
    import pyarrow as pa

    from fleetwatch.lake import _sort_by_key
    rows = [("b", 2.0, 0), ("a", None, 1), ("a", 1.0, 2), (None, 1.0, 3), ("b", 2.0, 4),
            ("a", float("nan"), 5), ("a", 1.0, 6)]
    tbl = pa.table({"k": [r[0] for r in rows], "x": [r[1] for r in rows],
                    "i": [r[2] for r in rows]})
    got = _sort_by_key(tbl, ["k", "x"]).column("i").to_pylist()
    # a: 1.0 (rows 2, 6 in input order), then NaN, then null; b: rows 0, 4; null key last
    assert got == [2, 6, 5, 1, 0, 4, 3]
    # already in order: returned as is; time-major order: stable sort on the first key only
    ordered = pa.table({"k": ["a", "a", "b"], "x": [1.0, 2.0, 0.5]})
    assert _sort_by_key(ordered, ["k", "x"]) is ordered
    tm = pa.table({"k": ["b", "a", "b", "a"], "x": [1.0, 1.0, 2.0, 2.0], "i": [0, 1, 2, 3]})
    assert _sort_by_key(tm, ["k", "x"]).column("i").to_pylist() == [1, 3, 0, 2]


def test_rows_per_partition_from_the_log_match_a_count(tmp_path):
    lake = Lake(tmp_path / "lake")
    assert lake.rows_per_partition("telemetry") is None              # no table yet
    with lake.writer("test"):
        lake.append("telemetry", _tele(n=300, unit="U1", step_s=600))   # ~2 days
        lake.append("telemetry", _tele(n=50, unit="U2", step_s=3600))
    got = lake.rows_per_partition("telemetry", "day")
    want = dict(lake.read("telemetry").group_by("day").len().iter_rows())
    assert got == want and sum(got.values()) == 350
    assert lake.rows_per_partition("telemetry", "unit_id") is None   # not a partition


def test_snapshot_files_only_for_plain_ungated_tables(tmp_path):
    lake = Lake(tmp_path / "lake")
    with lake.writer("test"):
        lake.append("telemetry", _tele(n=20))
    assert lake.snapshot_files("telemetry", lake.version("telemetry")) is None   # gated
    assert lake.snapshot_files("windows", 0) is None                             # missing
