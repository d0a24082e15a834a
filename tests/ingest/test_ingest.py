"""Ingest end to end on both store backends. All source data here is invented data (small, made up)."""

from __future__ import annotations

import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlalchemy as sa

from drift.exceptions import ConfigError
from drift.ingest import IngestSummary, ingest_all, ingest_source
from tests.ingest.helpers import LATER, NOW, counts, make_config, obs, quar, utc, value, weekly_model

FIXTURES = Path(__file__).parent / "fixtures"


def csv_source(path: str = "data.csv", **kw):
    return {"name": "src", "kind": "csv", "path": path, "period_column": "week", **kw}


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


# ------------------------------------------------------------------------------------------ source kinds

def test_csv_wide_fixture_weekly_default_available(store, tmp_path):
    # invented data: the fixture file weekly_wide.csv
    shutil.copy(FIXTURES / "weekly_wide.csv", tmp_path / "data.csv")
    cfg = make_config(tmp_path, [csv_source()], [weekly_model("sales", [{"series": "temp", "lag": 2,
                                                                          "delay": "2 days"}])])
    (s,) = ingest_all(cfg, store, now=NOW)
    assert (s.files, s.stored, s.known, s.revised, s.quarantined, s.failed_files) == (1, 5, 0, 0, 0, [])
    df = obs(store)
    assert len(df) == 5  # the empty temp cell of 2024-01-08 is a missing observation
    assert value(df, "temp", "2024-01-08").empty
    sales = value(df, "sales", "2024-01-15").iloc[0]
    assert sales["value"] == 99.25
    # end of the week starting Monday 2024-01-15 is Monday 2024-01-22 00:00 UTC; sales has no delay
    assert sales["available_at"] == utc(2024, 1, 22)
    temp = value(df, "temp", "2024-01-01").iloc[0]
    assert temp["available_at"] == utc(2024, 1, 10)  # 2024-01-08 + 2 days
    assert (df["ingested_at"] == pd.Timestamp(NOW)).all() and (df["source"] == "src").all()
    assert df["issued_at"].isna().all()
    assert quar(store).empty


def test_monthly_available_is_next_month_start_plus_delay(store, tmp_path):
    write(tmp_path / "data.csv", "month,y,x\n2024-01-01,1,10\n2024-02-01,2,20\n2024-12-01,3,30\n")
    model = {"name": "m", "target": "y", "frequency": "M",
             "drivers": [{"series": "x", "lag": 2, "delay": "36 hours"}],
             "reference": {"start": "2020-01-01", "end": "2023-12-01"}}
    cfg = make_config(tmp_path, [csv_source(period_column="month")], [model])
    ingest_all(cfg, store, now=NOW)
    df = obs(store)
    assert value(df, "y", "2024-01-01").iloc[0]["available_at"] == utc(2024, 2, 1)
    assert value(df, "x", "2024-02-01").iloc[0]["available_at"] == utc(2024, 3, 2, 12)  # Feb has 29 days
    assert value(df, "x", "2024-12-01").iloc[0]["available_at"] == utc(2025, 1, 2, 12)


def test_csv_long(store, tmp_path):
    write(tmp_path / "long.csv", "week;name;amount\n2024-01-01;a;1,5\n2024-01-01;b;2\n2024-01-08;a;\n"
                                 "2024-01-08;b;-3,25\n")
    src = {"name": "long", "kind": "csv", "path": "long.csv", "period_column": "week", "series_column": "name",
           "value_column": "amount", "delimiter": ";", "decimal": ",", "frequency": "W", "delay": "1 day"}
    cfg = make_config(tmp_path, [src])
    s = ingest_source(cfg, store, "long", now=NOW)
    assert (s.stored, s.quarantined) == (3, 0)
    df = obs(store)
    assert value(df, "a", "2024-01-01").iloc[0]["value"] == 1.5
    assert value(df, "b", "2024-01-08").iloc[0]["value"] == -3.25
    # source-level delay and frequency for a series no model uses: stored all the same
    assert value(df, "b", "2024-01-08").iloc[0]["available_at"] == utc(2024, 1, 16)


def test_columns_restricts_wide_series(store, tmp_path):
    write(tmp_path / "data.csv", "week,a,b,c\n2024-01-01,1,2,3\n")
    cfg = make_config(tmp_path, [csv_source(columns=["a", "c"], frequency="W")])
    ingest_all(cfg, store, now=NOW)
    assert sorted(obs(store)["series"]) == ["a", "c"]


