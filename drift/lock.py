"""One daemon per store: a lock row in the store's ``locks`` table, kept alive by a heartbeat.

The lock lives in the database itself (not in a file beside it), so it works the same on SQLite and on
PostgreSQL, and two daemons on two machines pointed at one server store still exclude each other.

Protocol
--------
- *acquire*: insert the row ``(name, owner, pid, host, proc_start, acquired_at, heartbeat_at)``; ``name`` is
  the primary key, so a second insert fails. When a row is already there, it is *stale* if its holder is on
  this host and is no longer running: the pid is gone, a zombie, or now names another process (its start
  time differs from ``proc_start``, see :mod:`drift.procs`: a crashed daemon's pid reused by an unrelated
  process does not hold the store), or if its heartbeat is older than ``stale_after``. A stale
  row is taken over with a compare-and-swap update (``WHERE owner = <old owner> AND heartbeat_at = <old
  heartbeat>``), so of two processes racing for one stale lock exactly one wins. A live row ->
  :class:`~drift.exceptions.LockError` naming the holder's pid, host and since when.
- *heartbeat*: a daemon thread refreshes ``heartbeat_at`` every ``heartbeat`` seconds. A database error
  during a beat is logged and retried at the next beat; a beat that finds the row no longer ours (another
  process took it over after we stalled) marks the lock as lost and calls ``on_lost``.
- *release*: delete the row, only if it is still ours.

``owner`` is ``host:pid:token`` with a random token, so two locks taken in one process (tests) are still
told apart.
"""

from __future__ import annotations

import logging
import os
import secrets
import socket
import threading
from collections.abc import Callable
from datetime import datetime
from types import TracebackType
from typing import Any

import sqlalchemy as sa
from typing_extensions import Self

from drift.exceptions import LockError
from drift.procs import process_start, why_dead
from drift.store import STORE_FAILURES, Store, locks, utcnow

log = logging.getLogger(__name__)

#: seconds between two heartbeats of a held lock
HEARTBEAT_SECONDS = 15.0
#: a lock whose heartbeat is older than this is stale, wherever its holder runs (8 missed beats)
STALE_AFTER_SECONDS = 120.0


def pid_alive(pid: int, start: str | None = None) -> bool:
    """Whether the process ``pid`` (started at ``start``, when given) still runs on this host."""
    return why_dead(pid, start) is None


def read_lock(store: Store, name: str = "daemon") -> dict[str, Any] | None:
    """The lock row ``name`` as a dict, or None when nobody holds it."""
    with store.connect() as conn:
        row = conn.execute(sa.select(locks).where(locks.c.name == name)).first()
    return dict(row._mapping) if row is not None else None


def is_stale(row: dict[str, Any], *, now: datetime, stale_after: float = STALE_AFTER_SECONDS,
             host: str | None = None) -> str | None:
    """Why the lock ``row`` is stale (a sentence), or None when its holder looks alive."""
    host = host or socket.gethostname()
    age = (now - row["heartbeat_at"]).total_seconds()
    if row["host"] == host:
        why = why_dead(int(row["pid"]), row.get("proc_start"))
        if why is not None:
            return f"its process {row['pid']} on {row['host']} {why}"
    if age > stale_after:
        return f"its heartbeat is {age:.0f} s old (limit {stale_after:.0f} s)"
    return None


