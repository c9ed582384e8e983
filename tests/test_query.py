"""The guarded SQL function: read-only views, refusals with clear messages, limits, output."""
import json
from datetime import datetime, timedelta, timezone

import polars as pl
import pytest

from fleetwatch.config import load_settings
from fleetwatch.errors import QueryError, UsageError
from fleetwatch.lake import Lake
from fleetwatch.query import format_result, run_query, sql_shell

T0 = datetime(2024, 5, 1, tzinfo=timezone.utc)


@pytest.fixture(scope="module")
def settings(tmp_path_factory):
    root = tmp_path_factory.mktemp("sqlproj")
    s = load_settings(root, env={})
    n = 50
    df = pl.DataFrame({
        "unit_id": [f"U{i % 5}" for i in range(n)],
        "ts": [T0 + timedelta(minutes=i) for i in range(n)],
        "p_in": [float(i) for i in range(n)], "n_in": [1000.0] * n, "n_out": [500.0] * n,
        "ratio_cmd": [2.0] * n, "batch_id": ["fixture"] * n})
    lake = Lake.from_settings(s)
    with lake.writer("test"):
        lake.append("telemetry", df)
    return s


def test_select_returns_rows_and_columns(settings):
    r = run_query("SELECT unit_id, count(*) AS n, max(ts) AS last FROM telemetry "
                  "GROUP BY unit_id ORDER BY unit_id", settings)
    assert r.columns == ["unit_id", "n", "last"]
    assert r.rows["n"].to_list() == [10] * 5 and not r.truncated
    assert r.rows.schema["last"] == pl.Datetime("us", "UTC")
    assert r.elapsed_s > 0
    for q in ("WITH a AS (SELECT 1 AS x) SELECT * FROM a", "DESCRIBE telemetry",
              "EXPLAIN SELECT * FROM telemetry", "SUMMARIZE telemetry"):
        assert run_query(q, settings).rows.height >= 1, q


def test_row_cap_sets_truncated(settings):
    r = run_query("SELECT * FROM telemetry ORDER BY ts", settings, row_cap=7)
    assert r.rows.height == 7 and r.truncated
    assert r.rows["p_in"].to_list() == [float(i) for i in range(7)]   # order is kept
    r = run_query("SELECT * FROM telemetry", settings, row_cap=50)
    assert r.rows.height == 50 and not r.truncated


@pytest.mark.parametrize("sql, needle", [
    ("SELECT * FROM read_csv('/etc/passwd')", "file access is disabled in the SQL console"),
    ("SELECT * FROM read_text('/etc/hostname')", "file access is disabled"),
    ("SELECT * FROM glob('/*')", "file access is disabled"),
    ("SELECT * FROM 'lake/telemetry/*.parquet'", "file access is disabled"),
    ("COPY telemetry TO '/tmp/fleetwatch-escape.csv'", "COPY would read or write files"),
    ("COPY (SELECT 1) TO '/tmp/fleetwatch-escape.parquet' (FORMAT parquet)", "only a single SELECT"),
    ("ATTACH '/tmp/fleetwatch-escape.duckdb' AS x", "ATTACH would open another database"),
    ("INSTALL httpfs", "would add extensions"),
    ("LOAD httpfs", "would add extensions"),
    ("SET enable_external_access = true", "settings, which are locked"),
    ("RESET lock_configuration", "settings, which are locked"),
    ("PRAGMA memory_limit='100GB'", "only a single SELECT"),
    ("SELECT 1; SELECT 2", "only a single statement is allowed here"),
    ("SELECT 1; COPY telemetry TO '/tmp/x.csv'", "only a single statement"),
    ("CREATE TABLE t AS SELECT * FROM telemetry", "CREATE would change the database"),
    ("DROP VIEW telemetry", "DROP would change the database"),
    ("EXPORT DATABASE '/tmp/fleetwatch-export'", "EXPORT would write files"),
    ("EXPLAIN ANALYZE COPY telemetry TO '/tmp/x.csv'", "only EXPLAIN of a single SELECT"),
    ("SELECT * FROM secret_frame", "does not exist"),   # no replacement scans of Python vars
    ("SELEC 1", "does not parse"),
])
def test_escape_attempts_are_refused_with_a_clear_message(settings, sql, needle, tmp_path):
    secret_frame = pl.DataFrame({"password": ["hunter2"]})  # noqa: F841 (in scope on purpose)
    with pytest.raises(QueryError) as err:
        run_query(sql, settings)
    assert needle in err.value.message
    assert err.value.hint


def test_nothing_was_written_by_the_attempts():
    import os
    for p in ("/tmp/fleetwatch-escape.csv", "/tmp/fleetwatch-escape.parquet",
              "/tmp/fleetwatch-escape.duckdb", "/tmp/fleetwatch-export"):
        assert not os.path.exists(p), p


def test_time_limit_interrupts_a_long_query(settings):
    with pytest.raises(QueryError, match=r"query stopped after 0.5 s \(sql_time_limit_s\)"):
        run_query("SELECT count(*) FROM range(1000000000) a, range(1000000) b", settings,
                  time_limit_s=0.5)
    assert run_query("SELECT 1 AS one", settings).rows["one"].to_list() == [1]


def test_json_format_iso_utc_and_csv(settings, tmp_path):
    r = run_query("SELECT unit_id, ts, p_in, ts::DATE AS d, 'NaN'::DOUBLE AS bad FROM telemetry "
                  "ORDER BY ts LIMIT 2", settings)
    rows = json.loads(format_result(r, "json"))
    assert rows == [
        {"unit_id": "U0", "ts": "2024-05-01T00:00:00Z", "p_in": 0.0, "d": "2024-05-01",
         "bad": None},
        {"unit_id": "U1", "ts": "2024-05-01T00:01:00Z", "p_in": 1.0, "d": "2024-05-01",
         "bad": None}]
    csv_text = format_result(r, "csv").splitlines()
    assert csv_text[0] == "unit_id,ts,p_in,d,bad"
    assert csv_text[1].startswith("U0,2024-05-01T00:00:00Z,0.0,")
    out = tmp_path / "r.parquet"
    assert format_result(r, "parquet", out) is None
    assert pl.read_parquet(out).height == 2
    with pytest.raises(UsageError):
        format_result(r, "parquet")
    assert "truncated" not in format_result(r, "table")


def test_cli_sql_json_and_refusal(settings, capsys):
    from fleetwatch.cli import main

    with pytest.raises(SystemExit) as ex:
        main(["--project", str(settings.project), "sql", "--format", "json",
              "SELECT count(*) AS n FROM telemetry"])
    assert ex.value.code == 0
    assert json.loads(capsys.readouterr().out) == [{"n": 50}]
    with pytest.raises(SystemExit) as ex:
        main(["--project", str(settings.project), "sql", "COPY telemetry TO 'x.csv'"])
    assert ex.value.code == 1
    err = capsys.readouterr().err
    assert err.splitlines()[0] == ("Error: only a single SELECT is allowed here; COPY refused: "
                                   "COPY would read or write files")


def test_interactive_shell_reads_until_semicolon(settings):
    import io
    stdin = io.StringIO("SELECT count(*) AS n\nFROM telemetry;\nSELECT * FROM nope;\n"
                        ".quit\nSELECT 'never run';\n")
    out, err = io.StringIO(), io.StringIO()
    failures = sql_shell(settings, fmt="csv", stdin=stdin, stdout=out, stderr=err)
    assert out.getvalue().splitlines() == ["n", "50"]
    assert failures == 1 and "does not exist" in err.getvalue()