def test_series_without_frequency_stored_available_at_ingest(store, tmp_path):
    write(tmp_path / "data.csv", "week,free\n2024-01-03,7\n")
    cfg = make_config(tmp_path, [csv_source()])
    (s,) = ingest_all(cfg, store, now=NOW)
    row = obs(store).iloc[0]
    assert s.stored == 1 and row["period"] == pd.Timestamp("2024-01-03")
    assert row["available_at"] == pd.Timestamp(NOW)


def test_parquet_wide_and_long(store, tmp_path):
    # invented data; a null is a missing observation, a stored NaN is a non-finite value
    wide = pa.table({"week": pa.array([pd.Timestamp("2024-01-01").date(), pd.Timestamp("2024-01-08").date()]),
                     "a": pa.array([1.0, None]), "b": pa.array([2.0, float("nan")])})
    pq.write_table(wide, tmp_path / "wide.parquet")
    long = pa.table({"week": ["2024-01-01", "2024-01-08"], "series": ["c", "c"], "v": [5, 6]})
    pq.write_table(long, tmp_path / "long.parquet")
    cfg = make_config(tmp_path, [
        {"name": "pw", "kind": "parquet", "path": "wide.parquet", "period_column": "week", "frequency": "W"},
        {"name": "pl", "kind": "parquet", "path": "long.parquet", "period_column": "week", "frequency": "W",
         "series_column": "series", "value_column": "v"}])
    sw, sl = ingest_all(cfg, store, now=NOW)
    assert (sw.stored, sw.quarantined, sl.stored, sl.quarantined) == (2, 1, 2, 0)
    df = obs(store)
    assert sorted(zip(df["series"], df["value"])) == [("a", 1.0), ("b", 2.0), ("c", 5.0), ("c", 6.0)]
    q = quar(store).iloc[0]
    assert (q["row"], q["column"], q["raw_value"]) == (2, "b", "nan")  # parquet rows count from 1
    assert "not a finite number" in q["reason"]
    assert value(df, "c", "2024-01-08").iloc[0]["available_at"] == utc(2024, 1, 15)


def _sqlite_source_db(path: Path) -> None:
    # invented data: a source table with an update timestamp
    con = sqlite3.connect(path)
    con.execute("create table obs (updated_at text, week text, series text, value real)")
    con.executemany("insert into obs values (?, ?, ?, ?)", [
        ("2023-12-31 00:00:00", "2023-12-25", "a", 0.5),
        ("2024-01-02 09:00:00", "2024-01-01", "a", 1.0),
        ("2024-01-09 09:00:00", "2024-01-08", "a", 2.0),
    ])
    con.commit()
    con.close()


def test_sql_sqlite_since_bound(store, tmp_path):
    db = tmp_path / "src.db"
    _sqlite_source_db(db)
    src = {"name": "q", "kind": "sql", "url": f"sqlite:///{db}", "period_column": "week",
           "series_column": "series", "value_column": "value", "frequency": "W", "since": "2024-01-01",
           "query": "select week, series, value from obs where updated_at > :since order by week"}
    cfg = make_config(tmp_path, [src])
    (s,) = ingest_all(cfg, store, now=NOW)
    # the configured since (2024-01-01) leaves out the 2023 row
    assert (s.files, s.stored) == (1, 2)
    assert sorted(obs(store)["period"].dt.strftime("%Y-%m-%d")) == ["2024-01-01", "2024-01-08"]
    # a new source row arrives; the next ingest binds since = the latest ingested_at (NOW)
    con = sqlite3.connect(db)
    con.execute("insert into obs values ('2024-06-05 00:00:00', '2024-01-15', 'a', 3.0)")
    con.execute("insert into obs values ('2024-05-01 00:00:00', '2024-01-22', 'a', 9.0)")  # before NOW
    con.commit()
    con.close()
    (s2,) = ingest_all(cfg, store, now=LATER)
    assert (s2.stored, s2.known) == (1, 0)
    assert value(obs(store), "a", "2024-01-22").empty


def test_sql_query_failure_reported(store, tmp_path):
    src = {"name": "q", "kind": "sql", "url": f"sqlite:///{tmp_path / 'none.db'}", "period_column": "week",
           "query": "select * from missing_table"}
    (s,) = ingest_all(make_config(tmp_path, [src]), store, now=NOW)
    assert s.failed_files and s.failed_files[0][0] == "sql:q" and "query failed" in s.failed_files[0][1]
    assert counts(store) == (0, 0, 0)


