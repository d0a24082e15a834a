"""Runs recorded truly, in-process: each run names its owner (pid, host, process start) and beats while it
lasts; a running row whose owner is gone (dead on this host, or silent past the bound elsewhere) becomes
``abandoned`` with when and why; the daemon records one row per job execution, with the status the job
itself reached; an abandoned scheduled run within the misfire grace is run again, once. The real-process
versions (kill -9, SIGTERM, a reused pid) are in ``test_process.py``. Common practice, no source."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import time
from datetime import datetime, timedelta, timezone
from typing import Any

import sqlalchemy as sa

from drift.config import Config, ModelConfig, ScheduleConfig
from drift.procs import process_start
from drift.scheduler import Daemon, job_check
from drift.status import collect_status, format_status
from drift.store import Store, runs, verdicts

from .conftest import Clock


def _utc(*a: int) -> datetime:
    return datetime(*a, tzinfo=timezone.utc)  # type: ignore[misc]


def _dead_pid() -> int:
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    return dead.pid


def _set(store: Store, rid: int, **values: Any) -> None:
    with store.begin() as conn:
        conn.execute(runs.update().where(runs.c.id == rid).values(**values))


def _row(store: Store, rid: int) -> dict[str, Any]:
    return next(r for r in store.recent_runs(limit=1000) if r["id"] == rid)


def test_a_run_names_its_owner_and_beats_while_it_lasts(store: Store) -> None:
    store.run_heartbeat = 0.05
    rid = store.start_run("check")
    row = _row(store, rid)
    assert row["pid"] == os.getpid() and row["host"] == socket.gethostname()
    assert row["proc_start"] == process_start(os.getpid()) and row["proc_start"]
    assert row["heartbeat_at"] == row["started_at"]
    deadline = time.monotonic() + 30
    while _row(store, rid)["heartbeat_at"] == row["started_at"] and time.monotonic() < deadline:
        time.sleep(0.02)
    assert _row(store, rid)["heartbeat_at"] > row["started_at"]
    store.finish_run(rid, "ok")
    done = _row(store, rid)
    time.sleep(0.3)  # a finished run is beaten no more
    assert _row(store, rid)["heartbeat_at"] == done["heartbeat_at"] and done["status"] == "ok"


def test_stale_running_rows_become_abandoned_with_when_and_why(store: Store) -> None:
    now = datetime.now(timezone.utc)
    me = socket.gethostname()
    dead, reused, silent, alive_far, mine = (store.start_run(k) for k in ("check", "check", "ingest", "ingest",
                                                                         "digest"))
    _set(store, dead, pid=_dead_pid())
    _set(store, reused, proc_start="another-boot:1")  # our own pid, another process start: the pid was reused
    _set(store, silent, host="other-host", pid=1, heartbeat_at=now - timedelta(hours=1))  # silent for an hour
    _set(store, alive_far, host="other-host", pid=1, heartbeat_at=now)  # another host, beating
    _set(store, mine, heartbeat_at=now - timedelta(hours=1))  # an old beat does not matter: the pid is alive
    closed = store.close_stale_runs()
    assert sorted(r["id"] for r in closed) == sorted([dead, reused, silent])
    for rid, why in ((dead, f"on {me} is no longer running"), (reused, "now belongs to another process"),
                     (silent, "no heartbeat from pid 1 on other-host for 36")):
        row = _row(store, rid)
        assert row["status"] == "abandoned" and row["finished_at"] is not None, row
        assert why in row["error"] and "last sign of life" in row["error"], row["error"]
    assert _row(store, alive_far)["status"] == "running" and _row(store, mine)["status"] == "running"
    assert store.close_stale_runs() == []  # once


def test_status_shows_a_dead_owner_as_abandoned_not_running(store: Store) -> None:
    rid = store.start_run("check", job_id="drift:check", scheduled_for=_utc(2026, 3, 2, 1, 30))
    pid = _dead_pid()
    _set(store, rid, pid=pid)
    cfg = Config(store=store.url, schedule=ScheduleConfig(check="30 1 * * *", retry=None))
    st = collect_status(cfg, store)
    job = st["jobs"]["check"]
    assert job["outcome"] == "abandoned" and f"process {pid}" in job["error"] and job["pid"] == pid
    text = format_status(st)
    line = next(ln for ln in text.splitlines() if ln.strip().startswith("check"))
    assert "abandoned" in line and "running" not in line
    assert _row(store, rid)["status"] == "running"  # status only reads; the next run records it
    live = store.start_run("ingest")
    assert collect_status(cfg, store)["jobs"]["ingest"]["outcome"] == "running"
    store.finish_run(live, "ok")


def _daemon(store: Store, clock: Clock, jobs: dict[str, Any], **schedule: Any) -> Daemon:
    sched = {"timezone": "UTC", "check": "30 1 * * *", "retry": None, **schedule}
    cfg = Config(store=store.url, schedule=ScheduleConfig(**sched),
                 models=[ModelConfig(name="nodata", target="y", frequency="W", drivers=[{"series": "x"}],
                                     reference={"start": "2021-01-04", "end": "2023-12-25"})])
    d = Daemon(cfg, store, jobs=jobs, clock=clock, stop_grace=1.0)
    d.start(paused=True)
    return d


def test_the_daemon_records_one_row_per_check_with_the_checks_own_status(store: Store, clock: Clock) -> None:
    """The real check job: its model has no data, so the check is partial. One runs row (before: two, the
    daemon's saying ok), partial with the check's error, and the verdicts point at it."""
    d = _daemon(store, clock, {"check": job_check})
    clock.set(2026, 3, 1, 1, 31)
    (out,) = d.run_pending()
    d.stop()
    rows = store.recent_runs(kind="check")
    assert len(rows) == 1, rows
    (row,) = rows
    assert out.status == row["status"] == "partial" and out.run_id == row["id"]
    assert "1 of 1 model(s) could not be checked: nodata" in row["error"]
    detail = json.loads(row["detail"])
    assert detail["failed"] == 1 and detail["trigger"] == "30 1 * * *" and "duration_s" in detail
    assert row["as_of"] is not None and row["job_id"] == "drift:check"
    with store.connect() as conn:
        assert set(conn.execute(sa.select(verdicts.c.run)).scalars()) <= {row["id"]}


def test_a_failed_inner_run_is_failed_for_the_daemon_too(store: Store, clock: Clock) -> None:
    def inner(cfg: Config, st: Store) -> None:
        rid = st.start_run("check")
        st.finish_run(rid, "failed", error="RuntimeError: half-way")

    d = _daemon(store, clock, {"check": inner})
    clock.set(2026, 3, 1, 1, 31)
    (out,) = d.run_pending()
    d.stop()
    (row,) = store.recent_runs(kind="check")
    assert out.status == row["status"] == "failed" and row["error"] == "RuntimeError: half-way"


def test_an_abandoned_run_within_the_grace_is_run_again_once(store: Store, clock: Clock) -> None:
    calls: list[int] = []

    def job(cfg: Config, st: Store) -> None:
        calls.append(1)

    fire = _utc(2026, 3, 1, 1, 30)
    rid = store.start_run("check", job_id="drift:check", scheduled_for=fire)
    _set(store, rid, pid=_dead_pid())  # the daemon that ran it was killed
    clock.set(2026, 3, 1, 1, 50)  # 20 min later: within the one-hour grace
    d = _daemon(store, clock, {"check": job})
    out = d.run_pending()
    assert [(o.status, o.scheduled_for) for o in out] == [("ok", fire)] and calls == [1]
    assert d.run_pending() == [] and d.next_run_times()["check"] == _utc(2026, 3, 2, 1, 30)
    d.stop()
    again = store.recent_runs(kind="check")[0]
    assert json.loads(again["detail"])["rerun_of"] == rid and _row(store, rid)["status"] == "abandoned"
    # the re-run is abandoned too: it is not run a third time
    _set(store, again["id"], status="running", finished_at=None, pid=_dead_pid())
    d2 = _daemon(store, clock, {"check": job})
    assert d2.run_pending() == [] and calls == [1]
    d2.stop()


def test_an_abandoned_run_beyond_the_grace_is_not_rerun(store: Store, clock: Clock) -> None:
    calls: list[int] = []
    rid = store.start_run("check", job_id="drift:check", scheduled_for=_utc(2026, 3, 1, 1, 30))
    _set(store, rid, pid=_dead_pid())
    clock.set(2026, 3, 1, 3, 0)  # 90 min later
    d = _daemon(store, clock, {"check": lambda cfg, st: calls.append(1)})
    assert d.run_pending() == [] and calls == []
    assert d.next_run_times()["check"] == _utc(2026, 3, 2, 1, 30)
    d.stop()
    assert _row(store, rid)["status"] == "abandoned"
