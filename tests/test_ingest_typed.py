"""CSV numbers parsed as numbers while reading (the fast path) give exactly what the text
path gives: same accepted rows and values, same quarantine (line, column, rule, message and
raw text), same accounting, whatever the chunk size."""
import csv
import json

import polars as pl
import pytest

from fleetwatch import ingest
from fleetwatch.config import load_settings
from fleetwatch.ingest import ingest_files
from fleetwatch.lake import Lake

HEADER = "unit_id,ts,v_in,i_in,n_in,n_out,ratio_cmd,t_out,temp"


def _rec(unit, minute, v="40.5", i="2.5", n_in="1200", n_out="588", ratio="2.0", t="1.5",
         temp="45", extra=""):
    ts = f"2024-05-01T{minute // 60:02d}:{minute % 60:02d}:00Z"
    return ",".join([unit, ts, v, i, n_in, n_out, ratio, t, temp]) + extra


# (record, outcome, quarantined column); records go in at fixed positions of a clean file
ODD = [
    (_rec("U1", 3, n_in="abc"), "not_numeric", "n_in"),
    (_rec("U2", 5, temp="hot"), "not_numeric", "temp"),       # optional column, not empty
    (_rec("U3", 7, temp=""), "ok", None),                     # optional column, empty
    (_rec("U1", 9, v="nan"), "not_finite", "v_in"),
    (_rec("U2", 11, n_out="25000"), "out_of_range", "n_out"),
    (_rec("U3", 13, ratio="9"), "out_of_range", "ratio_cmd"),
    (",,,,,,,,", "blank", None),
    ("", "blank", None),
    ("   ", "blank", None),
    (_rec("U1", 15, extra=",surplus"), "malformed_row", None),
    (_rec("U2", 17, extra=","), "ok", None),                  # a trailing empty field
    (_rec("U3", 19, n_in=" 1200"), "ok", None),
    (_rec("U1", 21, n_in="1200 "), "ok", None),
    (_rec("U2", 23, i="1e0"), "ok", None),
    (_rec("U3", 25, v='"40.5"'), "ok", None),
    (_rec("", 27), "empty_unit_id", "unit_id"),
    ("U1,not a time,40,2,1200,588,2.0,1.5,45", "bad_timestamp", "ts"),
    (_rec("U2", 29, n_out=""), "missing_value", "n_out"),     # required column, empty
    (_rec("U3", 31, t="inf"), "not_finite", "t_out"),
    (_rec("U1", 33, n_in="0x10"), "not_numeric", "n_in"),
    (_rec("U2", 35, n_out="1_000"), "not_numeric", "n_out"),
    (_rec("U3", 37, temp='"5,1"'), "not_numeric", "temp"),     # a quoted delimiter
    (_rec("U1", 39, v="+40.5"), "ok", None),
    (_rec("U2", 41, i="TRUE"), "not_numeric", "i_in"),
]


def _clean(n: int) -> list[str]:
    units = ("U1", "U2", "U3")
    return [_rec(units[k % 3], 100 + k // 3, v=f"{40 + (k % 17) / 8:.3f}",
                 n_in=f"{1000 + k % 97}.0", temp=f"{40 + k % 7}") for k in range(n)]


def _file(tmp_path, dense: bool) -> tuple[object, list[str], dict[int, tuple]]:
    recs = _clean(1200)
    if dense:                       # an optional value empty on every row: all rows suspect
        recs = [",".join(r.split(",")[:-1] + [""]) for r in recs]
    placed: dict[int, tuple] = {}
    for k, odd in enumerate(ODD):
        pos = 25 + k * 45               # at most 2 in a block of 20-row chunks (< 5 %)
        recs.insert(pos, odd[0])
    # duplicates: the exact text again, and the same key with other values (raw text kept)
    recs.insert(300, recs[40])
    conflict = recs[60].rsplit(",", 1)[0] + ",99.50"
    recs.insert(310, conflict)
    for line, rec in enumerate(recs, start=2):
        for odd in ODD:
            if rec == odd[0]:
                placed[line] = odd
    path = tmp_path / "fleet.csv"
    path.write_text(HEADER + "\n" + "\n".join(recs) + "\n")
    return path, recs, placed