def test_sql_url_env(store, tmp_path, monkeypatch):
    db = tmp_path / "src.db"
    _sqlite_source_db(db)
    monkeypatch.setenv("DRIFT_TEST_SRC_URL", f"sqlite:///{db}")
    src = {"name": "q", "kind": "sql", "url_env": "DRIFT_TEST_SRC_URL", "period_column": "week",
           "series_column": "series", "value_column": "value", "frequency": "W",
           "query": "select week, series, value from obs"}
    (s,) = ingest_all(make_config(tmp_path, [src]), store, now=NOW)
    assert s.stored == 3  # no since configured: 1970-01-01


@pytest.mark.postgres
def test_sql_postgres_source(sqlite_store, pg_schema, tmp_path):
    # invented data in a table of the test schema; the store is SQLite here
    eng = sa.create_engine(pg_schema)
    with eng.begin() as conn:
        conn.execute(sa.text("create table src_wide (week date, updated timestamp, x double precision, "
                             "y numeric)"))
        conn.execute(sa.text("insert into src_wide values ('2024-01-01', '2024-01-02', 1.5, 2.25), "
                             "('2024-01-08', '2024-01-09', null, 3), ('2024-01-15', '2023-01-01', 9, 9)"))
    eng.dispose()
    src = {"name": "pg", "kind": "sql", "url": pg_schema, "period_column": "week", "frequency": "W",
           "since": "2024-01-01", "columns": ["x", "y"],
           "query": "select week, x, y from src_wide where updated > :since"}
    (s,) = ingest_all(make_config(tmp_path, [src]), sqlite_store, now=NOW)
    assert (s.stored, s.quarantined, s.failed_files) == (3, 0, [])
    df = obs(sqlite_store)
    assert value(df, "y", "2024-01-01").iloc[0]["value"] == 2.25
    assert value(df, "x", "2024-01-08").empty and value(df, "x", "2024-01-15").empty


# ------------------------------------------------------------------------------------------ vintages

def test_reingest_is_noop(store, tmp_path):
    write(tmp_path / "data.csv", "week,a,b\n2024-01-01,1,x\n2024-01-08,2,3\n")
    cfg = make_config(tmp_path, [csv_source(frequency="W")])
    (s1,) = ingest_all(cfg, store, now=NOW)
    before = counts(store)
    (s2,) = ingest_all(cfg, store, now=LATER)
    assert (s1.stored, s1.quarantined) == (3, 1)
    assert (s2.stored, s2.known, s2.revised, s2.quarantined) == (0, 3, 0, 0)
    assert counts(store) == before


def test_reingest_grown_file_compares_vintages(store, tmp_path):
    # the same rows plus one new row: the old values are known, their quarantine is not repeated
    f = write(tmp_path / "data.csv", "week,a\n2024-01-01,1\n2024-01-08,bad\n")
    cfg = make_config(tmp_path, [csv_source(frequency="W")])
    ingest_all(cfg, store, now=NOW)
    write(f, "week,a\n2024-01-01,1\n2024-01-08,bad\n2024-01-15,3\n")
    (s,) = ingest_all(cfg, store, now=LATER)
    assert (s.stored, s.known, s.revised, s.quarantined, s.skipped) == (1, 1, 0, 0, 0)
    assert len(obs(store)) == 2 and len(quar(store)) == 1
    # the same content under another name is compared value by value: a no-op for observations
    shutil.copy(f, tmp_path / "copy.csv")
    (s3,) = ingest_all(make_config(tmp_path, [csv_source("copy.csv", frequency="W")]), store, now=LATER)
    assert (s3.stored, s3.known, s3.revised) == (0, 2, 0)
    assert len(obs(store)) == 2


def test_revision_is_new_vintage_available_at_ingest(store, tmp_path):
    write(tmp_path / "v1.csv", "week,a\n2024-01-01,1\n2024-01-08,2\n")
    write(tmp_path / "v2.csv", "week,a\n2024-01-01,1\n2024-01-08,2.5\n")
    cfg1 = make_config(tmp_path, [csv_source("v1.csv", frequency="W")])
    cfg2 = make_config(tmp_path, [csv_source("v2.csv", frequency="W")])
    ingest_all(cfg1, store, now=NOW)
    (s,) = ingest_all(cfg2, store, now=LATER)
    assert (s.stored, s.known, s.revised) == (0, 1, 1)
    rows = value(obs(store), "a", "2024-01-08").sort_values("available_at")
    assert rows["value"].tolist() == [2.0, 2.5]
    assert rows["available_at"].tolist() == [utc(2024, 1, 15), pd.Timestamp(LATER)]
    with store.connect() as conn:
        latest = store.latest_vintages(conn, ["a"])
    assert sorted(latest["value"]) == [1.0, 2.5]


