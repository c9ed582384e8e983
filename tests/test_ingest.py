"""Ingest: mapping, units, time zones, validation, duplicates, accounting, formats, CLI."""
import gzip
import json
import math
from datetime import datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import polars as pl
import pytest

from fleetwatch.config import load_settings
from fleetwatch.errors import InputError, UsageError
from fleetwatch.ingest import ingest_files, load_mapping
from fleetwatch.lake import Lake

UTC = timezone.utc
ROOT = Path(__file__).resolve().parents[1]
LISBON = ZoneInfo("Europe/Lisbon")

MESSY_MAPPING = """
[format]
delimiter = ";"
timezone = "Europe/Lisbon"

[columns]
unit_id = "drive"
ts = "time"
n_in = { column = "input_speed", unit = "rad/s" }
n_out = { column = "output_speed", unit = "rpm" }
ratio_cmd = "ratio_setpoint"
p_in = { column = "power", unit = "kW" }
temp = { column = "temperature", unit = "degC" }
"""
HEADER = "drive;time;input_speed;output_speed;ratio_setpoint;power;temperature;comment"
W = 2 * math.pi / 60 * 1000          # 1000 rpm in rad/s (NIST SP 811 B.8: 1 rpm = 2*pi/60 rad/s)


def _row(unit, ts, n_in=f"{W!r}", n_out="500", ratio="2.0", power="1.5", temp="40", comment=""):
    return ";".join([unit, ts, n_in, n_out, ratio, power, temp, comment])


# (text of the record, expected outcome): ok / dup / a quarantine rule
MESSY = [
    (_row("U1", "2024-03-31 00:30:00"), "ok"),                       # 00:30 WET = 00:30Z
    (_row("U1", "2024-03-31 01:30:00"), "nonexistent_local_time"),   # spring-forward gap
    (_row("U1", "2024-03-31 02:30:00"), "ok"),                       # 02:30 WEST = 01:30Z
    (_row("U1", "2024-10-27 01:30:00"), "ambiguous_local_time"),     # fall-back hour
    (_row("U1", "2024-10-27T01:30:00+01:00"), "ok"),                 # offset: 00:30Z
    (_row("U1", "2024-10-27T01:30:00+00:00"), "ok"),                 # offset: 01:30Z
    (_row("U2", "2024-03-31 00:30:00", n_in="abc"), "not_numeric"),
    (_row("U2", "2024-03-31 00:40:00", n_in="-5"), "out_of_range"),
    (_row("U2", "2024-03-31 00:50:00", ratio="9.0"), "out_of_range"),
    ("", "blank"),
    (_row("", "2024-03-31 01:00:00"), "empty_unit_id"),
    (_row("U2", "not a time"), "bad_timestamp"),
    (_row("U1", "2024-03-31 00:30:00"), "dup"),                      # same as record 1
    (_row("U1", "2024-03-31T00:30:00Z"), "dup"),                     # same instant, same values
    (_row("U1", "2024-03-31 02:30:00", n_out="499"), "conflicting_duplicate"),
    (_row("U3", "2024-03-31 00:45:00", comment='"two\nlines"'), "ok"),
    (_row("U2", "2024-03-31 00:55:00", n_in="nan"), "not_finite"),
    (_row("U2", "2024-03-31 01:05:00") + ";surplus", "malformed_row"),
    (_row("U2", "2024-03-31 00:15:00", temp=""), "ok"),              # optional value missing
    (_row("U2", "2024-03-31 00:25:00", power=""), "missing_value"),  # p_in required here
]


def _settings(tmp_path, **kw):
    return load_settings(tmp_path / "proj", env={}, overrides=kw or None)


def _write_messy(folder: Path):
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "mapping.toml").write_text(MESSY_MAPPING)
    text = HEADER + "\n" + "\n".join(r for r, _ in MESSY) + "\n"
    (folder / "export.csv").write_text(text)
    # physical line of each record: header is line 1, quoted line breaks count
    lines, line = [], 2
    for rec, _ in MESSY:
        lines.append(line)
        line += rec.count("\n") + 1
    return folder / "export.csv", folder / "mapping.toml", lines


def test_messy_export_exact_accounting_and_traceable_quarantine(tmp_path):
    path, mapping, lines = _write_messy(tmp_path / "in")
    settings = _settings(tmp_path)
    rep = ingest_files([path], settings, mapping=mapping)
    f = rep.files[0]
    outcomes = [o for _, o in MESSY if o != "blank"]
    assert f.status == "ok", f.message
    assert f.rows_read == len(outcomes) == 19
    assert f.accepted == outcomes.count("ok") == 6
    assert f.duplicates == outcomes.count("dup") == 2
    bad = [o for o in outcomes if o not in ("ok", "dup")]
    assert f.quarantined == len(bad) == 11
    assert f.rows_read == f.accepted + f.quarantined + f.duplicates
    assert rep.exit_code == 0 and not rep.errors

    lake = Lake.from_settings(settings)
    q = lake.read("quarantine").sort("line")
    expected = sorted((lines[i], o) for i, (_, o) in enumerate(MESSY)
                      if o not in ("ok", "dup", "blank"))
    assert list(zip(q["line"].to_list(), q["rule"].to_list())) == expected
    # each quarantined row points at its physical line and keeps the raw text
    text_lines = path.read_text().split("\n")
    for line, raw in zip(q["line"], q["raw"]):
        values = json.loads(raw)
        assert text_lines[line - 1].startswith(values["drive"] + ";" + values["time"])
    row = q.filter(pl.col("rule") == "not_numeric").row(0, named=True)
    assert row["column"] == "input_speed" and "'abc'" in row["message"]
    assert row["source_file"] == str(path.resolve()) and row["kind"] == "telemetry"
    assert q.filter(pl.col("rule") == "malformed_row")["column"].to_list() == [None]

    t = lake.read("telemetry").sort("unit_id", "ts")
    assert t.height == 6
    u1 = t.filter(pl.col("unit_id") == "U1")
    assert u1["ts"].to_list() == [datetime(2024, 3, 31, 0, 30, tzinfo=UTC),
                                  datetime(2024, 3, 31, 1, 30, tzinfo=UTC),
                                  datetime(2024, 10, 27, 0, 30, tzinfo=UTC),
                                  datetime(2024, 10, 27, 1, 30, tzinfo=UTC)]
    assert t["n_in"].to_list() == pytest.approx([1000.0] * 6)      # rad/s -> rpm
    assert t["p_in"].to_list() == pytest.approx([1500.0] * 6)      # kW -> W
    assert t["v_in"].null_count() == 6
    assert t.filter(pl.col("unit_id") == "U2")["temp"].to_list() == [None]
    b = lake.read("batches")
    assert b.select("rows_read", "accepted", "quarantined", "duplicates", "status").row(0) == \
        (19, 6, 11, 2, "ok")
    assert b["batch_id"][0] == f.batch_id and set(t["batch_id"]) == {f.batch_id}


