"""The store unavailable: a SQLite file whose write lock another process holds, and a PostgreSQL session
terminated by the server mid-run. Invented scenario (drift.demo data); common practice, no source.

Promises (issue 13): a held SQLite lock is waited for up to the busy timeout (SQLite's busy handler retries
until then), then the command fails with one line naming the store, exit 1, nothing half-written; a
PostgreSQL connection terminated mid-run fails the run cleanly, records it failed, and the next run works.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.demo import generate
from drift.store import batches, observations, open_store

ROOT = Path(__file__).resolve().parents[2]
CEILING = 120


def _env() -> dict[str, str]:
    return {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}


def _cli(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "drift.cli", *args], capture_output=True, text=True, cwd=cwd, check=False,
                          env=_env(), timeout=CEILING)


_HOLDER = textwrap.dedent("""
    import sqlite3, sys, time
    con = sqlite3.connect(sys.argv[1], isolation_level=None)
    con.execute("BEGIN IMMEDIATE")
    print("held", flush=True)
    sys.stdin.readline()            # hold the write lock until told to let go
    time.sleep(float(sys.argv[2]))
    con.execute("ROLLBACK")
""")


class LockHolder:
    """Another process holding the SQLite write lock (BEGIN IMMEDIATE) until :meth:`release`."""

    def __init__(self, db: Path, linger: float = 0.0) -> None:
        self.proc = subprocess.Popen([sys.executable, "-c", _HOLDER, str(db), str(linger)], stdin=subprocess.PIPE,
                                     stdout=subprocess.PIPE, text=True)
        assert self.proc.stdout is not None and self.proc.stdout.readline().strip() == "held"

    def release(self) -> None:
        if self.proc.poll() is None:
            assert self.proc.stdin is not None
            self.proc.stdin.write("go\n")
            self.proc.stdin.flush()

    def wait(self) -> None:
        self.release()
        self.proc.wait(timeout=CEILING)


def _demo(tmp_path: Path, timeout: float) -> Path:
    """A small invented table (3 series x 104 weeks) and a config whose store waits ``timeout`` seconds."""
    db = tmp_path / "drift.db"
    (tmp_path / "data").mkdir()
    lines = ["week,a,b,c"] + [f"{(date(2024, 1, 1) + timedelta(weeks=i)).isoformat()},{i},{2 * i},{3 * i}"
                              for i in range(104)]
    (tmp_path / "data" / "t.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    cfg = tmp_path / "drift.yaml"
    cfg.write_text(f"store: sqlite:///{db}?timeout={timeout:g}\n"
                   "sources:\n  - {name: t, kind: csv, path: data/t.csv, period_column: week}\nmodels: []\n",
                   encoding="utf-8")
    open_store(f"sqlite:///{db}").dispose()  # the schema exists before the other process locks the file
    return cfg


def _count(db: Path, table: sa.Table) -> int:
    st = open_store(f"sqlite:///{db}")
    try:
        with st.connect() as conn:
            return int(conn.execute(sa.select(sa.func.count()).select_from(table)).scalar_one())
    finally:
        st.dispose()


def test_sqlite_write_lock_held_too_long_fails_naming_the_store(tmp_path: Path) -> None:
    cfg = _demo(tmp_path, timeout=1)
    db = tmp_path / "drift.db"
    holder = LockHolder(db)
    try:
        res = _cli("ingest", "--config", str(cfg), cwd=tmp_path)
        # reading needs no write lock: status answers while the lock is held
        status = _cli("status", "--config", str(cfg), cwd=tmp_path)
    finally:
        holder.wait()
    assert res.returncode == 1, res.stderr
    assert "Traceback" not in res.stderr and len(res.stderr.strip().splitlines()) == 1, res.stderr
    assert f"the SQLite store {db} is locked by another process" in res.stderr
    assert "more than 1 s" in res.stderr and "?timeout=" in res.stderr
    assert status.returncode == 0, status.stderr
    assert _count(db, batches) == 0 and _count(db, observations) == 0
    # once the other process is done, the same command does the work
    again = _cli("ingest", "--config", str(cfg), cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert _count(db, observations) > 0


def test_sqlite_lock_released_within_the_timeout_is_waited_for(tmp_path: Path) -> None:
    cfg = _demo(tmp_path, timeout=60)
    db = tmp_path / "drift.db"
    holder = LockHolder(db, linger=1.0)
    try:
        proc = subprocess.Popen([sys.executable, "-m", "drift.cli", "ingest", "--config", str(cfg)], cwd=tmp_path,
                                env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        holder.release()  # lets go about a second from now, while the ingest waits for it
        _, err = proc.communicate(timeout=CEILING)
    finally:
        holder.wait()
    assert proc.returncode == 0, err
    assert _count(db, observations) > 0
    st = open_store(f"sqlite:///{db}")
    try:
        assert [r["status"] for r in st.recent_runs("ingest")] == ["ok"]
    finally:
        st.dispose()


def test_library_error_is_a_store_error(tmp_path: Path) -> None:
    from drift.exceptions import StoreError

    db = tmp_path / "s.db"
    st = open_store(f"sqlite:///{db}?timeout=0.2")
    holder = LockHolder(db)
    try:
        with pytest.raises(StoreError, match=r"is locked by another process.*more than 0\.2 s"):
            st.start_run("check")
        # reads still work
        assert st.recent_runs() == []
    finally:
        holder.wait()
        st.dispose()


# ------------------------------------------------------------------------------------------ PostgreSQL


class Terminator:
    """Terminates drift's own server session (``pg_terminate_backend``) just before the first statement
    matching ``pattern`` runs on it, so the statement meets a dead connection: a session ended by the server
    mid-run, at a chosen point."""

    def __init__(self, store: Any, pattern: str) -> None:
        from tests.conftest import PG_URL

        self.store, self.pattern, self.fired = store, pattern.lower(), 0
        self.admin = sa.create_engine(PG_URL)
        sa.event.listen(store.engine, "before_cursor_execute", self._before)

    def _before(self, conn: Any, cursor: Any, statement: str, *args: Any) -> None:
        if self.fired or self.pattern not in statement.lower():
            return
        self.fired += 1
        pid = conn.connection.dbapi_connection.info.backend_pid
        with self.admin.begin() as admin:
            assert admin.execute(sa.text("select pg_terminate_backend(:p, 10000)"), {"p": pid}).scalar_one()

    def remove(self) -> None:
        sa.event.remove(self.store.engine, "before_cursor_execute", self._before)
        self.admin.dispose()


def _pg_demo(tmp_path: Path, url: str) -> Any:
    from drift.config import load_config

    cfg = generate(tmp_path)
    text = cfg.read_text(encoding="utf-8").replace("store: sqlite:///drift.db", f"store: {url}")
    cfg.write_text(text, encoding="utf-8")
    return load_config(cfg)


@pytest.mark.postgres
@pytest.mark.parametrize("where", ["from observations", "insert into verdicts", "insert into alerts",
                                   "update outbox"])
def test_pg_session_terminated_mid_check(tmp_path: Path, pg_schema: str, where: str) -> None:
    import json

    from drift.demo import AS_OF
    from drift.exceptions import StoreError
    from drift.pipeline import run_check, run_ingest
    from drift.store import alerts, outbox, verdicts

    cfg = _pg_demo(tmp_path, pg_schema)
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store, progress=False)
        killer = Terminator(store, where)
        try:
            with pytest.raises(StoreError, match="the connection to the store at .* was lost during this step"):
                run_check(cfg, store, as_of=AS_OF)
        finally:
            killer.remove()
        assert killer.fired == 1
        [failed] = store.recent_runs("check")
        assert failed["status"] == "failed" and "was lost" in failed["error"], failed
        with store.connect() as conn:
            n_verdicts = conn.execute(sa.select(sa.func.count()).select_from(verdicts)
                                      .where(verdicts.c.run == failed["id"])).scalar_one()
        assert n_verdicts in (0, len(cfg.models))  # one transaction: all of the run's verdicts or none
        run_check(cfg, store, as_of=AS_OF)
        assert [r["status"] for r in store.recent_runs("check")] == ["ok", "failed"]
        with store.connect() as conn:
            open_rows = conn.execute(sa.select(alerts.c.model, alerts.c.condition)
                                     .where(alerts.c.status == "open")).fetchall()
            ob = conn.execute(sa.select(outbox.c.idempotency_key, outbox.c.status)).fetchall()
        assert len(open_rows) == len(set(open_rows)) and {m for m, _ in open_rows} == {"east", "west"}
        assert len(ob) == len(open_rows) and {s for _, s in ob} == {"sent"}  # one folder notice each, sent
        lines = [json.loads(x) for x in (tmp_path / "alerts" / "alerts.jsonl").read_text().splitlines()]
        assert sorted(d["key"] for d in lines) == sorted(k for k, _ in ob)  # each delivered exactly once
    finally:
        store.dispose()


@pytest.mark.postgres
@pytest.mark.slow
def test_pg_session_terminated_under_a_running_cli_ingest(tmp_path: Path, pg_schema: str) -> None:
    """``drift ingest`` as a real process; its server session (found by its application_name) is ended with
    pg_terminate_backend while it writes a large file: one line naming the store, exit 1, the run recorded
    failed, nothing of the batch stored; the next ingest stores everything."""
    import time
    import uuid

    import numpy as np
    import pandas as pd

    from tests.conftest import PG_URL

    app = f"drift-t-{uuid.uuid4().hex[:8]}"  # this test's sessions only: other runs share the server
    url = f"{pg_schema}&application_name={app}"
    rng = np.random.default_rng(20260413)  # invented table: 120 series x 520 weeks
    weeks = pd.date_range("2016-01-04", periods=520, freq="7D").date.astype(str)
    df = pd.DataFrame(np.round(rng.normal(100.0, 10.0, (520, 120)), 2), columns=[f"s{i:03d}" for i in range(120)])
    df.insert(0, "week", weeks)
    (tmp_path / "data").mkdir()
    df.to_csv(tmp_path / "data" / "big.csv", index=False)
    cfg = tmp_path / "drift.yaml"
    cfg.write_text(f"store: '{url}'\nsources:\n  - {{name: feeds, kind: csv, path: data/*.csv, period_column: week}}\n"
                   "models: []\n", encoding="utf-8")
    open_store(url).dispose()
    admin = sa.create_engine(PG_URL)
    try:
        proc = subprocess.Popen([sys.executable, "-m", "drift.cli", "ingest", "--config", str(cfg)], cwd=tmp_path,
                                env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        killed = None
        deadline = time.monotonic() + CEILING
        while killed is None and proc.poll() is None and time.monotonic() < deadline:
            with admin.begin() as conn:
                killed = conn.execute(sa.text(
                    "select pg_terminate_backend(pid) from pg_stat_activity where application_name = :a "
                    "and state in ('active', 'idle in transaction') and query ilike '%%observations%%' limit 1"),
                    {"a": app}).scalar()
            time.sleep(0.005)
        out, err = proc.communicate(timeout=CEILING)
    finally:
        admin.dispose()
    assert killed, f"the ingest finished before its session could be ended: {out} {err}"
    assert proc.returncode == 1, err
    assert "Traceback" not in err and "the connection to the store at" in err and "was lost" in err, err
    assert "password" not in err.lower()
    st = open_store(url)
    try:
        [run] = st.recent_runs("ingest")
        assert run["status"] == "failed" and "was lost" in run["error"]
        assert _count_in(st, observations) == 0 and _count_in(st, batches) == 0
    finally:
        st.dispose()
    again = _cli("ingest", "--config", str(cfg), cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    st = open_store(url)
    try:
        assert _count_in(st, observations) == 520 * 120
        assert [r["status"] for r in st.recent_runs("ingest")] == ["ok", "failed"]
    finally:
        st.dispose()


def _count_in(store: Any, table: sa.Table) -> int:
    with store.connect() as conn:
        return int(conn.execute(sa.select(sa.func.count()).select_from(table)).scalar_one())