def test_available_column_honoured(store, tmp_path):
    write(tmp_path / "data.csv", "week,published,a\n2024-01-01,2024-01-09T08:00:00,1\n"
                                 "2024-01-08,2024-01-16T10:00:00+02:00,2\n2024-01-15,,3\n")
    cfg = make_config(tmp_path, [csv_source(available_column="published", frequency="W")])
    (s,) = ingest_all(cfg, store, now=NOW)
    assert s.stored == 3
    df = obs(store).sort_values("period")
    assert df["available_at"].tolist() == [utc(2024, 1, 9, 8), utc(2024, 1, 16, 8), utc(2024, 1, 22)]
    # a revision with its own published time keeps that time
    write(tmp_path / "data.csv", "week,published,a\n2024-01-08,2024-02-01T00:00:00Z,2.2\n")
    ingest_all(cfg, store, now=LATER)
    assert value(obs(store), "a", "2024-01-08")["available_at"].max() == utc(2024, 2, 1)


def test_period_label_end(store, tmp_path):
    # weeks of the model start on Monday (reference start 2023-01-02) so they end on Sunday
    write(tmp_path / "w.csv", "week,a\n2024-01-07,1\n2024-01-14,2\n2024-01-10,3\n")
    write(tmp_path / "m.csv", "month,b\n2024-01-31,1\n2024-02-29,2\n2024-03-30,3\n")
    cfg = make_config(tmp_path, [
        csv_source("w.csv", period_label="end"),
        {"name": "m", "kind": "csv", "path": "m.csv", "period_column": "month", "period_label": "end",
         "frequency": "M"}], [weekly_model("a")])
    sw, sm = ingest_all(cfg, store, now=NOW)
    assert (sw.stored, sw.quarantined, sm.stored, sm.quarantined) == (2, 1, 2, 1)
    df = obs(store)
    assert sorted(df.loc[df.series == "a", "period"].dt.strftime("%Y-%m-%d")) == ["2024-01-01", "2024-01-08"]
    assert sorted(df.loc[df.series == "b", "period"].dt.strftime("%Y-%m-%d")) == ["2024-01-01", "2024-02-01"]
    assert value(df, "a", "2024-01-01").iloc[0]["available_at"] == utc(2024, 1, 8)
    q = quar(store).sort_values("row")
    assert "2024-01-10 is not the last day of a W period (weeks end on Sunday)" in q.iloc[0]["reason"]
    # a Wednesday under period_label: end names the weekday its weeks would start on
    assert "(if the weeks end on Wednesday, give the models' reference.start on a Thursday" in q.iloc[0]["reason"]
    assert "2024-03-30 is not the last day of a M period" in q.iloc[1]["reason"]


def test_issued_column_forecast_vintages(store, tmp_path):
    write(tmp_path / "fc.csv", "week,issued,temp_fc\n2024-01-08,2024-01-01T06:00:00Z,5\n"
                               "2024-01-08,2024-01-04T06:00:00Z,6\n2024-01-15,2024-01-04T06:00:00Z,7\n")
    cfg = make_config(tmp_path, [csv_source("fc.csv", issued_column="issued", frequency="W")])
    (s,) = ingest_all(cfg, store, now=NOW)
    assert (s.stored, s.quarantined) == (3, 0)
    rows = value(obs(store), "temp_fc", "2024-01-08").sort_values("issued_at")
    assert rows["issued_at"].tolist() == [utc(2024, 1, 1, 6), utc(2024, 1, 4, 6)]
    assert rows["available_at"].tolist() == rows["issued_at"].tolist()  # a forecast is known when issued
    # a changed value of one issue is a revision of that vintage only
    write(tmp_path / "fc.csv", "week,issued,temp_fc\n2024-01-08,2024-01-04T06:00:00Z,6.5\n")
    (s2,) = ingest_all(cfg, store, now=LATER)
    assert (s2.stored, s2.revised) == (0, 1)
    assert len(value(obs(store), "temp_fc", "2024-01-08")) == 3


