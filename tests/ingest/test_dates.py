"""Period dates are never guessed: ISO read as is, day/month order only from `period_format` or from a reading
that is the only one fitting the whole file; ambiguous files refused before anything is stored. Spreadsheet
serial day numbers only when configured; dates out of range named. All data here is invented (small, made up).
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pandas as pd

from drift.ingest import ingest_all
from tests.ingest.helpers import NOW, counts, make_config, obs, quar, value


def _src(**kw):
    return {"name": "src", "kind": "csv", "path": "data.csv", "period_column": "day", "frequency": "D", **kw}


def _write(tmp_path: Path, text: str) -> None:
    (tmp_path / "data.csv").write_text(text, encoding="utf-8")


# rows 2-4: every date reads both ways (day <= 12 and month <= 12)
AMBIGUOUS = "day,a\n01/11/2021,1\n11/01/2021,2\n05/03/2021,3\n"


def test_ambiguous_day_month_file_is_refused_before_anything_is_stored(store, tmp_path):
    _write(tmp_path, AMBIGUOUS)
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert counts(store) == (0, 0, 0)  # no observation, no quarantine record, no batch
    assert s.stored == 0 and len(s.failed_files) == 1
    file, msg = s.failed_files[0]
    assert file.endswith("data.csv") and msg.startswith(file)
    # names a row, its two readings and the key that resolves it
    assert "row 2" in msg and "column 'day'" in msg
    assert "'01/11/2021'" in msg and "2021-11-01" in msg and "2021-01-11" in msg
    assert "period_format" in msg and "%d/%m/%Y" in msg and "%m/%d/%Y" in msg


def test_day_first_detected_when_it_is_the_only_reading_of_the_whole_file(store, tmp_path):
    # row 5 (13/01/2021) has no month-first reading, so day-first is the only reading of every row
    _write(tmp_path, AMBIGUOUS + "13/01/2021,4\n")
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert (s.stored, s.quarantined, s.failed_files) == (4, 0, [])
    df = obs(store)
    assert value(df, "a", "2021-11-01").iloc[0]["value"] == 1.0
    assert value(df, "a", "2021-01-11").iloc[0]["value"] == 2.0
    assert value(df, "a", "2021-03-05").iloc[0]["value"] == 3.0


def test_month_first_detected_the_same_way(store, tmp_path):
    _write(tmp_path, "day,a\n01/11/2021,1\n12/31/2021,2\n")
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert s.stored == 2
    assert value(obs(store), "a", "2021-01-11").iloc[0]["value"] == 1.0


def test_mixed_orders_are_refused(store, tmp_path):
    _write(tmp_path, "day,a\n13/01/2021,1\n01/13/2021,2\n")
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert counts(store) == (0, 0, 0)
    msg = s.failed_files[0][1]
    assert "row 2" in msg and "row 3" in msg and "period_format" in msg


def test_period_format_resolves_the_ambiguity(store, tmp_path):
    _write(tmp_path, AMBIGUOUS)
    (s,) = ingest_all(make_config(tmp_path, [_src(period_format="%d/%m/%Y")]), store, now=NOW)
    assert s.stored == 3
    assert value(obs(store), "a", "2021-11-01").iloc[0]["value"] == 1.0


def test_iso_and_year_first_are_read_as_they_are(store, tmp_path):
    _write(tmp_path, "day,a\n2021-01-11,1\n2021/01/12,2\n20210113,3\n")
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert s.stored == 3
    assert sorted(obs(store)["period"].dt.strftime("%Y-%m-%d")) == ["2021-01-11", "2021-01-12", "2021-01-13"]


def test_dotted_day_month_is_not_guessed_either(store, tmp_path):
    _write(tmp_path, "day,a\n04.01.2021,1\n05.01.2021,2\n")
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert counts(store) == (0, 0, 0) and "%d.%m.%Y" in s.failed_files[0][1]


def test_spreadsheet_serial_days_refused_unless_configured(store, tmp_path):
    # 1900 date system: day 1 is 1900-01-01 and 1900 is counted as a leap year, so from March 1900 on the
    # serial is the number of days since 1899-12-30; 43831 = 2020-01-01, 45292 = 2024-01-01
    # (ECMA-376 Part 1, 18.17.4.1, from memory; the two values checked against a spreadsheet, from memory)
    _write(tmp_path, "day,a\n43831,1\n45292,2\n")
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert counts(store) == (0, 0, 0)
    msg = s.failed_files[0][1]
    assert "row 2" in msg and "43831" in msg and "period_format: excel" in msg
    (s,) = ingest_all(make_config(tmp_path, [_src(period_format="excel")]), store, now=NOW)
    assert s.stored == 2
    assert sorted(obs(store)["period"].dt.strftime("%Y-%m-%d")) == ["2020-01-01", "2024-01-01"]


def test_period_out_of_range_is_named(store, tmp_path):
    _write(tmp_path, "day,a\n2021-01-11,1\n9999-12-27,2\n0001-01-01,3\n")
    (s,) = ingest_all(make_config(tmp_path, [_src()]), store, now=NOW)
    assert (s.stored, s.quarantined) == (1, 2)
    q = quar(store).sort_values("row")
    assert q["raw_value"].tolist() == ["9999-12-27", "0001-01-01"]
    assert all("outside the range" in r for r in q["reason"])


def test_available_times_are_iso_only(store, tmp_path):
    _write(tmp_path, "day,pub,a\n2021-01-11,01/02/2021 10:00,1\n2021-01-12,2021-01-13T10:00:00Z,2\n")
    (s,) = ingest_all(make_config(tmp_path, [_src(available_column="pub")]), store, now=NOW)
    assert (s.stored, s.quarantined) == (1, 1)
    assert "'01/02/2021 10:00' is not a date and time (ISO 8601" in quar(store).iloc[0]["reason"]
    assert obs(store)["available_at"].iloc[0] == pd.Timestamp("2021-01-13T10:00:00Z")


def test_cli_refuses_ambiguous_file_with_exit_2(tmp_path):
    _write(tmp_path, AMBIGUOUS)
    (tmp_path / "drift.yaml").write_text(
        "sources:\n  - {name: src, kind: csv, path: data.csv, period_column: day, frequency: D}\nmodels: []\n",
        encoding="utf-8")
    r = subprocess.run([sys.executable, "-m", "drift.cli", "ingest", "--config", "drift.yaml"], cwd=tmp_path, check=False,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr and "period_format" in r.stderr and "row 2" in r.stderr