def _zoneinfo_kind(naive: datetime, tz: ZoneInfo) -> str:
    """Python zoneinfo's verdict: a local time that does not survive a UTC round trip does
    not exist; one whose two folds have different offsets is ambiguous (PEP 495)."""
    a = naive.replace(tzinfo=tz, fold=0)
    b = naive.replace(tzinfo=tz, fold=1)
    if a.astimezone(UTC).astimezone(tz).replace(tzinfo=None) != naive:
        return "nonexistent_local_time"
    if a.utcoffset() != b.utcoffset():
        return "ambiguous_local_time"
    return "ok"


@pytest.mark.parametrize("day", ["2024-03-31", "2024-10-27"])
def test_dst_rules_agree_with_zoneinfo(tmp_path, day):
    """Every 10 minutes around Lisbon's 2024 clock changes: ingest's verdict and UTC
    instant match Python's zoneinfo; one offset-carrying time is taken as is."""
    start = datetime.fromisoformat(day).replace(hour=0)
    locals_ = [start + timedelta(minutes=10 * k) for k in range(19)]      # 00:00 .. 03:00
    rows = [_row("U1", t.strftime("%Y-%m-%d %H:%M:%S"), temp=str(k))
            for k, t in enumerate(locals_)]
    rows.append(_row("U9", f"{day}T01:30:00+01:00"))
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / "mapping.toml").write_text(MESSY_MAPPING)
    (folder / "dst.csv").write_text(HEADER + "\n" + "\n".join(rows) + "\n")
    settings = _settings(tmp_path)
    ingest_files([folder / "dst.csv"], settings, mapping=folder / "mapping.toml")
    lake = Lake.from_settings(settings)
    q = {r["line"]: r["rule"] for r in lake.read("quarantine").iter_rows(named=True)}
    t = lake.read("telemetry")
    got_ts = {int(r["temp"]): r["ts"] for r in t.filter(pl.col("unit_id") == "U1")
              .iter_rows(named=True)}
    kinds = []
    for k, naive in enumerate(locals_):
        kind = _zoneinfo_kind(naive, LISBON)
        kinds.append(kind)
        if kind == "ok":
            assert got_ts[k] == naive.replace(tzinfo=LISBON).astimezone(UTC), naive
        else:
            assert q[k + 2] == kind, naive
    assert kinds.count("ok") < len(kinds)            # the window does hold a DST change
    u9 = t.filter(pl.col("unit_id") == "U9")["ts"].to_list()
    assert u9 == [datetime.fromisoformat(f"{day}T00:30:00+00:00")]


def test_conflicting_duplicates_against_the_lake_never_overwrite(tmp_path):
    settings = _settings(tmp_path)
    folder = tmp_path / "in"
    folder.mkdir()
    (folder / "mapping.toml").write_text(MESSY_MAPPING)
    a = [_row("U1", f"2024-05-01T10:0{i}:00Z") for i in range(5)]
    (folder / "a.csv").write_text(HEADER + "\n" + "\n".join(a) + "\n")
    b = [a[0], a[1], _row("U1", "2024-05-01T10:02:00Z", n_out="480"),
         _row("U1", "2024-05-01T10:09:00Z")]
    (folder / "b.csv").write_text(HEADER + "\n" + "\n".join(b) + "\n")
    rep = ingest_files([folder / "a.csv", folder / "b.csv"], settings,
                       mapping=folder / "mapping.toml")
    fa, fb = rep.files
    assert (fa.accepted, fa.duplicates, fa.quarantined) == (5, 0, 0)
    assert (fb.rows_read, fb.accepted, fb.duplicates, fb.quarantined) == (4, 1, 2, 1)
    lake = Lake.from_settings(settings)
    q = lake.read("quarantine")
    assert q["rule"].to_list() == ["conflicting_duplicate"] and q["line"].to_list() == [4]
    assert fa.batch_id in q["message"][0]
    t = lake.read("telemetry")
    assert t.height == 6
    assert t.filter(pl.col("ts") == datetime(2024, 5, 1, 10, 2, tzinfo=UTC))["n_out"].to_list() \
        == [500.0]                                          # the lake's value is kept


def test_reingest_is_a_noop_that_says_so(tmp_path):
    path, mapping, _ = _write_messy(tmp_path / "in")
    settings = _settings(tmp_path)
    ingest_files([path], settings, mapping=mapping)
    lake = Lake.from_settings(settings)
    before = lake.versions()
    copy = tmp_path / "in" / "copy-of-export.csv"
    copy.write_bytes(path.read_bytes())
    rep = ingest_files([path, copy], settings, mapping=mapping)
    assert [f.status for f in rep.files] == ["skipped", "skipped"]
    assert "already ingested" in rep.files[0].message
    assert rep.exit_code == 0
    assert lake.versions() == before