def test_weekly_anchor_from_model_reference_start(store, tmp_path):
    # reference start 2023-01-01 is a Sunday: weeks start on Sunday
    write(tmp_path / "data.csv", "week,a\n2024-01-07,1\n2024-01-08,2\n")
    cfg = make_config(tmp_path, [csv_source()], [weekly_model("a", start="2023-01-01")])
    (s,) = ingest_all(cfg, store, now=NOW)
    assert (s.stored, s.quarantined) == (1, 1)
    assert "weeks start on Sunday" in quar(store).iloc[0]["reason"]


# ------------------------------------------------------------------------------------------ quarantine

def _one_quarantine(store, tmp_path, text: str, **src):
    write(tmp_path / "data.csv", text)
    cfg = make_config(tmp_path, [csv_source(**{"frequency": "W", **src})])
    (s,) = ingest_all(cfg, store, now=NOW)
    q = quar(store)
    assert s.quarantined == len(q)
    return s, q


def test_quarantine_non_numeric(store, tmp_path):
    s, q = _one_quarantine(store, tmp_path, "week,a,b\n2024-01-01,1,2\n2024-01-08,12x,3\n")
    assert s.stored == 3 and len(q) == 1
    r = q.iloc[0]
    assert (r["source"], r["row"], r["column"], r["raw_value"]) == ("src", 3, "a", "12x")  # header = row 1
    assert r["reason"] == "value '12x' is not a number"
    assert r["file"].endswith("data.csv")


def test_quarantine_non_finite(store, tmp_path):
    s, q = _one_quarantine(store, tmp_path, "week,a\n2024-01-01,inf\n2024-01-08,NaN\n2024-01-15,1e999\n")
    assert s.stored == 0
    assert q["row"].tolist() == [2, 3, 4] and q["raw_value"].tolist() == ["inf", "NaN", "1e999"]
    assert all("is not a finite number" in r for r in q["reason"])


def test_quarantine_unparseable_period(store, tmp_path):
    s, q = _one_quarantine(store, tmp_path, "week,a,b\n2024-13-01,1,2\n2024-01-08,3,4\n")
    assert s.stored == 2 and len(q) == 1  # one record for the row, none of its values stored
    r = q.iloc[0]
    assert (r["row"], r["column"], r["raw_value"]) == (2, "week", "2024-13-01")
    assert "period '2024-13-01' is not a date" in r["reason"]


def test_quarantine_period_format(store, tmp_path):
    s, q = _one_quarantine(store, tmp_path, "week,a\n01/01/2024,1\n2024-01-08,2\n", period_format="%d/%m/%Y")
    assert s.stored == 1 and q.iloc[0]["raw_value"] == "2024-01-08"
    assert "in the format '%d/%m/%Y'" in q.iloc[0]["reason"]


def test_quarantine_duplicates_all_copies(store, tmp_path):
    s, q = _one_quarantine(store, tmp_path, "week,a,b\n2024-01-01,1,2\n2024-01-08,3,\n2024-01-08,4,5\n")
    assert s.stored == 3  # a and b of 2024-01-01, and b of 2024-01-08 (only once present)
    assert q["row"].tolist() == [3, 4] and q["column"].tolist() == ["a", "a"]
    assert q["raw_value"].tolist() == ["3", "4"]
    assert all("series 'a' period 2024-01-08 appears in rows 3 and 4" in r for r in q["reason"])


def test_quarantine_duplicates_long(store, tmp_path):
    write(tmp_path / "data.csv", "week,s,v\n2024-01-01,a,1\n2024-01-01,b,1\n2024-01-01,a,2\n")
    src = csv_source(series_column="s", value_column="v", frequency="W")
    (s,) = ingest_all(make_config(tmp_path, [src]), store, now=NOW)
    q = quar(store)
    assert s.stored == 1 and q["row"].tolist() == [2, 4] and q["column"].tolist() == ["v", "v"]
    assert "rows 2 and 4" in q.iloc[0]["reason"]