def _run(tmp_path, name, path, chunk_rows, typed: bool, monkeypatch):
    with monkeypatch.context() as m:
        if not typed:
            m.setattr(ingest._CsvSource, "use_typed", lambda self, cols: None)
        settings = load_settings(tmp_path / name, env={},
                                 overrides={"ingest_chunk_rows": chunk_rows})
        rep = ingest_files([path], settings)
    lake = Lake.from_settings(settings)
    f = rep.files[0]
    assert f.status == "ok", f.message
    assert f.rows_read == f.accepted + f.quarantined + f.duplicates
    t = lake.read("telemetry").drop("batch_id").sort("unit_id", "ts")
    q = lake.read("quarantine").select("line", "column", "rule", "message", "raw").sort("line")
    # the batch a conflict names differs between runs
    q = q.with_columns(pl.col("message").str.replace_all(r"\(batch ingest-[^)]*\)", "(batch)"))
    return f, t, q


@pytest.mark.parametrize("chunk_rows", [20, 1_000_000])
@pytest.mark.parametrize("dense", [False, True])
def test_typed_read_matches_the_text_path(tmp_path, monkeypatch, chunk_rows, dense):
    path, recs, placed = _file(tmp_path, dense)
    typed_blocks, text_blocks = [], []
    orig = ingest._CsvSource._typed_frame

    def spy(self, data, first_line, n_newlines):
        df = orig(self, data, first_line, n_newlines)
        (typed_blocks if df is not None else text_blocks).append(first_line)
        return df

    monkeypatch.setattr(ingest._CsvSource, "_typed_frame", spy)
    f1, t1, q1 = _run(tmp_path, "typed", path, chunk_rows, True, monkeypatch)
    if dense:
        assert text_blocks and not typed_blocks   # >5 % suspect rows: one text parse instead
    else:
        assert typed_blocks and not text_blocks   # the fast path really ran
    f2, t2, q2 = _run(tmp_path, "text", path, chunk_rows, False, monkeypatch)
    assert (f1.rows_read, f1.accepted, f1.quarantined, f1.duplicates) == \
        (f2.rows_read, f2.accepted, f2.quarantined, f2.duplicates)
    assert f1.rules == f2.rules
    assert t1.equals(t2)
    assert q1.equals(q2)

    blanks = sum(1 for o in ODD if o[1] == "blank")
    assert f1.rows_read == len(recs) - blanks
    assert f1.duplicates == 1
    want = sorted((line, o[1], o[2]) for line, o in placed.items() if o[1] not in ("ok", "blank"))
    got = q1.filter(pl.col("rule") != "conflicting_duplicate").select("line", "rule", "column")
    assert got.rows() == want
    lines = path.read_text().split("\n")
    for line, raw in zip(q1["line"], q1["raw"]):
        values = json.loads(raw)             # the raw text, as in the file
        fields = next(csv.reader([lines[line - 1]]))
        assert [values[c] for c in HEADER.split(",")] == fields[:9]
    conflict = q1.filter(pl.col("rule") == "conflicting_duplicate")
    assert conflict.height == 1 and json.loads(conflict["raw"][0])["temp"] == "99.50"
    row = q1.filter(pl.col("column") == "n_out").row(0, named=True)
    assert json.loads(row["raw"])["n_out"] == "25000" and "25000" in row["message"]
    # values of rows that were read again as text
    odd = t1.filter(pl.col("ts").dt.hour() == 0)        # the clean rows start at 01:40
    u3 = odd.filter(pl.col("unit_id") == "U3")
    assert u3.filter(pl.col("ts").dt.minute() == 7)["temp"].to_list() == [None]
    assert u3.filter(pl.col("ts").dt.minute() == 19)["n_in"].to_list() == [1200.0]
    assert u3.filter(pl.col("ts").dt.minute() == 25)["v_in"].to_list() == [40.5]
    assert odd.filter(pl.col("unit_id") == "U1", pl.col("ts").dt.minute() == 21)["n_in"] \
        .to_list() == [1200.0]
    assert odd.filter(pl.col("unit_id") == "U2", pl.col("ts").dt.minute() == 23)["i_in"] \
        .to_list() == [1.0]


