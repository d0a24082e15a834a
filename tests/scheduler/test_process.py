"""The daemon as a real subprocess: jobs run and are recorded, SIGTERM stops it cleanly, a restart does not
repeat a run, a second daemon on the same store is refused, a stale lock is taken over.

Waits poll a condition with a generous ceiling (nothing here measures time)."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable
from datetime import datetime, timezone
from pathlib import Path

from drift.config import Config, ScheduleConfig
from drift.lock import read_lock
from drift.scheduler import EXIT_LOCKED, EXIT_OK
from drift.status import collect_status, format_status
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


def _start(tmp_path: Path, *args: str, slow: float = 0.0, **env_extra: str) -> subprocess.Popen[str]:
    env = {**os.environ, "DRIFT_TEST_SLOW": str(slow), "PYTHONPATH": str(ROOT), **env_extra}
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


def _kill9(proc: subprocess.Popen[str]) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.communicate(timeout=CEILING)


def _cfg(tmp_path: Path) -> Config:
    return Config(store=f"sqlite:///{tmp_path / 'd.db'}",
                  schedule=ScheduleConfig(ingest="every 1s", check="every 1s", retry=None))


def test_sigterm_records_the_end_of_the_run_it_waited_for(tmp_path: Path) -> None:
    """SIGTERM while a job runs; its result takes a second to summarise (as a check's outcome with many
    payloads did). The daemon must record the run's end before it exits: three trials, none left
    'running' (before the fix: 3 of 3 left running, then marked abandoned at the next start)."""
    for trial in range(3):
        where = tmp_path / f"trial{trial}"
        where.mkdir()
        out = where / "out.txt"
        proc = _start(where, slow=0.5, DRIFT_TEST_SUMMARY_SLOW="1.0")
        _wait_for(lambda out=out: _count(out, "ingest-start") >= 1, "an ingest to start")
        rc, err = _stop(proc)
        assert rc == EXIT_OK, err
        ingest = [r for r in _runs(where) if r["kind"] == "ingest"]
        assert ingest and [r["status"] for r in ingest] == ["ok"] * len(ingest), (trial, ingest)
        assert all(r["finished_at"] is not None for r in ingest)


def test_a_daemon_killed_mid_run_is_not_shown_running_and_its_run_is_rerun_once(tmp_path: Path) -> None:
    """kill -9 during an hourly ingest: status shows the run abandoned (its process is gone), not running;
    the next daemon records it abandoned with when and why, and runs that fire time again, once, because
    it is within the misfire grace (before: the next ingest came an hour later)."""
    out = tmp_path / "out.txt"
    first = _start(tmp_path, slow=60.0, DRIFT_TEST_INGEST_EVERY="every 1h")
    _wait_for(lambda: _count(out, "ingest-start", first.pid) >= 1, "the ingest to start")
    (row,) = [r for r in _runs(tmp_path) if r["kind"] == "ingest"]
    assert row["status"] == "running" and row["pid"] == first.pid and row["host"] == socket.gethostname()
    _kill9(first)
    st = open_store(f"sqlite:///{tmp_path / 'd.db'}")
    try:
        status = collect_status(_cfg(tmp_path), st)
    finally:
        st.dispose()
    job = status["jobs"]["ingest"]
    assert job["outcome"] == "abandoned" and f"process {first.pid}" in job["error"], job
    assert "running" not in format_status(status).split("ingest", 1)[1].splitlines()[0]
    second = _start(tmp_path, DRIFT_TEST_INGEST_EVERY="every 1h")
    _wait_for(lambda: _count(out, "ingest-end", second.pid) >= 1, "the abandoned ingest to run again")
    time.sleep(1.5)  # room for a wrong second re-run to show up
    assert _stop(second)[0] == EXIT_OK
    ingest = sorted((r for r in _runs(tmp_path) if r["kind"] == "ingest"), key=lambda r: r["id"])
    assert [r["status"] for r in ingest] == ["abandoned", "ok"], ingest
    gone, again = ingest
    assert gone["finished_at"] is not None and f"process {first.pid}" in gone["error"]
    assert again["scheduled_for"] == gone["scheduled_for"]
    assert json.loads(again["detail"])["rerun_of"] == gone["id"]
    assert _count(out, "ingest-end", second.pid) == 1


def test_a_killed_manual_run_is_abandoned_by_the_next_run(tmp_path: Path) -> None:
    """A `drift check`-like process records a run and is killed -9 (left a zombie: not yet reaped). Status
    does not show it running; the next run anywhere on the store records it abandoned, with when and why."""
    db = tmp_path / "d.db"
    open_store(f"sqlite:///{db}").dispose()
    code = ("import sys, time; from drift.store import open_store; st = open_store(sys.argv[1]); "
            "rid = st.start_run('check'); print(rid, flush=True); time.sleep(60)")
    proc = subprocess.Popen([sys.executable, "-c", code, f"sqlite:///{db}"], cwd=ROOT, text=True,
                            stdout=subprocess.PIPE, env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert proc.stdout is not None
    rid = int(proc.stdout.readline())
    proc.send_signal(signal.SIGKILL)
    _wait_for(lambda: Path(f"/proc/{proc.pid}/stat").read_text().split(")")[-1].split()[0] == "Z",
              "the killed process to become a zombie")
    st = open_store(f"sqlite:///{db}")
    try:
        job = collect_status(_cfg(tmp_path), st)["jobs"]["check"]
        assert job["outcome"] == "abandoned" and job["pid"] == proc.pid, job
        st.start_run("ingest")  # any later run
        row = next(r for r in st.recent_runs() if r["id"] == rid)
        assert row["status"] == "abandoned" and row["finished_at"] is not None
        assert f"process {proc.pid} on {socket.gethostname()} is no longer running" in row["error"]
    finally:
        st.dispose()
        proc.wait(timeout=CEILING)


def test_a_lock_whose_pid_now_belongs_to_an_unrelated_process_is_taken_over(tmp_path: Path) -> None:
    """The daemon dies (kill -9) and its pid is reused by an unrelated live process before the lock's
    heartbeat goes stale: the holder is identified by pid and process start time, so the next daemon takes
    the lock over instead of exiting 3 (which systemd would not restart). The pid reuse is simulated by
    writing the unrelated process's pid into the dead daemon's lock row."""
    out = tmp_path / "out.txt"
    first = _start(tmp_path)
    _wait_for(lambda: _count(out, "check", first.pid) >= 1, "the first daemon to run")
    _kill9(first)
    other = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        st = open_store(f"sqlite:///{tmp_path / 'd.db'}")
        with st.begin() as conn:
            conn.execute(locks.update().where(locks.c.name == "daemon").values(pid=other.pid))
        st.dispose()
        second = _start(tmp_path)
        _wait_for(lambda: _count(out, "check", second.pid) >= 1 or second.poll() is not None,
                  "the second daemon to run or exit")
        rc, err = _stop(second)
        assert rc == EXIT_OK, err
        assert "took over a stale daemon lock" in err and f"{other.pid}" in err
    finally:
        other.kill()
        other.wait()
