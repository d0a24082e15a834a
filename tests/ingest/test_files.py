"""Files as people save them: Windows line endings, a byte-order mark, Latin-1, semicolons with decimal
commas, repeated or missing header names, empty columns, names with spaces and accents, extreme values.
Each case is stored correctly, quarantined with a reason, or refused naming the file. All data here is
invented (small, made up).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from drift.config import load_config
from drift.exceptions import ConfigError
from drift.ingest import ingest_all
from tests.ingest.helpers import LATER, NOW, counts, make_config, obs, quar, value


def _src(**kw):
    return {"name": "src", "kind": "csv", "path": "data.csv", "period_column": "week", "frequency": "W", **kw}


def _ingest(store, tmp_path: Path, data: bytes, models=None, **src):
    (tmp_path / "data.csv").write_bytes(data)
    (s,) = ingest_all(make_config(tmp_path, [_src(**src)], models), store, now=NOW)
    return s


def test_windows_line_endings(store, tmp_path):
    s = _ingest(store, tmp_path, b"week,a,b\r\n2024-01-01,1,2\r\n2024-01-08,3,\r\n")
    assert (s.stored, s.quarantined, s.failed_files) == (3, 0, [])
    assert sorted(obs(store)["series"]) == ["a", "a", "b"]  # no 'b\r' series


def test_byte_order_mark(store, tmp_path):
    s = _ingest(store, tmp_path, "\ufeffweek,a\r\n2024-01-01,1\r\n".encode())
    assert (s.stored, s.failed_files) == (1, [])


def test_latin1_refused_clearly_or_read_with_encoding(store, tmp_path):
    data = "week,café\n2024-01-01,1\n2024-01-08,2\n".encode("latin-1")
    s = _ingest(store, tmp_path, data)
    assert counts(store) == (0, 0, 0)
    msg = s.failed_files[0][1]
    assert "row 1" in msg and "not UTF-8" in msg and "encoding" in msg
    s = _ingest(store, tmp_path, data, encoding="latin-1")
    assert s.stored == 2 and set(obs(store)["series"]) == {"café"}


def test_unknown_encoding_is_a_config_error(tmp_path):
    (tmp_path / "drift.yaml").write_text(
        "sources:\n  - {name: src, kind: csv, path: data.csv, period_column: week, encoding: utf-99}\n"
        "models: []\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="encoding 'utf-99' is not one Python knows") as ei:
        load_config(tmp_path / "drift.yaml")
    assert "sources" in str(ei.value) and "drift.yaml" in str(ei.value)


def test_semicolons_with_decimal_commas_wide(store, tmp_path):
    s = _ingest(store, tmp_path, b"week;a;b\n2024-01-01;1,5;-2,25\n2024-01-08;1.234,5;3\n", delimiter=";",
                decimal=",")
    assert (s.stored, s.quarantined) == (3, 1)
    assert value(obs(store), "b", "2024-01-01").iloc[0]["value"] == -2.25
    assert quar(store).iloc[0]["raw_value"] == "1.234,5"  # a thousands separator is not guessed either


def test_repeated_header_name_refused(store, tmp_path):
    s = _ingest(store, tmp_path, b"week,a,a\n2024-01-01,1,2\n")
    assert counts(store) == (0, 0, 0) and "column 'a' appears twice" in s.failed_files[0][1]


def test_entirely_empty_column_and_a_column_without_a_name(store, tmp_path):
    # 'b' has no values at all: nothing to store, nothing wrong. The last column has values but no name:
    # they cannot be given a series, so they are quarantined
    s = _ingest(store, tmp_path, b"week,a,b,\n2024-01-01,1,,7\n2024-01-08,2,,\n")
    assert (s.stored, s.quarantined) == (2, 1)
    q = quar(store).iloc[0]
    assert (q["row"], q["column"], q["raw_value"]) == (2, "(column 4)", "7")
    assert "no name in the header" in q["reason"]


def test_series_names_with_spaces_and_accents(store, tmp_path):
    model = {"name": "m", "target": "Ventes Île-de-France", "frequency": "W",
             "drivers": [{"series": "température moyenne", "lag": 1}],
             "reference": {"start": "2023-01-02", "end": "2023-12-25"}}
    s = _ingest(store, tmp_path, " week , Ventes Île-de-France ,température moyenne\n2024-01-01,1,2\n"
                .encode(), models=[model], period_column="week")
    assert s.stored == 2
    df = obs(store)
    assert set(df["series"]) == {"Ventes Île-de-France", "température moyenne"}
    # the model's weekly calendar applied (available at the end of the week)
    assert value(df, "Ventes Île-de-France", "2024-01-01").iloc[0]["available_at"].day == 8


def test_extreme_values(store, tmp_path):
    s = _ingest(store, tmp_path, b"week,a,b,c,d\n2024-01-01,1e308,-0.0,-inf,1e-300\n")
    assert (s.stored, s.quarantined) == (2, 2)
    q = quar(store).sort_values("column")
    assert q["raw_value"].tolist() == ["1e308", "-inf"]
    assert "beyond" in q.iloc[0]["reason"] and "1e+100" in q.iloc[0]["reason"]
    assert "not a finite number" in q.iloc[1]["reason"]
    b = value(obs(store), "b", "2024-01-01").iloc[0]["value"]
    assert b == 0.0 and str(b) == "0.0"  # -0.0 is stored as 0.0
    # the same file again with 0 for b: already known, not a revision
    (tmp_path / "data.csv").write_bytes(b"week,b\n2024-01-01,0\n")
    (s2,) = ingest_all(make_config(tmp_path, [_src()]), store, now=LATER)
    assert (s2.known, s2.revised) == (1, 0)