def test_reingest_of_a_folder_reads_unchanged_files_once_and_validates_nothing(
        tmp_path, monkeypatch):
    # `fleetwatch ingest logs/` day after day: files of paths ingested before wait for their
    # hash first, so an unchanged one is skipped without validating or looking up any row;
    # a copy under a new path stops as soon as its hash is known (its hash comes late here)
    import time

    from fleetwatch import ingest as ing
    path, mapping, _ = _write_messy(tmp_path / "in")
    settings = _settings(tmp_path, ingest_chunk_rows=5)
    ingest_files([path], settings, mapping=mapping)
    lake = Lake.from_settings(settings)
    before = lake.versions()
    seen = []
    real_validate = ing._validate

    def counting(df, *a, **k):
        seen.append(df.height)
        return real_validate(df, *a, **k)

    slow = ing._file_sha256

    def late(p, stop=None):
        time.sleep(0.3)
        return slow(p, stop)

    monkeypatch.setattr(ing, "_validate", counting)
    monkeypatch.setattr(ing, "_file_sha256", late)
    rep = ingest_files([path], settings, mapping=mapping)
    assert [f.status for f in rep.files] == ["skipped"] and seen == []
    copy = tmp_path / "in" / "copy.csv"
    copy.write_bytes(path.read_bytes())
    rep = ingest_files([copy], settings, mapping=mapping)
    assert [f.status for f in rep.files] == ["skipped"]
    assert lake.versions() == before and not lake.pending_batches()


def test_content_hash_while_parsing_writes_nothing_before_it_is_known(tmp_path, monkeypatch):
    # the hash is worked out in a thread while the first chunk is parsed: a copy of an
    # ingested file is still skipped without any write, even when the hash comes late
    import time

    from fleetwatch import ingest as ing
    path, mapping, _ = _write_messy(tmp_path / "in")
    settings = _settings(tmp_path, ingest_chunk_rows=5)
    first = ingest_files([path], settings, mapping=mapping).files[0]
    lake = Lake.from_settings(settings)
    before = lake.versions()
    slow = ing._file_sha256

    def late(p, stop=None):
        time.sleep(0.5)
        return slow(p, stop)

    monkeypatch.setattr(ing, "_file_sha256", late)
    copy = tmp_path / "in" / "renamed.csv"
    copy.write_bytes(path.read_bytes())
    rep = ingest_files([copy], settings, mapping=mapping)
    f = rep.files[0]
    assert (f.status, f.rows_read, f.accepted, f.batch_id) == ("skipped", 0, 0, None)
    assert f.content_sha256 == first.content_sha256
    assert lake.versions() == before and not lake.pending_batches()
    # a file that cannot be read is refused with the reason, without a ledger row
    def unreadable(p, stop=None):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(ing, "_file_sha256", unreadable)
    other = tmp_path / "in" / "other.csv"
    other.write_text(path.read_text().replace("U1", "U9"))
    f = ingest_files([other], settings, mapping=mapping).files[0]
    assert f.status == "refused" and "cannot read (Permission denied)" in f.message
    assert lake.versions() == before
    # a file refused before its first chunk gets its hash and batch id on the ledger
    monkeypatch.setattr(ing, "_file_sha256", slow)
    (tmp_path / "in" / "bad.toml").write_text(MESSY_MAPPING.replace('"drive"', '"nope"'))
    f = ingest_files([other], settings, mapping=tmp_path / "in" / "bad.toml").files[0]
    assert f.status == "refused" and "'nope'" in f.message
    b = lake.read("batches").filter(pl.col("status") == "refused")
    assert b["content_sha256"].to_list() == [ing._file_sha256(other)]
    assert b["batch_id"].to_list() == [f.batch_id] and f.batch_id


def test_refused_files_do_not_stop_the_others(tmp_path):
    path, mapping, _ = _write_messy(tmp_path / "in")
    other = tmp_path / "in" / "other.csv"
    other.write_text("drive;when;speed\nU1;2024-01-01T00:00:00Z;5\n")
    binary = tmp_path / "in" / "garbage.csv"
    binary.write_bytes(b"\x00\x01\x02PK\x03\x04" * 100)
    sheet = tmp_path / "in" / "log.xlsx"
    sheet.write_bytes(b"PK\x03\x04 not a log")
    settings = _settings(tmp_path)
    rep = ingest_files([other, binary, sheet, path, tmp_path / "nothing-*.csv"], settings,
                       mapping=mapping)
    st = {Path(f.path).name: f for f in rep.files}
    assert st["other.csv"].status == "refused"
    msg = st["other.csv"].message
    assert "column 'time' (mapped to ts) not found" in msg and "drive, when, speed" in msg
    assert "mapping" in msg
    assert st["garbage.csv"].status == "refused" and "binary" in st["garbage.csv"].message
    assert st["log.xlsx"].status == "refused" and "not a CSV, Parquet or NDJSON" in \
        st["log.xlsx"].message
    assert st["nothing-*.csv"].status == "refused"
    assert st["export.csv"].status == "ok" and st["export.csv"].accepted == 6
    assert rep.exit_code == 1 and len(rep.errors) == 4
    lake = Lake.from_settings(settings)
    b = lake.read("batches")
    # one ledger row per file that could be read (the glob that matched nothing has none)
    assert sorted(b["status"].to_list()) == ["ok", "refused", "refused", "refused"]
    assert b.filter(pl.col("status") == "refused")["accepted"].to_list() == [0, 0, 0]
    assert lake.read("telemetry").height == 6


def test_unknown_unit_refuses_the_file_listing_units(tmp_path):
    path, _, _ = _write_messy(tmp_path / "in")
    bad = tmp_path / "in" / "bad.toml"
    bad.write_text(MESSY_MAPPING.replace('unit = "rad/s"', 'unit = "deg/s"'))
    rep = ingest_files([path], _settings(tmp_path), mapping=bad)
    f = rep.files[0]
    assert f.status == "refused" and "deg/s" in f.message and "rad/s" in f.message
    assert rep.exit_code == 1


def test_strict_turns_quarantine_into_exit_1(tmp_path):
    path, mapping, _ = _write_messy(tmp_path / "in")
    rep = ingest_files([path], _settings(tmp_path), mapping=mapping, strict=True)
    assert rep.files[0].status == "ok" and rep.exit_code == 1


