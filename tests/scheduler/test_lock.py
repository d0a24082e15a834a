"""The store lock in-process: refusal naming the holder, stale detection (dead pid, old heartbeat),
release, loss detection."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from datetime import datetime, timedelta, timezone

import pytest

from drift.exceptions import LockError
from drift.lock import StoreLock, read_lock
from drift.store import Store, locks


def _insert(store: Store, *, pid: int, host: str, heartbeat: datetime) -> None:
    with store.begin() as conn:
        conn.execute(locks.insert().values(name="daemon", owner=f"{host}:{pid}:t", pid=pid, host=host,
                                           acquired_at=heartbeat, heartbeat_at=heartbeat))


def test_second_lock_is_refused_naming_pid_host_and_since(store: Store) -> None:
    with StoreLock(store, heartbeat=5, stale_after=60) as first:
        with pytest.raises(LockError) as err:
            StoreLock(store).acquire()
        msg = str(err.value)
        assert f"pid {os.getpid()}" in msg and socket.gethostname() in msg and "since" in msg
        assert read_lock(store)["owner"] == first.owner
    assert read_lock(store) is None


def test_lock_of_a_dead_pid_on_this_host_is_taken_over(store: Store, caplog: pytest.LogCaptureFixture) -> None:
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    _insert(store, pid=dead.pid, host=socket.gethostname(), heartbeat=datetime.now(timezone.utc))
    with StoreLock(store) as lk:
        assert read_lock(store)["owner"] == lk.owner
    assert "took over a stale daemon lock" in caplog.text


def test_lock_with_an_old_heartbeat_on_another_host_is_taken_over(store: Store) -> None:
    now = datetime.now(timezone.utc)
    _insert(store, pid=1, host="other-host", heartbeat=now - timedelta(minutes=10))
    with StoreLock(store, stale_after=120) as lk:
        assert read_lock(store)["pid"] == lk.pid


def test_live_lock_on_another_host_is_respected(store: Store) -> None:
    _insert(store, pid=1, host="other-host", heartbeat=datetime.now(timezone.utc))
    with pytest.raises(LockError, match="pid 1 on host other-host"):
        StoreLock(store).acquire()


def test_beat_reports_a_lost_lock(store: Store) -> None:
    lk = StoreLock(store)
    lk.acquire()
    assert lk.beat() is True
    with store.begin() as conn:
        conn.execute(locks.update().values(owner="someone-else"))
    assert lk.beat() is False
    lk.release()
    assert read_lock(store)["owner"] == "someone-else"  # release never deletes another owner's row


def test_bad_arguments() -> None:
    with pytest.raises(ValueError, match="heartbeat"):
        StoreLock(None, heartbeat=0)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="stale_after"):
        StoreLock(None, heartbeat=10, stale_after=5)  # type: ignore[arg-type]


def test_heartbeat_survives_a_locked_store(store: Store, monkeypatch: pytest.MonkeyPatch) -> None:
    """A beat that meets a store locked by another process (a StoreError) is retried at the next beat."""
    import time

    from drift.exceptions import StoreError

    lk = StoreLock(store, heartbeat=0.05, stale_after=5.0)
    real = lk.beat
    seen = {"n": 0}

    def flaky() -> bool:
        seen["n"] += 1
        if seen["n"] == 1:
            raise StoreError("the SQLite store x is locked by another process")
        return real()

    monkeypatch.setattr(lk, "beat", flaky)
    lk.acquire()
    try:
        deadline = time.monotonic() + 30
        while seen["n"] < 3 and time.monotonic() < deadline:
            time.sleep(0.02)
        assert seen["n"] >= 3 and lk.held and not lk.lost.is_set()
    finally:
        lk.release()
