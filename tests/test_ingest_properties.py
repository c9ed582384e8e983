"""Property test: ingest of generated messy CSV exports.

Whatever the delimiter, encoding, quoting, chunking and corruptions: ingest never raises
anything but a FleetwatchError, the accounting identity holds with the exact expected
counts, and every quarantined row points at the physical line it came from.
"""
import csv
import io
import json
import tempfile
from datetime import datetime, timedelta, timezone
from pathlib import Path

import polars as pl
from hypothesis import HealthCheck, given, settings as hsettings, strategies as st

from fleetwatch.config import load_settings
from fleetwatch.errors import FleetwatchError
from fleetwatch.ingest import ingest_files
from fleetwatch.lake import Lake

BASE = datetime(2024, 5, 1, 8, 0, tzinfo=timezone.utc)   # Lisbon summer time: UTC+1
MAPPING = """
[format]
timezone = "Europe/Lisbon"
{delim}
[columns]
unit_id = "Máquina"
ts = "hora"
v_in = {{ column = "volts", unit = "V" }}
i_in = {{ column = "amps", unit = "mA" }}
n_in = {{ column = "vel_in", unit = "Hz" }}
n_out = {{ column = "vel_out", unit = "rpm" }}
ratio_cmd = "razao"
{temp}
"""
COLUMNS = ["seq", "Máquina", "hora", "volts", "amps", "vel_in", "vel_out", "razao", "nota",
           "temp_c"]
UNITS = ["Moínho-1", "Zürich 2", "U;3", 'U"4', "U,5"]
CORRUPTIONS = {
    "text": ("vel_in", "#VALUE!", "not_numeric"),
    "negative": ("vel_out", "-3", "out_of_range"),
    "ratio": ("razao", "12", "out_of_range"),
    "nan": ("volts", "NaN", "not_finite"),
    "inf": ("amps", "inf", "not_finite"),
    "unit": ("Máquina", "  ", "empty_unit_id"),
    "when": ("hora", "2024-02-30 10:00", "bad_timestamp"),
    "gap": ("hora", "2024-03-31 01:20:00", "nonexistent_local_time"),
    "missing": ("razao", "", "missing_value"),
    "extra": (None, None, "malformed_row"),
}

row_plan = st.one_of(
    st.just(("clean",)),
    st.tuples(st.just("corrupt"), st.sampled_from(sorted(CORRUPTIONS))),
    st.tuples(st.just("dup"), st.integers(0, 10_000)),
    st.tuples(st.just("conflict"), st.integers(0, 10_000)),
)
export = st.fixed_dictionaries({
    "rows": st.lists(row_plan, min_size=1, max_size=30),
    "delimiter": st.sampled_from([",", ";", "\t", "|"]),
    "declare_delimiter": st.booleans(),
    "encoding": st.sampled_from(["utf-8", "latin-1", "utf-8-sig"]),
    "crlf": st.booleans(),
    "with_temp": st.booleans(),
    "drop_required": st.sampled_from([None] * 6 + ["vel_out", "hora"]),
    "chunk_rows": st.sampled_from([4, 9, 500_000]),
    "note": st.sampled_from(["", "ok", "two\nlines", 'say "hi"', "a;b,c|d\te"]),
    "time_style": st.sampled_from(["naive", "z", "offset", "mixed"]),
})


def _fmt_ts(t: datetime, style: str, k: int) -> str:
    if style == "mixed":
        style = ("naive", "z", "offset")[k % 3]
    if style == "naive":
        return (t + timedelta(hours=1)).strftime("%Y-%m-%d %H:%M:%S")   # WEST = UTC+1
    if style == "z":
        return t.strftime("%Y-%m-%dT%H:%M:%SZ")
    return (t + timedelta(hours=1)).strftime("%Y-%m-%dT%H:%M:%S+01:00")


