"""The daemon: APScheduler jobs (ingest, check, digest, retry) whose history lives in the store's ``runs``.

Run state
---------
``starting -> running -> stopping -> stopped`` (:class:`DaemonState`). ``run_daemon`` takes the store-wide
lock (:mod:`drift.lock`), starts a :class:`Daemon`, waits for SIGTERM/SIGINT (or ``stop_event``), lets the
running job finish within a bounded grace and returns an exit code.

Exit codes (of ``drift daemon``): ``0`` stopped cleanly; ``1`` could not start (store unusable, unexpected
error); ``3`` another daemon holds the store, or this one lost its lock to another process.

Scheduling rules (each a trap of APScheduler 3.x that is handled here)
--------------------------------------------------------------------
- *Persistence.* The job store is APScheduler's in-memory one; what survives a restart is the ``runs``
  table: every fire time handled (ran, failed, timed out, missed, abandoned) is a row with ``kind`` = job
  name, ``job_id`` = ``"drift:<name>"`` and ``scheduled_for`` = the fire time. At start, each job's
  ``next_run_time`` is the trigger's first fire time *after the last recorded one*, so a restart neither
  repeats a run nor loses the ones that fell while the daemon was down. (A pickled SQLAlchemyJobStore would
  tie the store to importable callables and to the pickled trigger; the runs table is already the record.)
- *Coalescing.* ``coalesce=True``: after a week down, the seven missed fire times of a daily job give one
  run (scheduled for the latest), not seven.
- *Misfire grace.* ``misfire_grace_time`` = ``schedule.misfire_grace`` (default one hour; APScheduler's own
  default of one second silently drops a slightly late job). A fire time later than that is recorded as
  ``missed`` (listener on ``EVENT_JOB_MISSED``; a fire time skipped because the previous run is still going,
  ``EVENT_JOB_MAX_INSTANCES``, is recorded ``missed`` too).
- *Abandoned runs.* A run whose process died is recorded ``abandoned`` at the next start (or by the next
  run, :meth:`drift.store.Store.close_stale_runs`). When the newest fire time of a job was abandoned or
  missed and is still within the misfire grace, and no later fire time has passed, the start runs it again,
  once (``detail.rerun_of`` = the abandoned run's id): a weekly check killed mid-run is not a week lost.
- *One row per execution.* The job body runs inside :meth:`drift.store.Store.adopting`: the run that
  ``run_check`` / ``run_ingest`` / ``run_digest`` record is the daemon's row, and the daemon records the
  status they reached (``partial`` when some models were not checked), not a blanket ``ok``.
- *Stop.* :meth:`Daemon.stop` returns only once the end of every run it waited for is written, whichever
  thread writes it (the job's thread often wins the race and was killed at exit before).
- *Stable ids.* ``"drift:<name>"`` with ``replace_existing=True``: re-adding jobs never raises
  ``ConflictingIdError``.
- *Time limit.* ``max_instances=1`` means one hung run would block every later one, so the body runs in a
  worker thread that is abandoned after ``schedule.job_timeout``: the run is recorded ``timeout`` and the
  next fire time proceeds. (A thread cannot be killed; an abandoned body may still finish its current
  transaction, which is whole because every library step is one transaction.)
- *Failures.* A job that raises is logged with its traceback and recorded ``failed`` with the error text;
  a database error also disposes the engine's pool so the next run reconnects. The loop never dies.
- *Daylight saving.* Cron triggers run in ``schedule.timezone`` (default: the machine's local zone). A
  wall-clock time that does not exist (spring forward) fires at the same offset as before the jump (e.g.
  01:30 on 2026-03-29 in Europe/Lisbon fires at 01:30 UTC); a wall-clock time that occurs twice (fall back)
  fires on its first occurrence only (an hourly job has 23 runs that night, one per wall-clock hour).

Clock
-----
Every decision that depends on "now" (resume point, misfire) reads the injected ``clock``; with
``Daemon.start(paused=True)`` the APScheduler loop stays idle and :meth:`Daemon.run_pending` performs one
pass of it at the clock's time, so tests step through days without sleeping.
"""

from __future__ import annotations

import logging
import logging.handlers
import os
import signal
import socket
import sys
import threading
import traceback
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone, tzinfo
from enum import Enum
from pathlib import Path
from types import FrameType, MappingProxyType
from typing import Any
from zoneinfo import ZoneInfo