def test_retext_gives_the_lines_asked_for(tmp_path):
    path, recs, placed = _file(tmp_path, dense=False)
    src = ingest._CsvSource(path, None, 1_000_000)
    src.use_typed(["v_in", "i_in", "n_in", "n_out", "ratio_cmd", "t_out", "temp"])
    try:
        [(df, retext)] = list(src.chunks())
    finally:
        src.close()
    assert retext is not None and df["n_in"].dtype == pl.Float64
    assert df.height == len(recs)                    # blank lines are rows until read as text
    wanted = pl.Series([2, 27, 28, len(recs) + 1], dtype=pl.Int64)
    text = retext(wanted)
    assert text["_line"].to_list() == [2, 27, 28, len(recs) + 1]
    assert text["n_in"].dtype == pl.String
    for line, unit, n_in in zip(text["_line"], text["unit_id"], text["n_in"]):
        fields = recs[line - 2].split(",")
        assert (unit, n_in) == (fields[0], fields[4])
    blank_line = next(line for line, o in placed.items() if o[0] == ",,,,,,,,")
    assert retext(pl.Series([blank_line], dtype=pl.Int64)).height == 0


def test_rows_held_back_keep_at_most_two_blocks_alive(tmp_path, monkeypatch):
    # rows held back to the next chunk keep their block's text (to quote them if they turn
    # out to be conflicting duplicates); blocks left without held rows must be let go, or
    # memory grows with the file
    path = tmp_path / "clean.csv"             # time order, units interleaved: tails held
    path.write_text(HEADER + "\n" + "\n".join(_clean(1500)) + "\n")
    sizes = []
    orig = ingest._RawRows.since

    def spy(self, line):
        out = orig(self, line)
        sizes.append(len(out.parts))
        return out

    monkeypatch.setattr(ingest._RawRows, "since", spy)
    f, t, _ = _run(tmp_path, "held", path, 20, True, monkeypatch)
    assert len(sizes) >= 8                      # rows were held back chunk after chunk
    assert max(sizes) <= 2
    assert (f.rows_read, f.accepted, t.height) == (1500, 1500, 1500)


def test_a_row_with_two_fields_too_many_sends_its_block_to_the_text_path(tmp_path,
                                                                          monkeypatch):
    # the typed parse has one spare column: a row with two or more fields past the header
    # makes the reader refuse the block, which is then parsed as text (the four spare
    # columns there quote the surplus fields in the raw text)
    recs = _clean(900)
    recs.insert(700, _rec("U2", 5, extra=",,x"))
    path = tmp_path / "surplus.csv"
    path.write_text(HEADER + "\n" + "\n".join(recs) + "\n")
    seen = {"typed": 0, "text": 0}
    orig = ingest._CsvSource._typed_frame

    def spy(self, data, first_line, n_newlines):
        df = orig(self, data, first_line, n_newlines)
        seen["typed" if df is not None else "text"] += 1
        return df

    monkeypatch.setattr(ingest._CsvSource, "_typed_frame", spy)
    f1, t1, q1 = _run(tmp_path, "typed", path, 20, True, monkeypatch)
    assert seen["typed"] >= 5 and seen["text"] == 1
    f2, t2, q2 = _run(tmp_path, "text", path, 20, False, monkeypatch)
    assert (f1.rows_read, f1.accepted, f1.quarantined) == (f2.rows_read, f2.accepted,
                                                           f2.quarantined) == (901, 900, 1)
    assert t1.equals(t2) and q1.equals(q2)
    row = q1.row(0, named=True)
    assert (row["line"], row["rule"]) == (702, "malformed_row")
    raw = json.loads(row["raw"])
    assert (raw["_extra_1"], raw["_extra_2"]) == ("", "x")
