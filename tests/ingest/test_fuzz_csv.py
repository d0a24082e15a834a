"""Hostile CSV files (Hypothesis, derandomised): whatever the cells and rows, an ingest stores good values,
quarantines bad cells with a reason naming row and column, or refuses the file naming it; it never raises,
and nothing stored before changes. Through the command line: exit 0 or 2, never an unexpected error. The
files are generated (invented data); the properties are the project's own rules (common practice, no
source).
"""

from __future__ import annotations

import csv
import io
import math
from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa
from click.testing import CliRunner
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from drift.cli import cli
from drift.config import MAX_ABS_VALUE, Config
from drift.ingest import ingest_all
from drift.ingest.dates import EARLIEST, LATEST
from drift.store import observations, open_store, quarantine

NOW = datetime(2024, 6, 3, 12, tzinfo=timezone.utc)
TRICKY = ["", " ", "1", "-0.0", "1e308", "-1e308", "1e-320", "inf", "-inf", "nan", "NaN", "1,5", "1.234,5",
          "12x", "0x10", "1_000", "٣", "1e999", "--1", "+2", ".5", "5.", '"', "'", ",", ";", "\\N", "null",
          "2024-01-01", "9999-12-31", "0001-01-01", "13/01/2021", "01/13/2021", "01/02/2021", "44927",
          "2024Q1", "2024-02-30", "2024-W01", "\x00", "é", "\u200b", "1\u00a0000"]
PERIODS = ["2024-01-01", "2024-01-08", "2024-01-03", "", " ", "2024-13-01", "9999-12-27", "0001-01-01",
           "01/02/2024", "13/02/2024", "02/13/2024", "45292", "2024/01/15", "20240122", "2024-01-29T00:00:00Z",
           "Jan 1 2024", "2024Q1", "x", "\x00", "1e308", "-inf"]

weeks = st.integers(0, 30).map(lambda k: (date(2024, 1, 1) + timedelta(weeks=k)).isoformat())
period = st.one_of(weeks, weeks, st.sampled_from(PERIODS))
cell = st.one_of(st.floats(-1e6, 1e6).map(repr), st.sampled_from(TRICKY),
                 st.floats(allow_nan=True, allow_infinity=True).map(repr),
                 st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=6))
header = st.one_of(st.sampled_from(["a", "b", "a b", "é", "", " ", "week", "a"]),
                   st.text(alphabet="abcxyz ,;\"é\t", max_size=4))


@st.composite
def csv_files(draw) -> bytes:
    ncols = draw(st.integers(1, 4))
    # mostly plain distinct names; now and then a tricky, empty or repeated one
    names = ["week", *(draw(st.one_of(st.just(f"s{j}"), st.just(f"s{j}"), st.just(f"s{j}"), header))
                       for j in range(ncols))]
    nrows = draw(st.integers(0, 6))
    rows = [[draw(period), *draw(st.lists(cell, min_size=ncols, max_size=ncols))]
            for _ in range(nrows)]
    mode = draw(st.integers(0, 3))
    if mode < 2:  # a well-formed CSV of hostile cells
        buf = io.StringIO()
        csv.writer(buf, lineterminator=draw(st.sampled_from(["\n", "\r\n"]))).writerows([names, *rows])
        text = buf.getvalue()
    else:  # cells joined as they are: stray quotes, ragged rows, embedded newlines; sometimes cut anywhere
        text = "\n".join(",".join(r) for r in [names, *rows])
        if mode == 3 and rows:
            text = text[: draw(st.integers(0, len(text)))]
    data = text.encode("utf-8", "surrogatepass")
    data = draw(st.sampled_from([b"", b"", b"", b"\xef\xbb\xbf", b"\xff\xfe"])) + data
    return data


@pytest.fixture(scope="module")
def fuzz_store(tmp_path_factory):
    """One store for every example, holding a baseline ingest that must never change."""
    base = tmp_path_factory.mktemp("fuzz")
    (base / "good.csv").write_text("week,a,b\n2024-01-01,1,2\n2024-01-08,3,4\n", encoding="utf-8")
    store = open_store(f"sqlite:///{base / 'drift.db'}")
    ingest_all(_config(base, "good.csv"), store, now=NOW)
    yield base, store
    store.dispose()