import sqlalchemy as sa
from apscheduler.events import (
    EVENT_JOB_ERROR,
    EVENT_JOB_EXECUTED,
    EVENT_JOB_MAX_INSTANCES,
    EVENT_JOB_MISSED,
    JobExecutionEvent,
    JobSubmissionEvent,
)
from apscheduler.executors.base import BaseExecutor
from apscheduler.job import Job
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger

from drift.config import Config, parse_trigger
from drift.exceptions import LockError, StoreError
from drift.lock import HEARTBEAT_SECONDS, STALE_AFTER_SECONDS, StoreLock
from drift.store import STORE_FAILURES, RunScope, Store, open_store, utcnow

log = logging.getLogger(__name__)

#: the jobs the daemon knows, in the order they are listed
JOB_NAMES = ("ingest", "check", "digest", "retry")
#: seconds a running job may take to finish after a stop signal before it is abandoned
STOP_GRACE_SECONDS = 30.0
#: run statuses after which a scheduled fire time within the misfire grace is run again at the next start
RERUN_STATUSES = ("abandoned", "missed")
#: fire times counted when measuring a backlog (beyond this the count is reported as ">= this")
BACKLOG_COUNT_LIMIT = 10_000
#: seconds between two checks of the stop flag while the daemon idles
_IDLE_POLL_SECONDS = 0.2
#: rotating log file: size and number of kept files
LOG_MAX_BYTES = 10 * 1024 * 1024
LOG_BACKUPS = 5

EXIT_OK = 0
EXIT_ERROR = 1
EXIT_LOCKED = 3

JobFunc = Callable[[Config, Store], Any]


# ------------------------------------------------------------------------------------------ default jobs
# Module-level functions importing the library lazily, so this module imports without them.

def job_ingest(cfg: Config, store: Store) -> Any:
    """Read every source into the store (a file that could not be read makes the run ``partial``)."""
    from drift.pipeline import run_ingest

    return run_ingest(cfg, store, progress=False)


def job_check(cfg: Config, store: Store) -> Any:
    """Check every model; process alerts and deliver them."""
    from drift.pipeline import run_check

    return run_check(cfg, store)


def job_digest(cfg: Config, store: Store) -> Any:
    """Build and send the digest."""
    from drift.delivery.digest import run_digest

    return run_digest(cfg, store, send=True)


def job_retry(cfg: Config, store: Store) -> Any:
    """Retry pending outbox deliveries."""
    from drift.delivery.outbox import deliver_pending

    return deliver_pending(cfg, store)


DEFAULT_JOBS: Mapping[str, JobFunc] = MappingProxyType({
    "ingest": job_ingest, "check": job_check, "digest": job_digest, "retry": job_retry})


def job_id(name: str) -> str:
    """The stable APScheduler id (and ``runs.job_id``) of job ``name``."""
    return f"drift:{name}"


# ------------------------------------------------------------------------------------------ triggers
def schedule_timezone(cfg: Config) -> tzinfo:
    """The zone cron expressions are read in: ``schedule.timezone``, else the machine's local zone."""
    if cfg.schedule.timezone:
        return ZoneInfo(cfg.schedule.timezone)
    try:
        from tzlocal import get_localzone

        return get_localzone()
    except Exception:  # noqa: BLE001 - tzlocal missing or the zone unreadable: a fixed offset
        local = datetime.now().astimezone().tzinfo
        log.warning("cannot tell the machine's time zone; using the fixed offset %s (set schedule.timezone)",
                    local)
        assert local is not None
        return local


class WallClockCronTrigger(CronTrigger):
    """A cron trigger that fires a repeated wall-clock time (fall back) once, on its first occurrence.

    APScheduler's CronTrigger fires ``30 1 * * *`` twice on a fall-back night (01:30 summer time, then 01:30
    winter time), while for an hourly ``0 * * * *`` it already skips the repeated hour. Here every
    wall-clock time fires once, on its first occurrence, whatever the fields.
    """

    def get_next_fire_time(self, previous_fire_time: datetime | None, now: datetime) -> datetime | None:
        nxt = super().get_next_fire_time(previous_fire_time, now)
        while nxt is not None and self._second_occurrence(nxt):
            # step in UTC: aware arithmetic in a zone drops `fold` and would land back on the first 01:30
            at = nxt.astimezone(timezone.utc)
            nxt = super().get_next_fire_time(at, at + timedelta(microseconds=1))
        return nxt

    def _second_occurrence(self, when: datetime) -> bool:
        local = when.astimezone(self.timezone)
        other = local.replace(fold=1 - local.fold)
        return local.fold == 1 and other.utcoffset() != local.utcoffset()