def _frame(n=6):
    ts = [datetime(2024, 6, 1, 12, tzinfo=UTC) + timedelta(minutes=i) for i in range(n)]
    return pl.DataFrame({"unit_id": ["P1"] * n, "ts": ts, "v_in": [24.0] * n,
                         "i_in": [2.0] * n, "n_in": [1200.0] * n, "n_out": [600.0] * n,
                         "ratio_cmd": [2.0] * n})


def test_gzip_parquet_and_ndjson_inputs(tmp_path):
    df = _frame()
    folder = tmp_path / "in"
    (folder / "sub").mkdir(parents=True)
    csv_text = df.with_columns(pl.col("ts").dt.to_string("%Y-%m-%dT%H:%M:%SZ")).write_csv()
    with gzip.open(folder / "a.csv.gz", "wt") as fh:
        fh.write(csv_text)
    df.with_columns(unit_id=pl.lit("P2")).write_parquet(folder / "sub" / "b.parquet")
    nd = df.with_columns(unit_id=pl.lit("P3"), ts=pl.col("ts").dt.to_string("%Y-%m-%dT%H:%M:%S%:z"))
    lines = [json.dumps(r) for r in nd.to_dicts()]
    lines.insert(2, "{broken json")
    lines.insert(4, "")
    (folder / "sub" / "c.ndjson").write_text("\n".join(lines) + "\n")
    settings = _settings(tmp_path)
    rep = ingest_files([folder], settings)          # folder: recursive, canonical names
    st = {Path(f.path).name: f for f in rep.files}
    assert set(st) == {"a.csv.gz", "b.parquet", "c.ndjson"}
    assert all(f.status == "ok" for f in rep.files), [f.message for f in rep.files]
    assert (st["a.csv.gz"].accepted, st["b.parquet"].accepted, st["c.ndjson"].accepted) == \
        (6, 6, 6)
    assert st["c.ndjson"].rows_read == 7 and st["c.ndjson"].quarantined == 1
    lake = Lake.from_settings(settings)
    q = lake.read("quarantine")
    assert q["rule"].to_list() == ["malformed_row"] and q["line"].to_list() == [3]
    assert q["raw"].to_list() == ["{broken json"]
    t = lake.read("telemetry")
    assert t.group_by("unit_id").len().sort("unit_id")["len"].to_list() == [6, 6, 6]
    assert t["p_in"].to_list() == [48.0] * 18            # p_in = v_in * i_in when absent
    assert t.filter(pl.col("unit_id") == "P2")["ts"].to_list() == df["ts"].to_list()


def test_parquet_naive_times_use_the_plant_timezone(tmp_path):
    df = _frame(2).with_columns(pl.col("ts").dt.replace_time_zone(None))
    df.write_parquet(tmp_path / "x.parquet")
    bad = df.with_columns(n_out=pl.lit(-1.0))
    bad.write_parquet(tmp_path / "y.parquet")
    settings = _settings(tmp_path, plant_timezone="Europe/Lisbon")
    rep = ingest_files([tmp_path / "x.parquet", tmp_path / "y.parquet"], settings)
    assert rep.files[1].quarantined == 2
    t = Lake.from_settings(settings).read("telemetry")
    # 12:00 in Lisbon summer time (WEST, UTC+1) is 11:00 UTC
    assert t["ts"].min() == datetime(2024, 6, 1, 11, tzinfo=UTC)
    q = Lake.from_settings(settings).read("quarantine")
    assert q["line"].sort().to_list() == [1, 2]           # row numbers for Parquet


def test_latin1_and_decimal_comma(tmp_path):
    mapping = tmp_path / "m.toml"
    mapping.write_text('[format]\ndecimal = ","\n[columns]\nunit_id = "Máquina"\n')
    text = ("Máquina;ts;v_in;i_in;n_in;n_out;ratio_cmd\n"
            "Moínho-1;2024-01-01T00:00:00Z;24,5;2,0;1200;600;2,0\n"
            "Moínho-1;2024-01-01T00:01:00Z; 24,5 ;2;1200;600;2\n")
    (tmp_path / "l.csv").write_bytes(text.encode("latin-1"))
    settings = _settings(tmp_path)
    rep = ingest_files([tmp_path / "l.csv"], settings, mapping=mapping)
    f = rep.files[0]
    assert (f.status, f.accepted) == ("ok", 2), f.message
    assert "latin-1" in f.message
    t = Lake.from_settings(settings).read("telemetry")
    assert t["unit_id"].to_list() == ["Moínho-1"] * 2
    assert t["p_in"].to_list() == [49.0, 49.0]


def test_maintenance_log_with_resets_wear(tmp_path):
    log = tmp_path / "maint.csv"
    log.write_text("who,when,what,remarks\n"
                   "U1,2024-02-01 08:00,Roller replaced,new roller\n"
                   "U2,2024-02-02 09:00,inspection,\n"
                   "U1,2024-02-03 10:00,cones reground after slip,\n"
                   "U1,2024-02-03 10:00,cones reground after slip,\n"
                   ",2024-02-04 10:00,inspection,\n"
                   "U3,2024-02-05 10:00,,forgot the action\n")
    mapping = tmp_path / "m.toml"
    mapping.write_text('[format]\ntimezone = "UTC"\n[columns]\nunit_id = "who"\nts = "when"\n'
                       'action = "what"\nnote = "remarks"\n'
                       '[maintenance]\nresets_wear = ["roller replaced", "cones reground"]\n')
    settings = _settings(tmp_path)
    rep = ingest_files([log], settings, mapping=mapping, kind="maintenance")
    f = rep.files[0]
    assert (f.rows_read, f.accepted, f.duplicates, f.quarantined) == (6, 3, 1, 2)
    lake = Lake.from_settings(settings)
    m = lake.read("maintenance").sort("ts")
    assert m["resets_wear"].to_list() == [True, False, True]
    assert m["note"].to_list() == ["new roller", None, None]
    q = lake.read("quarantine").sort("line")
    assert q["rule"].to_list() == ["empty_unit_id", "missing_value"]
    assert set(q["kind"]) == {"maintenance"}


