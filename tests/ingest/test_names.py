"""Text no store keeps: a NUL byte (PostgreSQL refuses it in text) or a series name over 200 characters (the
store's name columns hold 200). Ingest quarantines the cell or row with the reason, on every store alike, and
the rest of the batch is stored; the quarantine record shows a NUL as the four characters ``\\x00`` (common
practice, no source; invented data).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from drift.config import MAX_NAME_LENGTH
from drift.ingest import ingest_all
from tests.ingest.helpers import NOW, obs, quar

LONG = "L" * (MAX_NAME_LENGTH + 50)


def _src(**kw):
    return {"name": "src", "kind": "csv", "path": "data.csv", "period_column": "week", "frequency": "W", **kw}


def _ingest(store, tmp_path: Path, data: bytes, **src):
    from tests.ingest.helpers import make_config

    (tmp_path / "data.csv").write_bytes(data)
    (s,) = ingest_all(make_config(tmp_path, [_src(**src)]), store, now=NOW)
    return s


def test_nul_in_a_value(store, tmp_path):
    s = _ingest(store, tmp_path, b"week,a,b\n2024-01-01,1\x002,3\n2024-01-08,4,5\n")
    assert (s.stored, s.quarantined) == (3, 1)
    (q,) = quar(store).itertuples()
    assert (q.row, q.column, q.raw_value) == (2, "a", "1\\x002")
    assert "not a number" in q.reason and "\x00" not in q.reason


def test_nul_in_a_period(store, tmp_path):
    s = _ingest(store, tmp_path, b"week,a\n2024\x00-01-01,1\n2024-01-08,4\n")
    assert (s.stored, s.quarantined) == (1, 1)
    (q,) = quar(store).itertuples()
    assert (q.row, q.column, q.raw_value) == (2, "week", "2024\\x00-01-01")


@pytest.mark.parametrize("header, words", [
    (b"bad\x00name", ["series name 'bad\\x00name' contains a NUL byte"]),
    (LONG.encode(), [f"series name is {len(LONG)} characters long", f"at most {MAX_NAME_LENGTH}"]),
], ids=["nul", "long"])
def test_wide_header_no_store_keeps(store, tmp_path, header: bytes, words: list[str]):
    s = _ingest(store, tmp_path, b"week,a," + header + b"\n2024-01-01,1,2\n2024-01-08,3,4\n")
    assert (s.stored, s.quarantined) == (2, 2)
    assert set(obs(store)["series"]) == {"a"}
    q = quar(store)
    assert q["row"].tolist() == [2, 3] and q["raw_value"].tolist() == ["2", "4"]
    for w in words:
        assert w in q["reason"].iloc[0], q["reason"].iloc[0]
    assert all(len(c) <= MAX_NAME_LENGTH and "\x00" not in c for c in q["column"])


@pytest.mark.parametrize("name, words", [
    ("bad\x00name", ["series name 'bad\\x00name' contains a NUL byte"]),
    (LONG, [f"series name is {len(LONG)} characters long"]),
], ids=["nul", "long"])
def test_long_format_series_name_no_store_keeps(store, tmp_path, name: str, words: list[str]):
    data = f"week,series,value\n2024-01-01,a,1\n2024-01-01,{name},2\n2024-01-08,a,3\n".encode()
    s = _ingest(store, tmp_path, data, series_column="series", value_column="value")
    assert (s.stored, s.quarantined) == (2, 1)
    (q,) = quar(store).itertuples()
    assert (q.row, q.column) == (3, "series")
    for w in words:
        assert w in q.reason, q.reason


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def store_url(request, tmp_path: Path) -> str:
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'drift.db'}"
    return request.getfixturevalue("pg_schema")


def test_the_cli_run_goes_on_past_names_no_store_keeps(tmp_path: Path, store_url: str) -> None:
    """Reproduced: on PostgreSQL a column named with a NUL, one named with 250 characters, or a value holding
    a NUL aborted the whole ingest (exit 1) and the check then found no data; SQLite stored them."""
    import json

    from tests.test_cli_end_to_end import kiosk_data
    from tests.test_cli_robustness import invoke
    from tests.test_config import MINIMUM

    kiosk_data(tmp_path / "data")
    for f in sorted((tmp_path / "data").glob("*.csv")):
        lines = f.read_text().splitlines()
        lines[0] += ",bad\x00name," + LONG
        lines[1:] = [line + ",1.0,2.0" for line in lines[1:]]
        lines[3] = lines[3].replace(",1.0,2.0", ",1\x000,2.0")
        f.write_text("\n".join(lines) + "\n")
    (tmp_path / "drift.yaml").write_text(MINIMUM.replace("sqlite:///drift.db", f"'{store_url}'"), encoding="utf-8")
    code, out, err = invoke("ingest", "--config", "drift.yaml", cwd=tmp_path)
    assert code == 0 and "777 new" in out, (out, err)
    code, out, err = invoke("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--json", "--no-deliver",
                            cwd=tmp_path)
    assert code == 0, err
    assert json.loads(out)["models"][0]["verdict"] == "refit"