def build_trigger(text: str, tz: tzinfo, *, start: datetime | None = None) -> BaseTrigger:
    """An APScheduler trigger for a schedule string (``"every 10m"`` or a 5-field cron expression).

    ``start`` anchors an interval trigger (its fire times are ``start + k * interval``); default: now.
    """
    kind, value = parse_trigger(text)
    if kind == "interval":
        return IntervalTrigger(seconds=value.total_seconds(), timezone=tz,
                               start_date=(start or utcnow()).astimezone(tz))
    return WallClockCronTrigger.from_crontab(text, timezone=tz)


def count_fire_times(trigger: BaseTrigger, after: datetime, until: datetime,
                     limit: int = BACKLOG_COUNT_LIMIT) -> tuple[int, datetime | None]:
    """Fire times in ``(after, until]``: their number (capped at ``limit``) and the latest one."""
    n, last = 0, None
    after = after.astimezone(timezone.utc)
    t = trigger.get_next_fire_time(after, after + timedelta(microseconds=1))
    while t is not None and t <= until and n < limit:
        n, last = n + 1, t
        at = t.astimezone(timezone.utc)  # UTC arithmetic keeps repeated wall-clock times apart
        t = trigger.get_next_fire_time(at, at + timedelta(microseconds=1))
    return n, last


# ------------------------------------------------------------------------------------------ outcomes
class DaemonState(str, Enum):
    STARTING = "starting"
    RUNNING = "running"
    STOPPING = "stopping"
    STOPPED = "stopped"


@dataclass(frozen=True)
class JobOutcome:
    """What became of one fire time of one job (also a row of ``runs`` when the store was reachable).

    ``status``: ok | failed | timeout | missed | abandoned.
    """

    name: str
    scheduled_for: datetime | None
    status: str
    run_id: int | None = None
    error: str | None = None
    duration: float | None = None


@dataclass
class _InFlight:
    name: str
    run_id: int
    scheduled_for: datetime
    started: float
    done: threading.Event = field(default_factory=threading.Event)
    box: dict[str, Any] = field(default_factory=dict)
    detail: dict[str, Any] = field(default_factory=dict)
    settled: bool = False
    #: set once the end is written (or could not be written): what :meth:`Daemon.stop` waits for
    recorded: threading.Event = field(default_factory=threading.Event)
    #: the job's own run, adopted (:meth:`drift.store.Store.adopting`): its status, detail, error, as_of
    scope: RunScope | None = None


class _DaemonExecutor(BaseExecutor):
    """Runs each submission on its own thread through :meth:`Daemon._execute` (which knows the fire time
    and applies the daemon's clock, misfire rule and time limit)."""

    def __init__(self, daemon: Daemon) -> None:
        super().__init__()
        self._daemon = daemon

    def _do_submit_job(self, job: Job, run_times: list[datetime]) -> None:
        threading.Thread(target=self._run, args=(job, run_times), name=f"drift-{job.name}",
                         daemon=True).start()

    def _run(self, job: Job, run_times: list[datetime]) -> None:
        try:
            events = self._daemon._execute(job, run_times)
        except BaseException as exc:  # noqa: BLE001 - reported by APScheduler's own error path
            self._run_job_error(job.id, exc, exc.__traceback__)
        else:
            self._run_job_success(job.id, events)