def test_mapping_file_errors(tmp_path):
    p = tmp_path / "m.toml"
    p.write_text("[columns]\nspeed = 'x'\n")
    with pytest.raises(InputError, match="'speed' is not a canonical column"):
        load_mapping(p)
    p.write_text("[format]\ntimezone = 'Mars/Olympus'\n")
    with pytest.raises(InputError, match="unknown time zone"):
        load_mapping(p)
    p.write_text("[format\n")
    with pytest.raises(InputError):
        load_mapping(p)
    with pytest.raises(UsageError):
        ingest_files([tmp_path], load_settings(tmp_path, env={}), kind="spares")


def test_sample_data_accounting_matches_answer_key(tmp_path):
    key = json.loads((ROOT / "sample_data" / "answer_key.json").read_text())
    settings = _settings(tmp_path)
    rep = ingest_files([str(ROOT / "sample_data" / "telemetry_*.csv")], settings,
                       mapping=ROOT / "sample_data" / "mapping.toml")
    assert all(f.status == "ok" for f in rep.files)
    for f in rep.files:
        want = key["files"][Path(f.path).name]
        assert f.rows_read == want["rows"]
        assert f.duplicates == want["duplicate_rows"]
        assert f.quarantined == want["corrupt_rows"]
    lake = Lake.from_settings(settings)
    q = lake.read("quarantine")
    want_lines = sorted((n, c["line"]) for n, v in key["files"].items() for c in v["corrupt"])
    got_lines = sorted((Path(s).name, ln) for s, ln in zip(q["source_file"], q["line"]))
    assert got_lines == want_lines
    assert rep.totals["accepted"] == key["totals"]["clean_rows"]
    m = ingest_files([ROOT / "sample_data" / "maintenance.csv"], settings,
                     mapping=ROOT / "sample_data" / "maintenance_mapping.toml",
                     kind="maintenance")
    assert m.files[0].accepted == key["maintenance"]["rows"]


def test_cli_ingest_json_and_exit_codes(tmp_path, capsys):
    from fleetwatch.cli import main

    path, mapping, _ = _write_messy(tmp_path / "in")
    proj = tmp_path / "proj"
    with pytest.raises(SystemExit) as ex:
        main(["--project", str(proj), "ingest", "--json", "--mapping", str(mapping), str(path)])
    assert ex.value.code == 0
    out = json.loads(capsys.readouterr().out)          # only JSON on stdout
    assert out["totals"]["accepted"] == 6 and out["files"][0]["status"] == "ok"
    with pytest.raises(SystemExit) as ex:
        main(["--project", str(proj), "ingest", "--strict", "--mapping", str(mapping),
              str(path), str(tmp_path / "missing.csv")])
    assert ex.value.code == 1
    cap = capsys.readouterr()
    assert "skipped" in cap.out and "refused" in cap.out
    assert "Error: " in cap.err and "missing.csv" in cap.err


# ------------------------------------------------------------------ chunking and the pipeline

CANON_HEADER = "unit_id,ts,v_in,i_in,n_in,n_out,ratio_cmd,temp"


def _fleet_rows(n_ts=120, units=("U1", "U2", "U3", "U4", "U5"), order="time"):
    """Clean CSV records of a small fleet, 60 s apart; ``order`` time (units interleaved at
    each timestamp, as a fleet logger writes) or unit (one unit after the other)."""
    t0 = datetime(2024, 5, 1, 22, 0, tzinfo=UTC)
    recs = []
    for i in range(n_ts):
        ts = (t0 + timedelta(seconds=60 * i)).strftime("%Y-%m-%dT%H:%M:%SZ")
        for k, u in enumerate(units):
            recs.append((u, ts, f"{40 + k}.0,2.5,{1000 + i}.0,{490 + k}.0,2.0,{30 + i % 7}.5"))
    if order == "unit":
        recs.sort(key=lambda r: (r[0], r[1]))
    return [f"{u},{ts},{v}" for u, ts, v in recs]


def _plant_duplicates(recs: list[str]) -> tuple[list[str], int, int]:
    """Append copies of earlier records: every 7th repeated as is (a duplicate), every 11th
    with another value (a conflicting duplicate). Copies land in other chunks than their
    originals and next to them. Returns (records, duplicates, conflicts)."""
    out, dups, conf = [], 0, 0
    for i, r in enumerate(recs):
        out.append(r)
        if i % 7 == 3:
            out.append(r)
            dups += 1
        if i % 11 == 5:
            out.append(r.rsplit(",", 1)[0] + ",99.5")
            conf += 1
    # and a few copies far from their originals, in later chunks
    for i in range(0, len(recs), 97):
        out.append(recs[i])
        dups += 1
    return out, dups, conf


def _ingest_text(tmp_path, name, recs, chunk_rows):
    folder = tmp_path / name
    folder.mkdir()
    path = folder / "fleet.csv"
    path.write_text(CANON_HEADER + "\n" + "\n".join(recs) + "\n")
    settings = load_settings(folder / "proj", env={}, overrides={"ingest_chunk_rows": chunk_rows})
    rep = ingest_files([path], settings)
    lake = Lake.from_settings(settings)
    return rep.files[0], lake