class StoreLock:
    """Context manager holding the store-wide lock ``name`` (default ``"daemon"``).

    Parameters
    ----------
    store : the store whose ``locks`` table holds the lock.
    name : lock name (primary key of ``locks``).
    heartbeat : seconds between heartbeats.
    stale_after : a heartbeat older than this many seconds makes the lock stale.
    on_lost : called (from the heartbeat thread) when the lock turns out to be held by someone else.
    clock : returns the current aware UTC time (tests).

    Raises
    ------
    LockError
        on entry, when another live process holds the lock; the message names its pid, host and since when.
    """

    def __init__(self, store: Store, name: str = "daemon", *, heartbeat: float = HEARTBEAT_SECONDS,
                 stale_after: float = STALE_AFTER_SECONDS, on_lost: Callable[[], None] | None = None,
                 clock: Callable[[], datetime] = utcnow) -> None:
        if heartbeat <= 0:
            raise ValueError(f"heartbeat must be a positive number of seconds, got {heartbeat!r}")
        if stale_after <= heartbeat:
            raise ValueError(f"stale_after ({stale_after!r}) must exceed heartbeat ({heartbeat!r})")
        self.store = store
        self.name = name
        self.heartbeat = float(heartbeat)
        self.stale_after = float(stale_after)
        self.on_lost = on_lost
        self.clock = clock
        self.host = socket.gethostname()
        self.pid = os.getpid()
        self.proc_start = process_start()
        self.owner = f"{self.host}:{self.pid}:{secrets.token_hex(4)}"
        self.held = False
        self.lost = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    # ------------------------------------------------------------------ acquire / release
    def acquire(self) -> None:
        """Take the lock (or a stale one), start the heartbeat; :class:`LockError` when it is held."""
        now = self.clock()
        row = {"name": self.name, "owner": self.owner, "pid": self.pid, "host": self.host,
               "proc_start": self.proc_start, "acquired_at": now, "heartbeat_at": now}
        try:
            with self.store.begin() as conn:
                conn.execute(locks.insert().values(**row))
        except sa.exc.IntegrityError:
            self._take_over_if_stale(now)
        self.held = True
        self.lost.clear()
        self._stop.clear()
        self._thread = threading.Thread(target=self._beat, name=f"drift-lock-{self.name}", daemon=True)
        self._thread.start()
        log.info("holding the %s lock on this store as %s", self.name, self.owner)

    def _take_over_if_stale(self, now: datetime) -> None:
        old = read_lock(self.store, self.name)
        if old is None:  # released between our insert and our read: try once more
            with self.store.begin() as conn:
                conn.execute(locks.insert().values(
                    name=self.name, owner=self.owner, pid=self.pid, host=self.host,
                    proc_start=self.proc_start, acquired_at=now, heartbeat_at=now))
            return
        why = is_stale(old, now=now, stale_after=self.stale_after, host=self.host)
        if why is None:
            raise LockError(
                f"another drift daemon holds this store: pid {old['pid']} on host {old['host']}, "
                f"since {old['acquired_at']:%Y-%m-%d %H:%M:%S} UTC (last heartbeat "
                f"{old['heartbeat_at']:%H:%M:%S} UTC); stop it first, or wait {self.stale_after:.0f} s "
                "after it died for its lock to go stale")
        with self.store.begin() as conn:
            res = conn.execute(
                locks.update()
                .where(locks.c.name == self.name, locks.c.owner == old["owner"],
                       locks.c.heartbeat_at == old["heartbeat_at"])
                .values(owner=self.owner, pid=self.pid, host=self.host, proc_start=self.proc_start,
                        acquired_at=now, heartbeat_at=now))
        if res.rowcount != 1:
            raise LockError(f"another process took over the stale {self.name} lock at the same moment; "
                            "it now holds this store")
        log.warning("took over a stale %s lock held by pid %s on %s since %s: %s",
                    self.name, old["pid"], old["host"], old["acquired_at"], why)

    def release(self) -> None:
        """Stop the heartbeat and delete the row if it is still ours (idempotent)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5.0)
            self._thread = None
        if not self.held:
            return
        self.held = False
        try:
            with self.store.begin() as conn:
                conn.execute(locks.delete().where(locks.c.name == self.name, locks.c.owner == self.owner))
        except STORE_FAILURES as exc:
            self.store.dispose()
            log.warning("could not release the %s lock (%s); it will go stale in %.0f s",
                        self.name, exc.__class__.__name__, self.stale_after)
        else:
            log.info("released the %s lock", self.name)

    # ------------------------------------------------------------------ heartbeat
    def beat(self) -> bool:
        """Refresh the heartbeat once; False when the row is no longer ours (lock lost)."""
        with self.store.begin() as conn:
            res = conn.execute(locks.update()
                               .where(locks.c.name == self.name, locks.c.owner == self.owner)
                               .values(heartbeat_at=self.clock()))
        return bool(res.rowcount == 1)

    def _beat(self) -> None:
        while not self._stop.wait(self.heartbeat):
            try:
                ours = self.beat()
            except STORE_FAILURES as exc:
                self.store.dispose()  # the next beat reconnects
                log.warning("lock heartbeat failed (%s: %s); retrying in %.0f s", exc.__class__.__name__,
                            str(exc).splitlines()[0] if str(exc) else "", self.heartbeat)
                continue
            if not ours:
                self.held = False
                self.lost.set()
                log.error("the %s lock on this store was taken over by another process", self.name)
                if self.on_lost is not None:
                    self.on_lost()
                return

    # ------------------------------------------------------------------ context manager
    def __enter__(self) -> Self:
        self.acquire()
        return self

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None,
                 tb: TracebackType | None) -> None:
        self.release()