# ------------------------------------------------------------------------------------------ the daemon
class Daemon:
    """The scheduled jobs of one store. Hold the store's :class:`~drift.lock.StoreLock` while it runs.

    Parameters
    ----------
    cfg : the configuration (``cfg.schedule`` gives the triggers, grace and time limit).
    store : an open store.
    jobs : name -> callable(cfg, store); default :data:`DEFAULT_JOBS`. A scheduled name without a callable
        is skipped with a warning.
    clock : returns the current aware UTC time; default the real clock.
    stop_grace : seconds a running job may take to finish after :meth:`stop` before it is abandoned.
    """

    def __init__(self, cfg: Config, store: Store, *, jobs: Mapping[str, JobFunc] | None = None,
                 clock: Callable[[], datetime] | None = None,
                 stop_grace: float = STOP_GRACE_SECONDS) -> None:
        if stop_grace < 0:
            raise ValueError(f"stop_grace must be a non-negative number of seconds, got {stop_grace!r}")
        self.cfg = cfg
        self.store = store
        self.jobs: dict[str, JobFunc] = dict(DEFAULT_JOBS if jobs is None else jobs)
        self.clock = clock or utcnow
        self.stop_grace = float(stop_grace)
        self.tz = schedule_timezone(cfg)
        self.misfire_grace = cfg.schedule.misfire_grace
        self.job_timeout = cfg.schedule.job_timeout.total_seconds()
        self.state = DaemonState.STARTING
        self.outcomes: list[JobOutcome] = []
        self._lock = threading.Lock()
        self._idle = threading.Condition(self._lock)
        self._starting = 0  # run_once calls between the state check and their registration in _inflight
        self._inflight: dict[int, _InFlight] = {}
        self._unrecorded: list[_InFlight] = []  # ends the store could not take yet: retried
        self._backlog: dict[str, int] = {}
        self._rerun: dict[str, tuple[datetime, int]] = {}  # job -> (fire time, run id) to run again once
        self.scheduler = BackgroundScheduler(
            timezone=self.tz, executors={"default": _DaemonExecutor(self)},
            job_defaults={"coalesce": True, "max_instances": 1,
                          "misfire_grace_time": max(1, int(self.misfire_grace.total_seconds()))})
        self.scheduler.add_listener(self._on_missed, EVENT_JOB_MISSED | EVENT_JOB_MAX_INSTANCES)

    # ---------------------------------------------------------------- lifecycle
    def start(self, *, paused: bool = False) -> None:
        """Close runs a dead daemon left ``running``, add the jobs, start the scheduler (idle if paused)."""
        if self.state is not DaemonState.STARTING:
            raise RuntimeError(f"the daemon can only start from state 'starting', not '{self.state.value}'")
        self._close_orphans()
        self.add_jobs()
        self.scheduler.start(paused=paused)
        self._set_state(DaemonState.RUNNING)
        for j in self.scheduler.get_jobs():
            log.info("job %s (%s): next run %s", j.name, j.trigger, j.next_run_time)

    def stop(self) -> None:
        """Stop firing; let running jobs finish within ``stop_grace`` seconds, abandon the rest; return only
        once the end of every run is recorded (whichever thread records it)."""
        with self._lock:
            if self.state in (DaemonState.STOPPING, DaemonState.STOPPED):
                return
            self._set_state(DaemonState.STOPPING)  # from here run_once starts nothing new
        if self.scheduler.running:
            self.scheduler.shutdown(wait=False)
        deadline = _monotonic() + self.stop_grace
        with self._idle:  # a run whose start is being written now is waited for too
            self._idle.wait_for(lambda: self._starting == 0, timeout=self._record_wait())
            running = list(self._inflight.values())
        if running:
            log.info("waiting up to %.0f s for %s to finish", self.stop_grace,
                     ", ".join(f"{f.name} (run {f.run_id})" for f in running))
        for fl in running:
            fl.done.wait(max(0.0, deadline - _monotonic()))
            if fl.done.is_set():
                self._complete(fl)
            else:
                self._settle(fl, "abandoned", error=(
                    f"still running {self.stop_grace:.0f} s after the daemon was asked to stop; abandoned"))
        for fl in running:  # settled by the job's own thread: its write may still be under way
            if not fl.recorded.wait(self._record_wait()):
                log.error("%s: the end of run %d was not recorded in time; it will be found abandoned",
                          fl.name, fl.run_id)
        self._record_pending()
        self._set_state(DaemonState.STOPPED)

    def _record_wait(self) -> float:
        """Seconds one store write may take: the store's busy timeout, and some."""
        return float(getattr(self.store, "busy_timeout", 30.0)) + 5.0

    def _set_state(self, state: DaemonState) -> None:
        log.info("daemon %s -> %s", self.state.value, state.value)
        self.state = state

    # ---------------------------------------------------------------- jobs
    def add_jobs(self) -> list[str]:
        """Add (or replace) one APScheduler job per scheduled name; returns the ids. Idempotent."""
        now = self.clock()
        grace = max(1, int(self.misfire_grace.total_seconds()))
        added = []
        for name in JOB_NAMES:
            text = getattr(self.cfg.schedule, name)
            if text is None:
                continue
            func = self.jobs.get(name)
            if func is None:
                log.warning("schedule.%s is set but no job function is registered for it; skipped", name)
                continue
            last = self._last_scheduled(name)
            trigger = build_trigger(text, self.tz, start=last or now)
            if last is None:
                nxt = trigger.get_next_fire_time(None, now)
            else:
                nxt = trigger.get_next_fire_time(last, now)
                n, latest = count_fire_times(trigger, last, now)
                if n > 1:
                    log.warning("%s: %d fire times passed since the last recorded one (%s); they are "
                                "coalesced into one run scheduled for %s", name, n, last, latest)
                self._backlog[name] = n
                rerun = self._to_rerun(name, now)
                if rerun is not None and nxt is not None and nxt > now:
                    # no later fire time has passed (that one would run, coalesced): run this one again
                    log.warning("%s: the run scheduled for %s was %s (run %d) and is within the misfire "
                                "grace; running it again now", name, rerun[0], rerun[2], rerun[1])
                    self._rerun[name], nxt = (rerun[0], rerun[1]), rerun[0]
            self.scheduler.add_job(
                func, trigger, args=(self.cfg, self.store), id=job_id(name), name=name,
                replace_existing=True, coalesce=True, max_instances=1, misfire_grace_time=grace,
                next_run_time=nxt)
            added.append(job_id(name))
        if not added:
            log.warning("no job is scheduled: set schedule.ingest / check / digest / retry in the config")
        return added

    def next_run_times(self) -> dict[str, datetime | None]:
        return {j.name: j.next_run_time for j in self.scheduler.get_jobs()}

    def run_pending(self) -> list[JobOutcome]:
        """One synchronous pass of the scheduler loop at ``clock()``: every due job, coalesced, run (or
        recorded missed) in turn. For a daemon started with ``paused=True`` (tests, one-shot use)."""
        if self.state is not DaemonState.RUNNING:
            raise RuntimeError(f"run_pending needs a running daemon, not '{self.state.value}'")
        first = len(self.outcomes)
        now = self.clock()
        for job in self.scheduler.get_jobs():
            run_times = job._get_run_times(now)
            if not run_times:
                continue
            if job.coalesce:
                if len(run_times) > 1:
                    self._backlog[job.name] = len(run_times)
                run_times = run_times[-1:]
            for event in self._execute(job, run_times):
                self.scheduler._dispatch_event(event)
            nxt = job.trigger.get_next_fire_time(run_times[-1], now)
            if nxt is None:
                self.scheduler.remove_job(job.id)
            else:
                self.scheduler.modify_job(job.id, next_run_time=nxt)
        return self.outcomes[first:]

    # ---------------------------------------------------------------- one submission
    def _execute(self, job: Job, run_times: list[datetime]) -> list[JobExecutionEvent]:
        """Run (or declare missed) each fire time; APScheduler events for the listeners."""
        events = []
        for run_time in run_times:
            late = self.clock() - run_time
            if job.misfire_grace_time is not None and late > timedelta(seconds=job.misfire_grace_time):
                events.append(JobExecutionEvent(EVENT_JOB_MISSED, job.id, job._jobstore_alias, run_time))
                continue
            outcome = self.run_once(job.name, run_time)
            code = EVENT_JOB_EXECUTED if outcome.status == "ok" else EVENT_JOB_ERROR
            events.append(JobExecutionEvent(code, job.id, job._jobstore_alias, run_time, retval=outcome))
        return events

    def run_once(self, name: str, scheduled_for: datetime) -> JobOutcome:
        """Run job ``name`` for one fire time under the time limit, recording it in ``runs``.

        The job's own run of the same kind (``run_check``, ``run_ingest``, ``run_digest`` record one) is this
        row, adopted: one row per execution, with the status the job reached (``partial`` stays partial).
        """
        with self._lock:
            if self.state in (DaemonState.STOPPING, DaemonState.STOPPED):
                # stopping: nothing new starts, nothing is recorded; the next start resumes from this time
                return JobOutcome(name, scheduled_for, "not started", error="the daemon is stopping")
            self._starting += 1
        starting = [True]  # until the run is in _inflight (or never will be)
        try:
            return self._run_once(name, scheduled_for, starting)
        finally:
            with self._idle:
                self._started(starting)

    def _started(self, starting: list[bool]) -> None:
        """The run has left its start window (call with ``self._idle`` held)."""
        if starting[0]:
            starting[0] = False
            self._starting -= 1
            self._idle.notify_all()

    def _run_once(self, name: str, scheduled_for: datetime, starting: list[bool]) -> JobOutcome:
        self._record_pending()
        func = self.jobs[name]
        detail: dict[str, Any] = {"trigger": getattr(self.cfg.schedule, name, None)}
        coalesced = self._backlog.pop(name, 0)
        if coalesced > 1:
            detail["coalesced"] = coalesced
        rerun = self._rerun.pop(name, None)
        if rerun is not None and rerun[0] == scheduled_for:
            detail["rerun_of"] = rerun[1]
        try:
            run_id = self.store.start_run(name, job_id=job_id(name), scheduled_for=scheduled_for,
                                          detail=detail)
        except STORE_FAILURES as exc:
            self.store.dispose()  # the next run reconnects
            msg = f"cannot record the start of {name} in the store ({_short(exc)}); skipped, retried next time"
            log.error("%s", msg)
            out = JobOutcome(name, scheduled_for, "failed", error=msg)
            self._append(out)
            return out
        fl = _InFlight(name=name, run_id=run_id, scheduled_for=scheduled_for, started=_monotonic(),
                       detail=detail)

        def body() -> None:
            try:
                with self.store.adopting(run_id, name) as scope:
                    fl.scope = scope
                    fl.box["result"] = func(self.cfg, self.store)
            except BaseException as exc:  # noqa: BLE001 - every failure becomes an outcome
                fl.box["exc"] = exc
                fl.box["tb"] = traceback.format_exc()
            finally:
                fl.done.set()

        with self._idle:
            self._inflight[run_id] = fl
            self._started(starting)
        log.info("%s: run %d started (scheduled for %s)", name, run_id, scheduled_for)
        threading.Thread(target=body, name=f"drift-{name}-{run_id}-body", daemon=True).start()
        if fl.done.wait(self.job_timeout):
            return self._complete(fl)
        self._settle(fl, "timeout", error=(
            f"exceeded the job time limit of {self.job_timeout:g} s (schedule.job_timeout); abandoned so "
            "later runs can proceed"))
        return self._outcome_of(fl)

    def _complete(self, fl: _InFlight) -> JobOutcome:
        """Settle a run whose body has returned or raised."""
        exc = fl.box.get("exc")
        if exc is None:
            self._settle(fl, "ok", result=fl.box.get("result"))
        else:
            if isinstance(exc, STORE_FAILURES):
                self.store.dispose()  # a lost connection: the next run reconnects
            log.error("%s: run %d failed:\n%s", fl.name, fl.run_id, fl.box.get("tb", ""))
            self._settle(fl, "failed", error=f"{exc.__class__.__name__}: {_short(exc)}")
        return self._outcome_of(fl)

    def _settle(self, fl: _InFlight, status: str, *, error: str | None = None, result: Any = None) -> None:
        """Record the end of a run, once (the job thread and :meth:`stop` may both try; :meth:`stop` then
        waits for ``fl.recorded``).

        A job that recorded its own end (its adopted run, :attr:`_InFlight.scope`) gives the status and
        error when it returned: a check that could not check every model is ``partial``, not ``ok``.
        """
        with self._lock:
            if fl.settled:
                return
            fl.settled = True
        try:
            duration = _monotonic() - fl.started
            scope = fl.scope
            inner = scope.status if scope is not None and fl.done.is_set() else None
            if status == "ok" and inner is not None:
                status, error = inner, scope.error if scope is not None else None
            fl.box["status"], fl.box["error"], fl.box["duration"] = status, error, duration
            detail = {**fl.detail}
            if scope is not None and scope.adopted:
                detail = {**scope.start_detail, **(scope.detail or {}), **fl.detail}
            detail["duration_s"] = round(duration, 3)
            if result is not None and inner is None:
                detail["result"] = _summary(result)
            fl.box["end"] = {"status": status, "detail": detail, "error": error,
                             "as_of": scope.as_of if scope is not None else None}
            if not self._write_end(fl):
                with self._lock:
                    self._unrecorded.append(fl)
            level = logging.INFO if status == "ok" else logging.WARNING
            log.log(level, "%s: run %d %s in %.1f s%s", fl.name, fl.run_id, status, duration,
                    f": {error}" if error and status != "failed" else "")
            self._append(self._outcome_of(fl))
        finally:
            with self._lock:
                self._inflight.pop(fl.run_id, None)
            fl.recorded.set()

    def _write_end(self, fl: _InFlight) -> bool:
        end = fl.box["end"]
        try:
            self.store.finish_run(fl.run_id, end["status"], detail=end["detail"], error=end["error"],
                                  as_of=end["as_of"])
        except STORE_FAILURES as exc:
            self.store.dispose()
            log.error("%s: cannot record run %d as %s (%s); retried before the next run and at stop",
                      fl.name, fl.run_id, end["status"], _short(exc))
            return False
        return True

    def _record_pending(self) -> None:
        """Write the ends the store could not take earlier (a run left 'running' while we live is false)."""
        with self._lock:
            pending, self._unrecorded = self._unrecorded, []
        failed = [fl for fl in pending if not self._write_end(fl)]
        if failed:
            with self._lock:
                self._unrecorded[:0] = failed

    def _outcome_of(self, fl: _InFlight) -> JobOutcome:
        return JobOutcome(fl.name, fl.scheduled_for, fl.box.get("status", "running"), fl.run_id,
                          fl.box.get("error"), fl.box.get("duration"))

    def _append(self, outcome: JobOutcome) -> None:
        with self._lock:
            self.outcomes.append(outcome)
            del self.outcomes[:-1000]

    # ---------------------------------------------------------------- listeners and bookkeeping
    def _on_missed(self, event: JobExecutionEvent | JobSubmissionEvent) -> None:
        name = event.job_id.removeprefix("drift:")
        if isinstance(event, JobSubmissionEvent):  # max instances: previous run still going
            times = list(event.scheduled_run_times)
            why = "the previous run of this job was still going"
        else:
            times = [event.scheduled_run_time]
            late = self.clock() - event.scheduled_run_time
            why = (f"it could only start {late.total_seconds():.0f} s late, beyond the misfire grace of "
                   f"{self.misfire_grace.total_seconds():.0f} s (schedule.misfire_grace)")
        for t in times:
            detail: dict[str, Any] = {}
            coalesced = self._backlog.pop(name, 0)
            if coalesced > 1:
                detail["coalesced"] = coalesced
            err = f"run scheduled for {t.isoformat()} was missed: {why}"
            log.warning("%s: %s", name, err)
            run_id = None
            try:
                run_id = self.store.record_run(name, "missed", job_id=event.job_id, scheduled_for=t,
                                               detail=detail, error=err)
            except STORE_FAILURES as exc:
                self.store.dispose()
                log.error("%s: cannot record a missed run (%s)", name, _short(exc))
            self._append(JobOutcome(name, t, "missed", run_id, err))

    def _scheduled_rows(self, name: str) -> list[dict[str, Any]]:
        return [r for r in self.store.recent_runs(kind=name, limit=200)
                if r["job_id"] == job_id(name) and r["scheduled_for"] is not None]

    def _last_scheduled(self, name: str) -> datetime | None:
        return max((r["scheduled_for"] for r in self._scheduled_rows(name)), default=None)

    def _to_rerun(self, name: str, now: datetime) -> tuple[datetime, int, str] | None:
        """The newest fire time of job ``name`` when it was abandoned or missed, lies within the misfire
        grace, and was not run again already: (fire time, run id, status); else None."""
        rows = self._scheduled_rows(name)
        if not rows:
            return None
        last = max(rows, key=lambda r: (r["scheduled_for"], r["id"]))
        fire = last["scheduled_for"]
        if last["status"] not in RERUN_STATUSES or now - fire > self.misfire_grace:
            return None
        if sum(1 for r in rows if r["scheduled_for"] == fire) > 1:  # a re-run already happened: once only
            return None
        return fire, int(last["id"]), str(last["status"])

    def _close_orphans(self) -> None:
        """Runs left ``running`` by a daemon that died: nobody else can be running them (we hold the lock);
        then any other run whose process is gone (:meth:`drift.store.Store.close_stale_runs`)."""
        now = utcnow()
        for name in JOB_NAMES:
            for r in self.store.recent_runs(kind=name, limit=200):
                if r["status"] == "running" and r["job_id"] == job_id(name):
                    why = self.store.run_stale_reason(r, now=now) or (
                        f"the daemon that ran it (pid {r.get('pid')} on {r.get('host')}) no longer holds the store")
                    last = r.get("heartbeat_at") or r["started_at"]
                    self.store.finish_run(int(r["id"]), "abandoned", error=(
                        f"abandoned: {why}; last sign of life {last:%Y-%m-%d %H:%M:%S} UTC; found when the "
                        "next daemon started"))
                    log.warning("%s: run %s was left running by a previous daemon (%s); recorded abandoned",
                                name, r["id"], why)
        self.store.close_stale_runs(note="found when the daemon started")


