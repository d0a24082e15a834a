"""Ingests running at the same time on one store never store a value twice (both backends).

Real processes started together: each trial forks two processes that open the store themselves and wait at
a barrier, then ingest (or check) at once. After each trial the store must hold exactly what one ingest
stores: no (series, period, issued_at) with two vintages of the same value in a row, no vintage number used
twice, one batch per file, and the two ingests' counts adding up to one ingest's. A few trials run the real
``drift`` command line instead. Data: an invented scenario (random weekly values); the expected totals
are counted from the files, no outside source (common practice, no source).
"""

from __future__ import annotations

import multiprocessing as mp
import subprocess
import sys
import traceback
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import sqlalchemy as sa

from drift.config import Config
from drift.ingest import ingest_all
from drift.pipeline import run_check  # imported here, so forked processes start with it loaded
from drift.store import batches, observations, open_store
from tests.conftest import PG_URL

pytestmark = pytest.mark.slow

#: trials per backend: two ingests of one file, two sources with the same revisions, an ingest and a check
#: (25 per backend in all)
TRIALS = {"same file": 10, "same revisions": 10, "ingest and check": 5}
SERIES, WEEKS, REVISED_WEEKS = 12, 120, 15
FORK = mp.get_context("fork")


def _write_data(base: Path, seed: int) -> None:
    rng = np.random.default_rng(seed)
    weeks = pd.date_range("2021-01-04", periods=WEEKS, freq="7D").strftime("%Y-%m-%d")
    v1 = pd.DataFrame({"week": weeks, **{f"s{i:02d}": np.round(rng.normal(50, 5, WEEKS), 2)
                                         for i in range(SERIES)}})
    v1.to_csv(base / "v1.csv", index=False)
    v2 = v1.copy()
    v2.iloc[-REVISED_WEEKS:, 1:] += 1.0  # a revision of the last weeks of every series
    for name in ("v2a.csv", "v2b.csv"):
        v2.to_csv(base / name, index=False)


def _config(base: Path, url: str, paths: dict[str, str]) -> dict[str, Any]:
    models = [{"name": f"m{i}", "target": "s00", "frequency": "W",
               "drivers": [{"series": f"s{i:02d}", "lag": 1}],
               "reference": {"start": "2021-01-04", "end": "2022-06-27"}} for i in (1, 2)]
    return {"store": url, "base_dir": base, "models": models,
            "sources": [{"name": n, "kind": "csv", "path": p, "period_column": "week"} for n, p in paths.items()],
            "check": {"executor": "local"}}


def _child(cfg_dict: dict[str, Any], task: str, barrier: Any, out: Any) -> None:
    try:
        cfg = Config.model_validate(cfg_dict)
        store = open_store(cfg.store_url())
        barrier.wait(timeout=60)
        if task == "check":
            outcome = run_check(cfg, store, deliver=False)
            out.put(("check", len(outcome.models) + len(outcome.errors)))
        else:
            (s,) = ingest_all(cfg, store, sources=[task], progress=False)
            out.put(("ingest", s.as_dict()))
        store.dispose()
    except BaseException:  # noqa: BLE001 - the parent reports the child's traceback
        out.put(("error", traceback.format_exc()))


def _together(cfg_dict: dict[str, Any], tasks: list[str]) -> list[tuple[str, Any]]:
    """Run the tasks in forked processes released by one barrier; their results (errors fail the test)."""
    barrier, out = FORK.Barrier(len(tasks)), FORK.Queue()
    procs = [FORK.Process(target=_child, args=(cfg_dict, t, barrier, out)) for t in tasks]
    for p in procs:
        p.start()
    results = [out.get(timeout=120) for _ in procs]
    for p in procs:
        p.join(timeout=60)
    errors = [r[1] for r in results if r[0] == "error"]
    assert not errors, errors[0]
    assert all(p.exitcode == 0 for p in procs)
    return results