@pytest.mark.parametrize("order", ["time", "unit", "shuffled"])
def test_every_file_ingest_writes_is_sorted_by_unit_and_time(tmp_path, order):
    # ingest sorts each chunk itself and tells the lake not to check again; the last commit
    # joins the last chunk with the rows held back from it, and that one is sorted again
    import random

    import pyarrow.parquet as pq

    recs, _, _ = _plant_duplicates(_fleet_rows(order="unit" if order == "unit" else "time"))
    if order == "shuffled":
        random.Random(3).shuffle(recs)
    f, lake = _ingest_text(tmp_path, order, recs, 20)
    assert f.status == "ok" and f.accepted == 600
    files = [p for p in (lake.path / "telemetry").rglob("*.parquet")]
    assert len(files) >= 5
    for p in files:
        keys = pl.from_arrow(pq.read_table(p, columns=["unit_id", "ts"]))
        assert keys.equals(keys.sort("unit_id", "ts")), (order, p.name)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_checks_skipped_by_chunk_figures_change_no_result(tmp_path, monkeypatch, seed):
    # validation drops the checks that a chunk's minimum, maximum, NaN and null counts prove
    # false; with every check evaluated row by row the lake must come out the same
    import random

    from fleetwatch import ingest as ing

    rng = random.Random(seed)
    bad_values = ["", "nan", "inf", "-inf", "abc", "1e9", "-5", " 7.5 "]
    recs = []
    for r in _fleet_rows(n_ts=80):
        f = r.split(",")
        if rng.random() < 0.15:     # a few dirty fields, in columns that are clean elsewhere
            k = rng.choice([2, 3, 4, 5, 6, 7])
            f[k] = rng.choice(bad_values)
        if rng.random() < 0.03:
            f[1] = rng.choice(["", "2024-13-01T00:00:00Z", "yesterday"])
        recs.append(",".join(f))

    def run(name):
        f, lake = _ingest_text(tmp_path, name, recs, 20)
        q = lake.read("quarantine").select("line", "column", "rule", "message", "raw")
        t = lake.read("telemetry").drop("batch_id").sort("unit_id", "ts")
        return (f.rows_read, f.accepted, f.quarantined, f.duplicates), q.sort("line"), t

    fast = run("fast")
    monkeypatch.setattr(ing, "_checks_that_may_fail", lambda df, checks, *a: checks)
    full = run("full")
    assert fast[0] == full[0] and fast[0][2] > 0
    assert fast[1].equals(full[1])
    assert fast[2].equals(full[2])


def test_one_scan_lookup_of_a_file_the_lake_mostly_holds_changes_no_result(
        tmp_path, monkeypatch):
    # a second export that overlaps the first (kept, changed and new rows): once a chunk
    # finds most of its keys in the lake, the next reads keys and values in one scan; the
    # lake and the quarantine are the same as with the two-scan lookup
    from fleetwatch import ingest as ing

    first = _fleet_rows(n_ts=100)
    second = []
    for i, r in enumerate(_fleet_rows(n_ts=130)):
        if i % 13 == 5 and i < 500:                 # same key, other value: a conflict
            f = r.split(",")
            f[6] = "2.5"
            r = ",".join(f)
        second.append(r)

    def run(name):
        folder = tmp_path / name
        folder.mkdir()
        settings = load_settings(folder / "proj", env={},
                                 overrides={"ingest_chunk_rows": 20})
        reps = []
        for k, recs in enumerate((first, second)):
            path = folder / f"export{k}.csv"
            path.write_text(CANON_HEADER + "\n" + "\n".join(recs) + "\n")
            reps.append(ingest_files([path], settings).files[0])
        lake = Lake.from_settings(settings)
        f = reps[1]
        q = lake.read("quarantine").select("line", "rule", "raw").sort("line")
        t = lake.read("telemetry").drop("batch_id").sort("unit_id", "ts")
        return (f.rows_read, f.accepted, f.quarantined, f.duplicates), q, t

    used = []
    real = ing._lake_matches

    def spy(lake, kind, cand, one_pass=False):
        used.append(one_pass)
        return real(lake, kind, cand, one_pass)

    monkeypatch.setattr(ing, "_lake_matches", spy)
    one = run("one")
    assert any(used) and not all(used)
    monkeypatch.setattr(ing, "_lake_matches",
                        lambda lake, kind, cand, one_pass=False: real(lake, kind, cand))
    two = run("two")
    assert one[0] == two[0] == (650, 150, 39, 461)
    assert one[1].equals(two[1]) and set(one[1]["rule"]) == {"conflicting_duplicate"}
    assert one[2].equals(two[2])


def test_rows_joined_for_the_last_commit_are_put_back_in_key_order():
    # the last chunk's rows and the rows held back from it go out in one commit, which the
    # writer does not sort again: each part is sorted, their union is not
    import pyarrow as pa

    from fleetwatch.ingest import _joined_in_key_order

    t = [datetime(2024, 5, 1, tzinfo=UTC) + timedelta(seconds=10 * i) for i in range(4)]
    ts = pa.timestamp("us", "UTC")
    a = pa.table({"unit_id": ["U1", "U1", "U2", "U2"], "ts": pa.array(t, ts), "p": [1, 2, 3, 4]})
    b = pa.table({"unit_id": ["U1", "U2"], "ts": pa.array([t[3] + timedelta(seconds=10)] * 2, ts),
                  "p": [5, 6]})
    j = _joined_in_key_order(a, b, "telemetry")
    assert j.column("unit_id").to_pylist() == ["U1", "U1", "U1", "U2", "U2", "U2"]
    assert j.column("p").to_pylist() == [1, 2, 5, 3, 4, 6]


@pytest.mark.parametrize("order", ["time", "unit"])
def test_small_chunks_give_the_same_result_as_one_chunk(tmp_path, order):
    # 600 records of ~60 bytes: chunks of 20 rows are cut by the 4 kB block floor into
    # about 70 records, inside runs of equal timestamps (time order) or of one unit
    recs, dups, conf = _plant_duplicates(_fleet_rows(order=order))
    small, lake_s = _ingest_text(tmp_path, "small", recs, 20)
    whole, lake_w = _ingest_text(tmp_path, "whole", recs, 1_000_000)
    assert small.status == whole.status == "ok"
    assert lake_s.version("telemetry") >= 5           # really several chunks and commits
    assert lake_w.version("telemetry") == 0           # one chunk: one commit, rows held back too
    for f in (small, whole):
        assert (f.rows_read, f.accepted, f.duplicates, f.quarantined) == \
            (len(recs), 600, dups, conf)
        assert f.rules == {"conflicting_duplicate": conf}
    key = ["unit_id", "ts"]
    ts_, tw = lake_s.read("telemetry").sort(key), lake_w.read("telemetry").sort(key)
    assert ts_.drop("batch_id").equals(tw.drop("batch_id"))
    assert ts_.select(key).is_unique().all()
    qs = lake_s.read("quarantine").sort("line").select("line", "rule", "raw")
    qw = lake_w.read("quarantine").sort("line").select("line", "rule", "raw")
    assert qs.equals(qw)
    # the first record of a key wins: no conflicting value (99.5) reached the lake
    assert 99.5 not in ts_["temp"].to_list()
    text = (tmp_path / "small" / "fleet.csv").read_text().split("\n")
    for line, raw in zip(qs["line"], qs["raw"]):
        assert text[line - 1].endswith(",99.5") and json.loads(raw)["temp"] == "99.5"