def _ingest_weekly_and_monthly(store, tmp_path, weeks: str, months: str) -> None:
    """A weekly file (series a of a weekly model) and a monthly one (series y of a monthly model), ingested."""
    write(tmp_path / "data.csv", "week,a\n" + weeks)
    write(tmp_path / "m.csv", "month,y\n" + months)
    model_m = {"name": "mm", "target": "y", "frequency": "M",
               "reference": {"start": "2020-01-01", "end": "2023-12-01"}}
    cfg = make_config(tmp_path, [csv_source(), {"name": "m", "kind": "csv", "path": "m.csv",
                                                "period_column": "month"}],
                      [weekly_model("a"), model_m])
    ingest_all(cfg, store, now=NOW)


def test_quarantine_off_frequency_weekly_and_monthly(store, tmp_path):
    _ingest_weekly_and_monthly(store, tmp_path, "2024-03-04,1\n2024-03-05,2\n", "2024-03-01,1\n2024-03-15,2\n")
    q = quar(store).sort_values("source")
    r = q[q["source"] == "src"].iloc[0]
    assert (r["row"], r["column"], r["raw_value"]) == (3, "week", "2024-03-05")
    assert r["reason"].startswith("period 2024-03-05 is not the first day of a W period (weeks start on Monday)")
    r = q[q["source"] == "m"].iloc[0]
    assert (r["row"], r["raw_value"]) == (3, "2024-03-15")
    assert "is not the first day of a M period (months start on the 1st)" in r["reason"]
    assert len(obs(store)) == 2


def test_off_frequency_reason_says_which_setting_reads_the_file(store, tmp_path):
    # month ends and Sunday week ends under the default period_label: start. The reason names the setting
    # that reads them; a mid-week day gets only the weekday hint, a mid-month day none
    _ingest_weekly_and_monthly(store, tmp_path, "2024-03-10,1\n2024-03-06,2\n", "2024-02-29,1\n2024-03-15,2\n")
    q = quar(store).sort_values(["source", "row"])
    w = q[q["source"] == "src"]["reason"].tolist()
    assert "(it is the last day of a W period: if the file names each period by its last day, set " \
           "'period_label: end' on the source; if the weeks start on Sunday, give the models' " \
           "reference.start on a Sunday" in w[0]
    assert "period_label" not in w[1] and "(if the weeks start on Wednesday, give the models' " \
           "reference.start on a Wednesday" in w[1]
    m = q[q["source"] == "m"]["reason"].tolist()
    assert m[0].endswith("(it is the last day of a M period: if the file names each period by its last day, "
                         "set 'period_label: end' on the source)")
    assert m[1].endswith("the value was not stored")


def test_quarantine_empty_period_and_bad_available(store, tmp_path):
    s, q = _one_quarantine(store, tmp_path, "week,pub,a\n,2024-01-02,1\n2024-01-08,soon,2\n2024-01-15,,3\n"
                                            ",,\n", available_column="pub")
    assert s.stored == 1  # the fully empty last row is simply nothing
    assert q["row"].tolist() == [2, 3] and q["column"].tolist() == ["week", "pub"]
    assert "period is empty" in q.iloc[0]["reason"]
    assert "available time 'soon' is not a date and time" in q.iloc[1]["reason"]


def test_quarantine_empty_series_name(store, tmp_path):
    write(tmp_path / "data.csv", "week,s,v\n2024-01-01, ,1\n2024-01-01,a,2\n")
    (s,) = ingest_all(make_config(tmp_path, [csv_source(series_column="s", value_column="v",
                                                        frequency="W")]), store, now=NOW)
    q = quar(store)
    assert s.stored == 1 and (q.iloc[0]["row"], q.iloc[0]["column"]) == (2, "s")
    assert q.iloc[0]["reason"] == "the series name is empty"


# ------------------------------------------------------------------------------------------ bad files