def _monotonic() -> float:
    import time

    return time.monotonic()


def _short(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0][:500] if text else exc.__class__.__name__


def _summary(result: Any) -> Any:
    """A small JSON-able picture of a job's return value for ``runs.detail``."""
    if isinstance(result, (int, float, str, bool)):
        return result
    if isinstance(result, dict):
        return {str(k): (v if isinstance(v, (int, float, str, bool, type(None))) else str(v)[:200])
                for k, v in list(result.items())[:50]}
    if isinstance(result, (list, tuple)):
        return f"{len(result)} items"
    return str(result)[:500]


# ------------------------------------------------------------------------------------------ process level
def redact_url(url: str) -> str:
    """The store URL with its password hidden (for logs)."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - an unparsable URL is never printed
        return "<store url>"


def setup_logging(log_file: str | Path | None = None, level: int = logging.INFO) -> list[logging.Handler]:
    """Log ``drift`` (and APScheduler's warnings) to stderr and optionally to a rotating file.

    Returns the handlers added, so the caller can remove them.
    """
    fmt = logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s")
    handlers: list[logging.Handler] = [logging.StreamHandler(sys.stderr)]
    if log_file is not None:
        path = Path(log_file)
        path.parent.mkdir(parents=True, exist_ok=True)
        handlers.append(logging.handlers.RotatingFileHandler(path, maxBytes=LOG_MAX_BYTES,
                                                             backupCount=LOG_BACKUPS, encoding="utf-8"))
    for h in handlers:
        h.setFormatter(fmt)
    for name, lvl in (("drift", level), ("apscheduler", logging.WARNING)):
        lg = logging.getLogger(name)
        lg.setLevel(lvl)
        lg.propagate = False  # these handlers replace the root's: one line per record
        for h in handlers:
            lg.addHandler(h)
    return handlers


def _remove_logging(handlers: list[logging.Handler]) -> None:
    for name in ("drift", "apscheduler"):
        for h in handlers:
            logging.getLogger(name).removeHandler(h)
        logging.getLogger(name).propagate = True
    for h in handlers:
        h.close()


def run_daemon(cfg: Config, *, jobs: Mapping[str, JobFunc] | None = None,
               clock: Callable[[], datetime] | None = None, log_file: str | Path | None = None,
               stop_event: threading.Event | None = None, stop_grace: float = STOP_GRACE_SECONDS,
               lock_heartbeat: float = HEARTBEAT_SECONDS,
               lock_stale_after: float = STALE_AFTER_SECONDS, log_level: int | None = None) -> int:
    """Run the daemon until SIGTERM/SIGINT (main thread only) or ``stop_event``; return the exit code.

    Returns
    -------
    int
        :data:`EXIT_OK` (0) after a clean stop, :data:`EXIT_LOCKED` (3) when another daemon holds the store
        or took the lock over, :data:`EXIT_ERROR` (1) when the store cannot be used or startup failed.
    """
    handlers = setup_logging(log_file, level=log_level) if log_level is not None else setup_logging(log_file)
    stop = stop_event if stop_event is not None else threading.Event()
    restore = _install_signal_handlers(stop, stop_grace)
    try:
        log.info("drift daemon starting: pid %d on %s, store %s", os.getpid(), socket.gethostname(),
                 redact_url(cfg.store_url()))
        try:
            store = open_store(cfg.store_url())
        except StoreError as exc:
            log.error("%s", exc)
            return EXIT_ERROR
        try:
            lock = StoreLock(store, heartbeat=lock_heartbeat, stale_after=lock_stale_after, on_lost=stop.set)
            with lock:
                daemon = Daemon(cfg, store, jobs=jobs, clock=clock, stop_grace=stop_grace)
                try:
                    daemon.start()
                    while not stop.wait(_IDLE_POLL_SECONDS):
                        pass
                finally:
                    daemon.stop()
                if lock.lost.is_set():
                    return EXIT_LOCKED
        except LockError as exc:
            log.error("%s", exc)
            return EXIT_LOCKED
        except Exception:
            log.exception("the daemon failed")
            return EXIT_ERROR
        finally:
            store.dispose()
        log.info("drift daemon stopped")
        return EXIT_OK
    finally:
        restore()
        _remove_logging(handlers)


def _install_signal_handlers(stop: threading.Event, grace: float) -> Callable[[], None]:
    """SIGTERM and SIGINT set ``stop``; returns a function restoring the previous handlers."""
    if threading.current_thread() is not threading.main_thread():
        return lambda: None

    def handler(signum: int, _frame: FrameType | None) -> None:
        name = signal.Signals(signum).name
        if stop.is_set():
            log.info("%s received again; already stopping", name)
        else:
            log.info("%s received; stopping after the running job (at most %.0f s)", name, grace)
        stop.set()

    previous = {s: signal.signal(s, handler) for s in (signal.SIGTERM, signal.SIGINT)}

    def restore() -> None:
        for s, h in previous.items():
            signal.signal(s, h)

    return restore
