"""The daemon as a real subprocess: jobs run and are recorded, SIGTERM stops it cleanly, a restart does not
repeat a run, a second daemon on the same store is refused, a stale lock is taken over.

Waits poll a condition with a generous ceiling (nothing here measures time)."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable
from datetime import datetime, timezone
from pathlib import Path

from drift.lock import read_lock
from drift.scheduler import EXIT_LOCKED, EXIT_OK
from drift.store import locks, open_store

ROOT = Path(__file__).resolve().parents[2]
CEILING = 30.0


def _wait_for(pred: Callable[[], bool], what: str) -> None:
    deadline = time.monotonic() + CEILING
    while time.monotonic() < deadline:
        if pred():
            return
        time.sleep(0.05)
    raise AssertionError(f"timed out waiting for {what}")


def _lines(out: Path) -> list[str]:
    return out.read_text().split("\n") if out.exists() else []


def _count(out: Path, word: str, pid: int | None = None) -> int:
    return sum(1 for ln in _lines(out) if ln.startswith(word + " ") and (pid is None or ln.endswith(f" {pid}")))


def _start(tmp_path: Path, *args: str, slow: float = 0.0) -> subprocess.Popen[str]:
    env = {**os.environ, "DRIFT_TEST_SLOW": str(slow), "PYTHONPATH": str(ROOT)}
    return subprocess.Popen([sys.executable, "-m", "tests.scheduler.daemon_helper", str(tmp_path / "d.db"),
                             str(tmp_path / "out.txt"), *args], cwd=ROOT, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _stop(proc: subprocess.Popen[str]) -> tuple[int, str]:
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=CEILING)
    return proc.returncode, err


def _runs(tmp_path: Path) -> list[dict]:
    st = open_store(f"sqlite:///{tmp_path / 'd.db'}")
    try:
        return st.recent_runs(limit=1000)
    finally:
        st.dispose()


def test_jobs_run_are_recorded_and_sigterm_exits_zero(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    proc = _start(tmp_path)
    _wait_for(lambda: _count(out, "check") >= 2 and _count(out, "ingest-end") >= 2, "two runs of each job")
    rc, err = _stop(proc)
    assert rc == EXIT_OK, err
    runs = _runs(tmp_path)
    assert {r["kind"] for r in runs} == {"ingest", "check"}
    assert all(r["status"] == "ok" for r in runs), [(r["kind"], r["status"], r["error"]) for r in runs]
    assert all(r["job_id"] == "drift:" + r["kind"] and r["scheduled_for"] is not None for r in runs)
    assert "stopping -> stopped" in err
    st = open_store(f"sqlite:///{tmp_path / 'd.db'}")
    assert read_lock(st) is None  # released on exit
    st.dispose()


def test_sigterm_lets_the_running_job_finish(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    proc = _start(tmp_path, slow=1.0)
    _wait_for(lambda: _count(out, "ingest-start") >= 1, "an ingest to start")
    rc, err = _stop(proc)
    assert rc == EXIT_OK, err
    assert _count(out, "ingest-end") == _count(out, "ingest-start")
    ingest = [r for r in _runs(tmp_path) if r["kind"] == "ingest"]
    assert ingest and all(r["status"] == "ok" for r in ingest)


def test_a_job_over_the_stop_grace_is_recorded_abandoned(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    proc = _start(tmp_path, "0.3", slow=60.0)
    _wait_for(lambda: _count(out, "ingest-start") >= 1, "an ingest to start")
    rc, err = _stop(proc)  # returns long before the 60 s job would end
    assert rc == EXIT_OK, err
    statuses = {r["status"] for r in _runs(tmp_path) if r["kind"] == "ingest"}
    assert statuses == {"abandoned"}
    assert "running" not in {r["status"] for r in _runs(tmp_path)}


def test_restart_does_not_repeat_a_run(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    first = _start(tmp_path)
    _wait_for(lambda: _count(out, "check", first.pid) >= 2, "two checks")
    assert _stop(first)[0] == EXIT_OK
    second = _start(tmp_path)
    _wait_for(lambda: _count(out, "check", second.pid) >= 2, "two checks after the restart")
    assert _stop(second)[0] == EXIT_OK
    runs = [r for r in _runs(tmp_path) if r["kind"] == "check"]
    keys = [r["scheduled_for"] for r in runs]
    assert len(keys) == len(set(keys)) >= 4
    assert len(runs) == _count(out, "check")  # every run of the body has its row, none twice


def test_second_daemon_on_the_same_store_is_refused(tmp_path: Path) -> None:
    out = tmp_path / "out.txt"
    first = _start(tmp_path)
    _wait_for(lambda: _count(out, "check") >= 1, "the first daemon to run")
    second = _start(tmp_path)
    _, err = second.communicate(timeout=CEILING)
    assert second.returncode == EXIT_LOCKED
    assert f"pid {first.pid}" in err and socket.gethostname() in err and "since" in err
    assert _count(out, "check", second.pid) == 0
    assert _stop(first)[0] == EXIT_OK


def test_stale_lock_of_a_dead_process_is_taken_over(tmp_path: Path) -> None:
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    st = open_store(f"sqlite:///{tmp_path / 'd.db'}")
    now = datetime.now(timezone.utc)
    with st.begin() as conn:
        conn.execute(locks.insert().values(name="daemon", owner=f"{socket.gethostname()}:{dead.pid}:x",
                                           pid=dead.pid, host=socket.gethostname(), acquired_at=now,
                                           heartbeat_at=now))
    st.dispose()
    out = tmp_path / "out.txt"
    proc = _start(tmp_path)
    _wait_for(lambda: _count(out, "check") >= 1, "the daemon to run")
    rc, err = _stop(proc)
    assert rc == EXIT_OK, err
    assert "took over a stale daemon lock" in err and f"process {dead.pid}" in err
