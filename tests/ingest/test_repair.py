"""Repairing what an ingest stored: a changed config reads files again, re-reading a source, retracting a
batch (as-of queries before the retraction still see it), quarantined cells admitted after a fix, and the
commands that show batches and quarantine. All data here is invented (small, made up).
"""

from __future__ import annotations

import json
from datetime import timedelta
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from drift.cli import cli
from drift.ingest import ingest_all
from drift.store import open_store
from tests.ingest.helpers import LATER, NOW, counts, make_config, obs, value

# day-first dates, a row (13/01) that only reads day first; ';' separated with decimal commas
DAY_FIRST = "day;a\n01/11/2021;1,5\n11/01/2021;2,5\n13/01/2021;3\n"


def _src(**kw):
    return {"name": "src", "kind": "csv", "path": "data.csv", "period_column": "day", "frequency": "D",
            "delimiter": ";", **kw}


def _write(tmp_path: Path, text: str) -> None:
    (tmp_path / "data.csv").write_text(text, encoding="utf-8")


def _open_quarantine(store) -> pd.DataFrame:
    return pd.DataFrame(store.quarantine_records())


def test_a_fixed_config_reads_the_file_again_and_admits_what_now_passes(store, tmp_path):
    # before: "1 unchanged file skipped" - the skip looked at the content only
    _write(tmp_path, DAY_FIRST)
    (s1,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert (s1.stored, s1.quarantined) == (1, 2)  # '1,5' and '2,5' are not numbers without decimal: ','
    assert len(_open_quarantine(store)) == 2
    (s2,) = ingest_all(make_config(tmp_path, [_src(decimal=",")]), store, now=LATER)
    assert (s2.skipped, s2.stored, s2.known, s2.quarantined) == (0, 2, 1, 0)
    assert value(obs(store), "a", "2021-11-01").iloc[0]["value"] == 1.5
    assert _open_quarantine(store).empty  # the two records are resolved ...
    everything = pd.DataFrame(store.quarantine_records(include_resolved=True))
    assert len(everything) == 2 and everything["resolved_at"].notna().all()  # ... and kept
    # the same settings again: now it is unchanged
    (s3,) = ingest_all(make_config(tmp_path, [_src(decimal=",")]), store, now=LATER)
    assert (s3.skipped, s3.known, s3.stored) == (1, 3, 0)


def test_a_changed_model_calendar_reads_the_file_again(store, tmp_path):
    _write(tmp_path, "day;a\n2024-01-01;1\n2024-01-08;2\n")
    src = {"name": "src", "kind": "csv", "path": "data.csv", "period_column": "day", "delimiter": ";"}
    weekly = {"name": "m", "target": "a", "frequency": "W", "reference": {"start": "2023-01-02",
                                                                          "end": "2023-12-25"}}
    (s1,) = ingest_all(make_config(tmp_path, [src], [weekly]), store, now=NOW)
    assert s1.stored == 2
    monthly = {**weekly, "frequency": "M", "reference": {"start": "2023-01-01", "end": "2023-12-01"}}
    (s2,) = ingest_all(make_config(tmp_path, [src], [monthly]), store, now=NOW)
    assert s2.skipped == 0 and s2.quarantined == 1  # 2024-01-08 is not a month start


def test_reread_reads_an_unchanged_file_again(store, tmp_path):
    _write(tmp_path, DAY_FIRST)
    cfg = make_config(tmp_path, [_src(decimal=",")])
    ingest_all(cfg, store, now=NOW)
    before = counts(store)
    (s,) = ingest_all(cfg, store, now=LATER, reread=True)
    assert (s.skipped, s.known, s.stored, s.revised) == (0, 3, 0, 0)
    assert counts(store)[:2] == before[:2] and counts(store)[2] == before[2] + 1  # one more batch
    (s,) = ingest_all(cfg, store, now=LATER)  # and the claim moved to the new batch: skipped again
    assert s.skipped == 1


def test_retract_then_fix_the_config(store, tmp_path):
    # a wrong period_format places the day-first rows on the wrong days; 13/01 is quarantined
    _write(tmp_path, DAY_FIRST)
    wrong = make_config(tmp_path, [_src(decimal=",", period_format="%m/%d/%Y")])
    (s1,) = ingest_all(wrong, store, now=NOW)
    assert (s1.stored, s1.quarantined) == (2, 1)
    assert value(obs(store), "a", "2021-01-11").iloc[0]["value"] == 1.5  # misplaced
    (batch,) = store.list_batches()
    when = LATER
    assert store.retract_batches([batch["id"]], note="day and month swapped", when=when) == {
        batch["id"]: "retracted"}
    assert store.load_observations(["a"], as_of=when - timedelta(hours=1))["value"].tolist() != []
    assert store.load_observations(["a"], as_of=when + timedelta(hours=1)).empty
    # the same file and settings are not read again by a plain ingest ...
    (s2,) = ingest_all(wrong, store, now=when + timedelta(days=1))
    assert (s2.skipped, s2.skipped_retracted, s2.stored) == (1, 1, 0)
    assert "retracted earlier; --reread reads it again" in s2.describe()
    # ... the fixed config is
    fixed = make_config(tmp_path, [_src(decimal=",")])
    (s3,) = ingest_all(fixed, store, now=when + timedelta(days=1))
    # two days held retracted values: their new values are corrections, known from now (as revisions are)
    assert (s3.stored, s3.revised, s3.quarantined) == (1, 2, 0)
    live = store.load_observations(["a"])
    assert sorted(zip(live["period"].dt.strftime("%Y-%m-%d"), live["value"])) == [
        ("2021-01-11", 2.5), ("2021-01-13", 3.0), ("2021-11-01", 1.5)]
    # what a check as of before the retraction saw is still there (vintages stay auditable)
    then = store.load_observations(["a"], as_of=when - timedelta(hours=1))
    assert then.loc[then["period"] == pd.Timestamp("2021-01-11"), "value"].tolist() == [1.5]
    assert then.loc[then["period"] == pd.Timestamp("2021-11-01"), "value"].tolist() == [2.5]
    assert _open_quarantine(store).empty


# ------------------------------------------------------------------------------------------ commands

def _project(tmp_path: Path, store_url: str, decimal: str | None = None) -> Path:
    extra = f", decimal: '{decimal}'" if decimal else ""
    (tmp_path / "drift.yaml").write_text(
        f"store: '{store_url}'\nsources:\n  - {{name: src, kind: csv, path: data.csv, period_column: day, "
        f"frequency: D, delimiter: ';'{extra}}}\nmodels: []\n", encoding="utf-8")
    return tmp_path / "drift.yaml"


def _run(*args: str):
    return CliRunner().invoke(cli, list(args), catch_exceptions=False)


@pytest.mark.parametrize("backend", ["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def test_commands_show_quarantine_and_batches_and_retract(backend, request, tmp_path):
    url = f"sqlite:///{tmp_path / 'drift.db'}" if backend == "sqlite" else request.getfixturevalue("pg_schema")
    _write(tmp_path, DAY_FIRST)
    cfg = str(_project(tmp_path, url))
    r = _run("ingest", "--config", cfg)
    assert r.exit_code == 0, r.output
    # the summary names the file and the first reasons, and the command that lists them all
    assert "data.csv: 2 quarantined" in r.output
    assert "row 2, column 'a': value '1,5' is not a number" in r.output
    assert f"drift quarantine --config {cfg} --source src" in r.output
    r = _run("quarantine", "--config", cfg, "--json")
    rows = json.loads(r.output)["rows"]
    assert [(Path(x["file"]).name, x["row"], x["column"], x["raw_value"]) for x in rows] == [
        ("data.csv", 2, "a", "1,5"), ("data.csv", 3, "a", "2,5")]
    assert all(x["reason"].startswith(f"value '{x['raw_value']}' is not a number: it has a ','") for x in rows)
    assert all("'decimal: \",\"'" in x["reason"] for x in rows)  # says what setting reads it
    r = _run("quarantine", "--config", cfg, "--source", "src")
    assert "data.csv" in r.output and "row 3" in r.output and "'2,5'" in r.output
    r = _run("batches", "--config", cfg, "--json")
    (b,) = json.loads(r.output)["batches"]
    assert (b["source"], b["stored"], b["quarantined"], b["status"], b["retracted_at"]) == ("src", 1, 2, "ok", None)
    # retract: unknown ids are a usage error, known ones are marked
    r = _run("retract", "--config", cfg, "--batch", "999")
    assert r.exit_code == 2 and "no batch 999" in r.output
    r = _run("retract", "--config", cfg, "--batch", str(b["id"]), "--note", "wrong decimal")
    assert r.exit_code == 0 and f"batch {b['id']} (src, data.csv) retracted: its 1 stored value is ignored" in r.output
    r = _run("batches", "--config", cfg)
    assert "retracted" in r.output and "wrong decimal" in r.output
    # fix the config: ingest reads the file again and admits the rows
    _project(tmp_path, url, decimal=",")
    r = _run("ingest", "--config", cfg)
    # the retracted row's day gets a correction (a revision), the two admitted cells are new
    assert r.exit_code == 0 and "2 new, 1 revised" in r.output and "2 earlier quarantine records resolved" in r.output
    assert json.loads(_run("quarantine", "--config", cfg, "--json").output)["rows"] == []
    assert "no open quarantine records" in _run("quarantine", "--config", cfg).output
    # --reread of one source
    r = _run("ingest", "--config", cfg, "--source", "src", "--reread")
    assert r.exit_code == 0 and "3 already known" in r.output and "skipped" not in r.output
    store = open_store(url)
    try:
        assert len(store.load_observations(["a"])) == 3
    finally:
        store.dispose()


def test_readmit_rereads_only_files_with_open_quarantine(sqlite_store, tmp_path):
    # a.csv has a value on a Wednesday for a model whose weeks start on Monday (quarantined); b.csv is fine.
    # Once the model's weeks start on Wednesday, readmit reads a.csv again - and only a.csv
    (tmp_path / "a.csv").write_text("day;x\n2024-01-03;1\n", encoding="utf-8")
    (tmp_path / "b.csv").write_text("day;y\n2024-01-01;1\n", encoding="utf-8")
    src = {"name": "src", "kind": "csv", "path": "*.csv", "period_column": "day", "delimiter": ";"}
    monday = {"name": "m", "target": "x", "frequency": "W", "reference": {"start": "2023-01-02",
                                                                          "end": "2023-12-25"}}
    (s,) = ingest_all(make_config(tmp_path, [src], [monday]), sqlite_store, now=NOW)
    assert (s.stored, s.quarantined) == (1, 1)
    from drift.ingest import readmit

    wednesday = {**monday, "reference": {"start": "2023-01-04", "end": "2023-12-27"}}
    (r,) = readmit(make_config(tmp_path, [src], [wednesday]), sqlite_store, now=LATER)
    assert (r.files, r.stored, r.quarantined) == (1, 1, 0)
    assert pd.DataFrame(sqlite_store.quarantine_records()).empty


def test_a_query_returning_what_was_stored_is_skipped(sqlite_store, tmp_path):
    import sqlite3

    db = tmp_path / "src.db"
    con = sqlite3.connect(db)
    con.execute("create table obs (week text, series text, value real)")
    con.executemany("insert into obs values (?, ?, ?)", [("2024-01-01", "a", 1.0), ("2024-01-08", "a", 2.0)])
    con.commit()
    con.close()
    src = {"name": "q", "kind": "sql", "url": f"sqlite:///{db}", "period_column": "week", "frequency": "W",
           "series_column": "series", "value_column": "value", "query": "select week, series, value from obs"}
    cfg = make_config(tmp_path, [src])
    (s1,) = ingest_all(cfg, sqlite_store, now=NOW)
    (s2,) = ingest_all(cfg, sqlite_store, now=LATER)
    assert (s1.stored, s2.skipped, s2.known) == (2, 1, 2)
    (s3,) = ingest_all(cfg, sqlite_store, now=LATER, reread=True)
    assert (s3.skipped, s3.known) == (0, 2)


def test_quarantine_text_is_limited(sqlite_store, tmp_path):
    _write(tmp_path, "day;a\n" + "".join(f"2024-01-{d:02d};x{d}\n" for d in range(1, 8)))
    url = sqlite_store.url
    cfg = str(_project(tmp_path, url))
    assert _run("ingest", "--config", cfg).exit_code == 0
    r = _run("quarantine", "--config", cfg, "--limit", "3")
    assert r.output.count("row ") == 3 and "... and 4 more" in r.output