def test_chunk_boundary_inside_a_run_of_equal_timestamps(tmp_path):
    # 80 units log at the same instants: every chunk boundary falls inside a run of equal
    # timestamps; the second half of the file repeats the first (duplicates across chunks)
    recs = _fleet_rows(n_ts=6, units=tuple(f"U{i:02d}" for i in range(80)))
    recs = recs + recs[:240]
    f, lake = _ingest_text(tmp_path, "runs", recs, 10)
    assert lake.version("telemetry") >= 3
    assert (f.rows_read, f.accepted, f.duplicates, f.quarantined) == (720, 480, 240, 0)
    t = lake.read("telemetry")
    assert t.height == 480 and t.select("unit_id", "ts").is_unique().all()


def test_unsorted_input_is_sorted_in_the_lake(tmp_path):
    import random
    recs = _fleet_rows(n_ts=60)
    random.Random(3).shuffle(recs)
    f, lake = _ingest_text(tmp_path, "shuffled", recs, 50)
    assert f.accepted == 300
    from deltalake import DeltaTable
    dt = DeltaTable(str(lake.path / "telemetry"))
    assert len(dt.file_uris()) >= 2
    for uri in dt.file_uris():
        keys = pl.read_parquet(uri, hive_partitioning=False).select("unit_id", "ts")
        assert keys.equals(keys.sort("unit_id", "ts"))


def test_a_failed_write_leaves_the_batch_invisible_and_a_rerun_completes_it(tmp_path,
                                                                            monkeypatch):
    from fleetwatch.errors import LakeError
    recs = _fleet_rows(n_ts=120)
    folder = tmp_path / "in"
    folder.mkdir()
    path = folder / "fleet.csv"
    path.write_text(CANON_HEADER + "\n" + "\n".join(recs) + "\n")
    settings = load_settings(tmp_path / "proj", env={}, overrides={"ingest_chunk_rows": 20})
    real_append, calls = Lake.append, []

    def failing_append(self, name, data, partition_by=None, in_key_order=False):
        if name == "telemetry":
            calls.append(name)
            if len(calls) == 3:           # runs in a writer thread, after other commits
                raise LakeError("disk full (simulated)")
        return real_append(self, name, data, partition_by, in_key_order)

    monkeypatch.setattr(Lake, "append", failing_append)
    with pytest.raises(LakeError, match="disk full"):
        ingest_files([path], settings)
    monkeypatch.setattr(Lake, "append", real_append)
    lake = Lake.from_settings(settings)
    assert lake.pending_batches()                       # the killed batch is marked
    assert lake.read("telemetry").height == 0           # ... and readers do not see its rows
    rep = ingest_files([path], settings)                # the re-run undoes it and completes
    assert rep.notes and "interrupted" in rep.notes[0]
    f = rep.files[0]
    assert (f.status, f.rows_read, f.accepted, f.duplicates) == ("ok", 600, 600, 0)
    assert lake.read("telemetry").height == 600 and not lake.pending_batches()


def test_a_file_refused_half_way_leaves_nothing_behind(tmp_path):
    # invalid UTF-8 far into the file, with the encoding declared: the reader thread refuses
    # the file after earlier chunks were written; their rows are rolled back
    recs = _fleet_rows(n_ts=120)
    folder = tmp_path / "in"
    folder.mkdir()
    path = folder / "fleet.csv"
    body = (CANON_HEADER + "\n" + "\n".join(recs) + "\n").encode()
    path.write_bytes(body + b"U9,2024-05-02T00:00:00Z,40.0,2.5,1000.0,490.0,2.0,\xff\xfe\n")
    (folder / "m.toml").write_text('[format]\nencoding = "utf-8"\n')
    settings = load_settings(tmp_path / "proj", env={}, overrides={"ingest_chunk_rows": 20})
    rep = ingest_files([path], settings, mapping=folder / "m.toml")
    f = rep.files[0]
    assert f.status == "refused" and "not valid utf-8 near line" in f.message
    assert rep.exit_code == 1
    lake = Lake.from_settings(settings)
    assert lake.read("telemetry").height == 0 and not lake.pending_batches()
    assert lake.read("batches")["status"].to_list() == ["refused"]


@pytest.mark.parametrize("order", ["time", "unit"])
def test_sorted_input_never_reads_its_own_earlier_chunks_back(tmp_path, monkeypatch, order):
    # the rows of the last timestamp (or unit) of a chunk are held back to the next chunk, so
    # the lake lookup of each chunk skips the files of the chunks before it by their key range
    opened = []
    real = Lake.latest_dataset

    def counting(self, name, file_pruning_predicate=None):
        ds = real(self, name, file_pruning_predicate)
        if file_pruning_predicate and ds is not None:
            opened.append(len(ds.files))
        return ds

    monkeypatch.setattr(Lake, "latest_dataset", counting)
    f, lake = _ingest_text(tmp_path, order, _fleet_rows(order=order), 20)
    assert (f.rows_read, f.accepted) == (600, 600)
    assert lake.version("telemetry") >= 5 and len(opened) >= 5
    if order == "time":
        assert set(opened) == {0}
    else:
        # a chunk that spans two units covers the whole time range; per-file min/max
        # statistics then cannot rule out the file of the unit's earlier rows, only the others
        assert max(opened) <= 1