def test_bad_files_write_nothing_others_ingest(store, tmp_path):
    d = tmp_path / "in"
    d.mkdir()
    write(d / "a_good.csv", "week,a\n2024-01-01,1\n")
    write(d / "b_truncated.csv", "week,a,b\n2024-01-08,1,2\n2024-01-15,3")  # cut in the last row
    (d / "c_latin1.csv").write_bytes("week,a\n2024-01-22,1\n2024-01-29,caf\xe9\n".encode("latin-1"))
    write(d / "d_ragged.csv", "week,a\n2024-02-05,1,9\n")
    write(d / "e_noperiod.csv", "date,a\n2024-02-12,1\n")
    write(d / "f_good.csv", "week,a\n2024-02-19,1\n")
    write(d / "g_badquote.csv", 'week,a\n2024-02-26,"1\n')
    cfg = make_config(tmp_path, [csv_source("in/*.csv", frequency="W")])
    (s,) = ingest_all(cfg, store, now=NOW)
    assert (s.files, s.stored, s.quarantined) == (7, 2, 0)
    failed = dict(s.failed_files)
    assert sorted(Path(f).name for f in failed) == ["b_truncated.csv", "c_latin1.csv", "d_ragged.csv",
                                                   "e_noperiod.csv", "g_badquote.csv"]
    msg = {Path(f).name: m for f, m in failed.items()}
    assert "b_truncated.csv, row 3: has 2 fields where the header has 3" in msg["b_truncated.csv"]
    assert "row 3" in msg["c_latin1.csv"] and "UTF-8" in msg["c_latin1.csv"]
    assert "row 2" in msg["d_ragged.csv"]
    assert "column 'week'" in msg["e_noperiod.csv"] and "no column 'week'" in msg["e_noperiod.csv"]
    assert counts(store) == (2, 0, 2)  # observations, quarantine, batches: only the two good files
    assert "2 failed" not in s.describe() and "5 failed" in s.describe()


def test_unreadable_parquet_writes_nothing(store, tmp_path):
    pq.write_table(pa.table({"week": ["2024-01-01"], "a": [1.0]}), tmp_path / "ok.parquet")
    data = (tmp_path / "ok.parquet").read_bytes()
    (tmp_path / "cut.parquet").write_bytes(data[: len(data) // 2])
    cfg = make_config(tmp_path, [{"name": "p", "kind": "parquet", "path": "*.parquet", "period_column": "week",
                                  "frequency": "W"}])
    (s,) = ingest_all(cfg, store, now=NOW)
    assert s.stored == 1 and len(s.failed_files) == 1 and s.failed_files[0][0].endswith("cut.parquet")
    assert "Parquet" in s.failed_files[0][1]
    assert counts(store) == (1, 0, 1)


def test_missing_file_reported(store, tmp_path):
    (s,) = ingest_all(make_config(tmp_path, [csv_source("nope.csv")]), store, now=NOW)
    assert len(s.failed_files) == 1 and "file not found" in s.failed_files[0][1]


def test_glob_of_several_files(store, tmp_path):
    for i in range(6):
        write(tmp_path / f"part{i}.csv", f"week,a\n{(pd.Timestamp('2024-01-01') + pd.Timedelta(weeks=i)).date()},{i}\n")
    cfg = make_config(tmp_path, [csv_source("part*.csv", frequency="W")])
    (s,) = ingest_all(cfg, store, now=NOW, progress=True)
    assert (s.files, s.stored) == (6, 6)
    assert obs(store)["value"].tolist() == [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]


# ------------------------------------------------------------------------------------------ API

def test_summary_api_and_errors(sqlite_store, tmp_path):
    s = IngestSummary("x", files=2, stored=3, known=1, revised=1, quarantined=2,
                      failed_files=[("f.csv", "bad")])
    d = s.as_dict()
    assert d["stored"] == 3 and d["failed_files"] == [["f.csv", "bad"]]
    assert s.describe().startswith("x: 2 files, 3 new, 1 revised, 1 already known, 2 quarantined")
    cfg = make_config(tmp_path, [csv_source()])
    with pytest.raises(ConfigError, match="no source named 'nope'"):
        ingest_all(cfg, sqlite_store, sources=["nope"])
    with pytest.raises(ValueError, match="now must be tz-aware"):
        ingest_all(cfg, sqlite_store, now=pd.Timestamp("2024-01-01").to_pydatetime())
    assert np.isfinite(1.0)


def test_sql_missing_period_column_reported(store, tmp_path):
    db = tmp_path / "src.db"
    _sqlite_source_db(db)
    src = {"name": "q", "kind": "sql", "url": f"sqlite:///{db}", "period_column": "day",
           "query": "select week, series, value from obs"}
    (s,) = ingest_all(make_config(tmp_path, [src]), store, now=NOW)
    assert s.failed_files == [("sql:q", s.failed_files[0][1])] and "no column 'day'" in s.failed_files[0][1]
    assert counts(store) == (0, 0, 0)


# ------------------------------------------------------------------------------------------ unchanged files

def test_unchanged_file_recognised_by_size_and_mtime_without_reading(store, tmp_path, monkeypatch):
    # invented data; common practice, no source (a file's size and modification time as its fingerprint)
    import os

    from drift.ingest import base

    path = write(tmp_path / "data.csv", "week,sales\n2024-01-01,1\n2024-01-08,2\n")
    cfg = make_config(tmp_path, [csv_source()], [weekly_model("sales", [])])
    (s,) = ingest_all(cfg, store, now=NOW)
    assert (s.stored, s.skipped) == (2, 0)
    reads: list[Path] = []
    real = base.read_file
    monkeypatch.setattr(base, "read_file", lambda p: reads.append(p) or real(p))
    (s,) = ingest_all(cfg, store, now=LATER)
    assert (s.stored, s.known, s.skipped, reads) == (0, 2, 1, [])  # not even read
    # touched, same content: read and hashed once, skipped, and its new time remembered
    st = path.stat()
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns + 5_000_000_000))
    (s,) = ingest_all(cfg, store, now=LATER)
    assert (s.stored, s.known, s.skipped, len(reads)) == (0, 2, 1, 1)
    (s,) = ingest_all(cfg, store, now=LATER)
    assert (s.skipped, len(reads)) == (1, 1)
    # changed content (a revision) is read, and --reread reads an unchanged file again
    write(path, "week,sales\n2024-01-01,1\n2024-01-08,3\n")
    (s,) = ingest_all(cfg, store, now=LATER)
    assert (s.revised, s.known, s.skipped, len(reads)) == (1, 1, 0, 2)
    (s,) = ingest_all(cfg, store, now=LATER, reread=True)
    assert (s.known, s.skipped, len(reads)) == (2, 0, 3)