def _build(ex):
    """(file text, expected seqs by outcome) for one generated export."""
    rows, clean = [], []
    expect = {"ok": set(), "dup": set(), "bad": {}}
    for k, plan in enumerate(ex["rows"]):
        seq = f"r{k:04d}"
        if plan[0] in ("dup", "conflict") and clean:
            src = dict(clean[plan[1] % len(clean)])
            src["seq"] = seq
            src["hora"] = _fmt_ts(src["_t"], ex["time_style"], k)
            if plan[0] == "conflict":
                src["vel_out"] = str(float(src["vel_out"]) + 1.0)
                expect["bad"][seq] = "conflicting_duplicate"
            else:
                expect["dup"].add(seq)
            rows.append(src)
            continue
        t = BASE + timedelta(minutes=k)
        row = {"seq": seq, "Máquina": UNITS[k % len(UNITS)],
               "hora": _fmt_ts(t, ex["time_style"], k), "volts": f"{24 + k % 7}.5",
               "amps": str(1500 + k), "vel_in": f"{20 + k % 3}", "vel_out": f"{600 + k}",
               "razao": "2.0", "nota": ex["note"], "temp_c": f"{30 + k % 5}", "_t": t}
        if plan[0] == "corrupt":
            col, value, rule = CORRUPTIONS[plan[1]]
            if col is None:
                row["_extra"] = "surplus"
            else:
                row[col] = value
            expect["bad"][seq] = rule
        else:
            clean.append(row)
            expect["ok"].add(seq)
        rows.append(row)
    cols = [c for c in COLUMNS if c != ex["drop_required"] and (ex["with_temp"] or c != "temp_c")]
    buf = io.StringIO()
    w = csv.writer(buf, delimiter=ex["delimiter"], lineterminator="\r\n" if ex["crlf"] else "\n")
    w.writerow(cols)
    for r in rows:
        w.writerow([r[c] for c in cols] + ([r["_extra"]] if "_extra" in r else []))
    return buf.getvalue(), expect


@hsettings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(ex=export)
def test_generated_messy_csv_keeps_the_accounting(ex):
    text, expect = _build(ex)
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        path = d / "export.csv"
        path.write_bytes(text.encode(ex["encoding"]))
        delim = {"\t": "tab"}.get(ex["delimiter"], ex["delimiter"])
        (d / "m.toml").write_text(MAPPING.format(
            delim=f'delimiter = "{delim}"' if ex["declare_delimiter"] else "",
            temp='temp = { column = "temp_c", unit = "degC" }' if ex["with_temp"] else ""),
            encoding="utf-8")
        settings = load_settings(d / "proj", env={},
                                 overrides={"ingest_chunk_rows": ex["chunk_rows"]})
        try:
            rep = ingest_files([path], settings, mapping=d / "m.toml")
        except FleetwatchError:
            return                               # a clean refusal of the whole call is fine
        f = rep.files[0]
        assert f.rows_read == f.accepted + f.quarantined + f.duplicates
        if ex["drop_required"]:
            assert f.status == "refused" and ex["drop_required"] in f.message
            assert f.rows_read == 0
            return
        assert f.status == "ok", f.message
        assert f.accepted == len(expect["ok"])
        assert f.duplicates == len(expect["dup"])
        assert f.quarantined == len(expect["bad"])
        lake = Lake.from_settings(settings)
        q = lake.read("quarantine")
        decoded = path.read_bytes().decode(ex["encoding"]).replace("\r\n", "\n").split("\n")
        got = {}
        for line, raw, rule in zip(q["line"], q["raw"], q["rule"]):
            seq = json.loads(raw)["seq"]
            assert decoded[line - 1].startswith(seq), (line, seq)   # traced to its line
            got[seq] = rule
        assert got == expect["bad"]
        t = lake.read("telemetry")
        assert t.height == len(expect["ok"])
        assert t.select(pl.struct("unit_id", "ts").is_unique().all()).item()
        assert set(t["unit_id"]) <= set(UNITS)