def test_csv_blocks_end_outside_quotes_and_lose_nothing(tmp_path):
    from fleetwatch.ingest import _CsvSource
    # quoted fields with line breaks and delimiters, some longer than a whole block
    rows = []
    for i in range(3000):
        note = f'"note {i},\nsecond line"' if i % 5 == 0 else f"plain {i}"
        if i % 997 == 0:
            note = '"' + "x\n" * 3000 + '"'                  # 6 kB field: longer than a block
        rows.append(f"U{i % 3},2024-05-01T00:{i % 60:02d}:00Z,{note}")
    body = ("\n".join(rows) + "\n").encode()
    path = tmp_path / "notes.csv"
    path.write_bytes(b"unit_id,ts,note\n" + body)
    src = _CsvSource(path, None, 20)                            # 4 kB blocks
    try:
        blocks = list(src._blocks())
    finally:
        src.close()
    assert len(blocks) > 20
    assert b"".join(blocks) == body
    for b in blocks:
        assert b.endswith(b"\n") and b.count(b'"') % 2 == 0


def test_writer_waits_only_for_appends_that_may_share_a_key(tmp_path):
    # dedupe of a chunk waits for the earlier appends whose key box overlaps its own (they
    # may hold its keys) and not for the others, so the main thread keeps validating
    import threading

    from fleetwatch.ingest import _KeyBox, _Writer

    t0 = datetime(2024, 5, 1, tzinfo=UTC)
    early = _KeyBox("U01", "U09", t0, t0 + timedelta(hours=1))
    late = _KeyBox("U01", "U09", t0 + timedelta(hours=2), t0 + timedelta(hours=3))
    other_units = _KeyBox("U10", "U19", t0, t0 + timedelta(hours=3))
    assert early.overlaps(early.union(late)) and not early.overlaps(late)
    assert not other_units.overlaps(early) and other_units.overlaps(
        _KeyBox("U05", "U12", t0 + timedelta(hours=3), t0 + timedelta(hours=4)))

    release, gated, done = threading.Event(), [], []

    class SlowLake:
        def has_table(self, name):
            return True

        def append(self, name, data, in_key_order=False):
            release.wait(10)
            done.append(data)

    w = _Writer(SlowLake(), gate=lambda: gated.append(1))
    try:
        w.append("telemetry", "a", early)
        w.wait_for(late)                        # disjoint: returns at once
        w.wait_for(other_units)
        assert done == []
        threading.Timer(0.2, release.set).start()
        w.wait_for(early.union(late))           # overlaps: waits for the commit
        assert done == ["a"] and gated == [1]   # the gate ran once, before the append
    finally:
        release.set()
        w.close()


def test_writer_drops_appends_after_a_failure_and_raises_it(tmp_path):
    from fleetwatch.errors import LakeError
    from fleetwatch.ingest import _Writer

    import time

    done = []

    class FailingLake:
        def has_table(self, name):
            return True

        def append(self, name, data, in_key_order=False):
            if data == "a":             # runs alongside "b": ends only once "b" has failed
                t_end = time.monotonic() + 10
                while w.failed is None and time.monotonic() < t_end:
                    time.sleep(0.01)
            if data == "b":
                raise LakeError("disk full (simulated)")
            done.append(data)

    w = _Writer(FailingLake())
    try:
        for d in ("a", "b", "c"):
            try:
                w.append("quarantine", d)
            except LakeError:
                break
        with pytest.raises(LakeError, match="disk full"):
            w.wait()
        assert done == ["a"]                    # "c" was never written
    finally:
        w.close()


def test_writer_commits_two_appends_at_once_but_creates_a_table_alone(tmp_path):
    # two writer threads keep both cores busy at the end of a file; an append that creates
    # its table must not race another one (both would try to write version 0)
    import threading
    import time

    from fleetwatch.ingest import _WRITERS, _Writer

    class TrackingLake:
        def __init__(self):
            self.tables, self.running, self.log = set(), 0, []
            self.lock = threading.Lock()

        def has_table(self, name):
            return name in self.tables

        def append(self, name, data, in_key_order=False):
            with self.lock:
                self.running += 1
                self.log.append((data, self.running))
            time.sleep(0.2)
            with self.lock:
                self.running -= 1
                self.tables.add(name)
                self.log.append((data + " done", self.running))

    lake, gated = TrackingLake(), []
    w = _Writer(lake, gate=lambda: gated.append(len(lake.log)))
    try:
        for d in ("a", "b", "c"):
            w.append("telemetry", d)
        w.wait()
    finally:
        w.close()
    assert gated == [0]                             # the gate ran once, before any append
    assert _WRITERS == 2
    assert lake.log[:2] == [("a", 1), ("a done", 0)]    # creating "telemetry": alone
    assert sorted(lake.log[2:4]) == [("b", 1), ("c", 2)] or sorted(lake.log[2:4]) == [
        ("b", 2), ("c", 1)]                         # then two at once


def test_ingest_gives_polars_one_thread_on_two_cores_unless_the_user_chose():
    # set when fleetwatch.ingest is imported before polars (as `fleetwatch ingest` does)
    import os
    import subprocess
    import sys

    code = "import fleetwatch.ingest, polars; print(polars.thread_pool_size())"
    env = {k: v for k, v in os.environ.items() if k != "POLARS_MAX_THREADS"}
    got = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                         text=True, check=True).stdout.strip()
    if (os.cpu_count() or 1) <= 2:
        assert got == "1"
    else:
        assert int(got) >= 1
    env["POLARS_MAX_THREADS"] = "2"
    got = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                         text=True, check=True).stdout.strip()
    assert got == "2"                                       # the user's setting wins


def test_glibc_malloc_setting_applies_on_glibc_and_yields_to_the_users(monkeypatch):
    import os
    import sys

    from fleetwatch import ingest as ing

    monkeypatch.setenv("MALLOC_TRIM_THRESHOLD_", "131072")
    assert ing._glibc_keep_large_blocks() is False          # the user's setting wins
    monkeypatch.delenv("MALLOC_TRIM_THRESHOLD_")
    monkeypatch.delenv("MALLOC_MMAP_THRESHOLD_", raising=False)
    try:
        glibc = sys.platform.startswith("linux") and bool(os.confstr("CS_GNU_LIBC_VERSION"))
    except (ValueError, OSError):
        glibc = False
    assert ing._glibc_keep_large_blocks() is glibc