# common practice, no source: a store of schema 4 gains the file columns; its batches are recognised by
# content hash once more, then by size and modification time
def test_schema_4_store_gains_the_file_columns(tmp_path):
    from drift.store import SCHEMA_VERSION, meta, open_store

    url = f"sqlite:///{tmp_path / 'old.db'}"
    store = open_store(url)
    with store.begin() as conn:
        conn.exec_driver_sql("ALTER TABLE batches DROP COLUMN file_size")
        conn.exec_driver_sql("ALTER TABLE batches DROP COLUMN file_mtime_ns")
        conn.execute(meta.update().where(meta.c.key == "schema_version").values(value="4"))
    store.dispose()
    store = open_store(url)
    with store.connect() as conn:
        cols = {c["name"] for c in sa.inspect(conn).get_columns("batches")}
        version = conn.execute(sa.select(meta.c.value).where(meta.c.key == "schema_version")).scalar_one()
    assert {"file_size", "file_mtime_ns"} <= cols and int(version) == SCHEMA_VERSION
    store.dispose()


# oracle: the same file ingested whole (common practice, no source); invented data
def test_wide_file_by_column_groups_stores_what_the_whole_file_does(tmp_path, monkeypatch):
    from drift.ingest import base
    from drift.store import open_store

    names = [f"s{i}" for i in range(7)]
    lines = ["week," + ",".join(names)]
    for w in range(6):
        day = (pd.Timestamp("2024-01-01") + pd.Timedelta(weeks=w)).date().isoformat()
        cells = [str(10 * i + w) for i in range(7)]
        cells[2] = "x" if w == 3 else cells[2]  # a non-numeric cell
        lines.append(f"{'not a date' if w == 4 else day}," + ",".join(cells))  # a bad period row
    lines.append("2024-01-08," + ",".join(str(i) for i in range(7)))  # week 2 again: duplicate keys
    write(tmp_path / "data.csv", "\n".join(lines) + "\n")
    models = [weekly_model(n, []) for n in names]
    results = []
    for part_cells in (10_000, 8):  # whole, then groups of one or two series columns
        monkeypatch.setattr(base, "PART_CELLS", part_cells)
        st = open_store(f"sqlite:///{tmp_path / f'p{part_cells}.db'}")
        cfg = make_config(tmp_path, [csv_source()], models)
        (s,) = ingest_all(cfg, st, now=NOW)
        results.append(((s.stored, s.known, s.revised, s.quarantined),
                        obs(st).sort_values(["series", "period"]).reset_index(drop=True),
                        quar(st).sort_values(["row", "column"]).reset_index(drop=True)))
        st.dispose()
    (c1, o1, q1), (c2, o2, q2) = results
    assert c1 == c2 and c1[0] > 0 and c1[3] > 0
    pd.testing.assert_frame_equal(o1, o2)
    pd.testing.assert_frame_equal(q1, q2)