def _config(base: Path, path: str) -> Config:
    model = {"name": "m", "target": "a", "frequency": "W", "drivers": [{"series": "b", "lag": 1}],
             "reference": {"start": "2023-01-02", "end": "2023-12-25"}}
    return Config.model_validate({"sources": [{"name": "src", "kind": "csv", "path": path,
                                               "period_column": "week"}],
                                  "models": [model], "base_dir": base})


def _snapshot(store) -> pd.DataFrame:
    o = observations
    with store.connect() as conn:
        rows = conn.execute(sa.select(o.c.id, o.c.series, o.c.period, o.c.value, o.c.vintage, o.c.available_at,
                                      o.c.retracted_at).order_by(o.c.id)).fetchall()
    return pd.DataFrame(rows, columns=["id", "series", "period", "value", "vintage", "available_at",
                                       "retracted_at"])


@settings(max_examples=150, derandomize=True, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=csv_files())
def test_any_csv_is_stored_quarantined_or_refused(fuzz_store, data):
    base, store = fuzz_store
    before = _snapshot(store)
    with store.connect() as conn:
        q_before = conn.execute(sa.select(sa.func.max(quarantine.c.id))).scalar() or 0
    path = base / "fuzz.csv"
    path.write_bytes(data)
    (s,) = ingest_all(_config(base, "fuzz.csv"), store, now=NOW)  # never raises
    event("refused" if s.failed_files else "skipped" if s.skipped else
          f"read: {'stored' if s.stored or s.revised else 'nothing stored'}, "
          f"{'quarantine' if s.quarantined else 'no quarantine'}")
    after = _snapshot(store)
    # nothing stored before changed (rows are only ever added)
    assert after.iloc[: len(before)].equals(before)
    new = after.iloc[len(before):]
    for f, msg in s.failed_files:
        assert f == str(path) and msg.startswith(str(path)) and len(msg) > len(str(path)) + 5
    if s.failed_files:
        assert new.empty
    # what was stored is finite, in range, named
    assert np.isfinite(new["value"].astype(float)).all()
    assert (new["value"].abs() <= MAX_ABS_VALUE).all()
    assert all(EARLIEST.date() <= p <= LATEST.date() for p in new["period"])
    assert all(isinstance(x, str) and x.strip() == x and x for x in new["series"])
    # every quarantine record names row, column and reason
    with store.connect() as conn:
        recs = conn.execute(sa.select(quarantine.c.file, quarantine.c.row, quarantine.c.column,
                                      quarantine.c.reason).where(quarantine.c.id > q_before)).fetchall()
    for file, row, column, reason in recs:
        assert file == str(path) and row >= 2 and column and reason


@settings(max_examples=30, derandomize=True, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=csv_files())
def test_the_command_line_never_fails_unexpectedly(fuzz_store, data):
    base, _ = fuzz_store
    (base / "cli.csv").write_bytes(data)
    cfg = base / "cli.yaml"
    cfg.write_text(f"store: 'sqlite:///{base / 'cli.db'}'\nsources:\n  - {{name: src, kind: csv, path: cli.csv, "
                   "period_column: week, frequency: W}\nmodels: []\n", encoding="utf-8")
    r = CliRunner().invoke(cli, ["ingest", "--config", str(cfg)], catch_exceptions=False)
    assert r.exit_code in (0, 2), r.output
    assert "unexpected error" not in r.output and "Traceback" not in r.output
    if r.exit_code == 2:
        assert str(base / "cli.csv") in r.output


def test_values_and_dates_out_of_range_are_named(fuzz_store):
    # year 9999, 1e308 and -inf each get a reason that says what is wrong with them
    base, store = fuzz_store
    (base / "range.csv").write_text("week,a,b\n9999-12-27,1,2\n2024-01-15,1e308,-inf\n", encoding="utf-8")
    (s,) = ingest_all(_config(base, "range.csv"), store, now=NOW)
    with store.connect() as conn:
        recs = {r[0]: r[1] for r in conn.execute(sa.select(quarantine.c.raw_value, quarantine.c.reason)
                                                 .where(quarantine.c.file == str(base / "range.csv")))}
    assert "outside the range of dates" in recs["9999-12-27"]
    assert "beyond" in recs["1e308"] and "not a finite number" in recs["-inf"]
    assert not math.isnan(s.quarantined) and date(2024, 1, 15)