def _audit(url: str) -> dict[str, int]:
    """Counts that reveal any doubling: rows, key+vintage clashes, consecutive equal live vintages."""
    eng = sa.create_engine(url)
    o = observations
    with eng.connect() as conn:
        df = pd.DataFrame(conn.execute(sa.select(o.c.series, o.c.period, o.c.issued_at, o.c.value, o.c.vintage,
                                                 o.c.retracted_at)).fetchall(),
                          columns=["series", "period", "issued_at", "value", "vintage", "retracted_at"])
        n_batches = int(conn.execute(sa.select(sa.func.count()).select_from(batches)
                                     .where(batches.c.status == "ok")).scalar())
    eng.dispose()
    live = df[df["retracted_at"].isna()].sort_values(["series", "period", "vintage"])
    same_as_before = (live.groupby(["series", "period"])["value"].diff() == 0).sum()
    return {"rows": len(df), "key_vintage_clashes": int(df.duplicated(["series", "period", "vintage"]).sum()),
            "repeated_values": int(same_as_before), "batches": n_batches}


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def fresh_url(request, tmp_path) -> Iterator[Callable[[], str]]:
    """A factory of empty stores on one backend (one per trial)."""
    made: list[str] = []

    def make() -> str:
        if request.param == "sqlite":
            url = f"sqlite:///{tmp_path / f'store-{uuid.uuid4().hex[:8]}.db'}"
        else:
            schema = f"drift_test_{uuid.uuid4().hex[:12]}"
            with admin.begin() as conn:
                conn.execute(sa.text(f'create schema "{schema}"'))
            made.append(schema)
            url = f"{PG_URL}?options=-csearch_path%3D{schema}"
        open_store(url).dispose()  # the store exists before the processes start (creating it is not raced)
        return url

    admin = None
    if request.param == "postgres":
        request.getfixturevalue("pg_schema")  # skips when the server is not reachable
        admin = sa.create_engine(PG_URL)
    yield make
    if admin is not None:
        with admin.begin() as conn:
            for schema in made:
                conn.execute(sa.text(f'drop schema if exists "{schema}" cascade'))
        admin.dispose()


def test_two_first_ingests_of_the_same_file_store_it_once(fresh_url, tmp_path):
    _write_data(tmp_path, 1)
    for _ in range(TRIALS["same file"]):
        url = fresh_url()
        cfg = _config(tmp_path, url, {"wide": "v1.csv"})
        results = _together(cfg, ["wide", "wide"])
        sums = [r[1] for r in results]
        assert sum(s["stored"] for s in sums) == SERIES * WEEKS  # one of them stored it ...
        assert sorted(s["skipped"] for s in sums) == [0, 1]      # ... the other found it claimed
        assert _audit(url) == {"rows": SERIES * WEEKS, "key_vintage_clashes": 0, "repeated_values": 0,
                               "batches": 1}


def test_the_same_revisions_from_two_sources_at_once_are_stored_once(fresh_url, tmp_path):
    # two sources, two copies of one revised file: different claims, so only the database's unique key
    # and the ingest serialisation stand between them and doubled revisions
    _write_data(tmp_path, 2)
    revisions = SERIES * REVISED_WEEKS
    for _ in range(TRIALS["same revisions"]):
        url = fresh_url()
        cfg = _config(tmp_path, url, {"old": "v1.csv", "a": "v2a.csv", "b": "v2b.csv"})
        _together(cfg, ["old"])
        sums = [r[1] for r in _together(cfg, ["a", "b"])]
        assert sorted(s["revised"] for s in sums) == [0, revisions]
        assert sum(s["stored"] for s in sums) == 0
        assert _audit(url) == {"rows": SERIES * WEEKS + revisions, "key_vintage_clashes": 0,
                               "repeated_values": 0, "batches": 3}


def test_an_ingest_and_a_check_at_once(fresh_url, tmp_path):
    _write_data(tmp_path, 3)
    for _ in range(TRIALS["ingest and check"]):
        url = fresh_url()
        cfg = _config(tmp_path, url, {"old": "v1.csv", "a": "v2a.csv"})
        _together(cfg, ["old"])
        results = dict(_together(cfg, ["a", "check"]))
        assert results["check"] == 2 and results["ingest"]["revised"] == SERIES * REVISED_WEEKS
        assert _audit(url)["key_vintage_clashes"] == 0 and _audit(url)["repeated_values"] == 0


def test_two_drift_ingest_commands_at_once(fresh_url, tmp_path):
    # the real command line, one trial per backend (each process imports drift from scratch)
    _write_data(tmp_path, 4)
    for _ in range(1):
        url = fresh_url()
        (tmp_path / "drift.yaml").write_text(
            f"store: '{url}'\nsources:\n  - {{name: wide, kind: csv, path: v1.csv, period_column: week, "
            "frequency: W}\nmodels: []\n", encoding="utf-8")
        cmd = [sys.executable, "-m", "drift.cli", "ingest", "--config", "drift.yaml"]
        procs = [subprocess.Popen(cmd, cwd=tmp_path, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                 for _ in range(2)]
        outs = [p.communicate(timeout=120) for p in procs]
        assert [p.returncode for p in procs] == [0, 0], outs
        assert "Traceback" not in "".join(o[1] for o in outs)
        assert _audit(url) == {"rows": SERIES * WEEKS, "key_vintage_clashes": 0, "repeated_values": 0,
                               "batches": 1}
