"""``drift status``: what the daemon did, what it will do next, and what is waiting on an operator.

:func:`collect_status` gathers a plain dict (JSON-able apart from datetimes); :func:`format_status` renders
it for a terminal. Both only read the store.
"""

from __future__ import annotations

import json
from datetime import date, datetime
from typing import Any

import sqlalchemy as sa

from drift.config import Config
from drift.lock import STALE_AFTER_SECONDS, is_stale, read_lock
from drift.store import Store, alert_snoozes, alerts, outbox, utcnow
from drift.verdicts import label

#: outbox statuses that need an operator's look (a send that may or may not have arrived; given up)
_OPERATOR_STATUSES = ("uncertain", "dead")


def collect_status(cfg: Config, store: Store, *, now: datetime | None = None) -> dict[str, Any]:
    """The state of the store's daemon, jobs, outbox, feeds and alerts.

    Parameters
    ----------
    cfg : the configuration (schedule and its time zone).
    store : the store to read.
    now : aware time the next runs are computed from; default now.

    Returns
    -------
    dict with keys

    - ``now``, ``timezone`` (the schedule's zone name)
    - ``jobs``: name -> {``schedule`` (text or None), ``last_run`` (started_at), ``finished_at``,
      ``outcome`` (runs.status), ``duration`` (seconds), ``error``, ``next_run`` (aware, in the schedule zone),
      ``pid``, ``host``, ``heartbeat_at`` (the process that ran it and its last heartbeat)} for ingest, check,
      digest, retry; the check's also ``failed_models`` (how many models its last run could not check, None
      when unknown). A last run still recorded ``running`` whose process is gone (dead on this host, or
      silent past :data:`~drift.store.RUN_STALE_AFTER_SECONDS` elsewhere) is shown ``abandoned`` with the
      reason: status only reads, the next run records it.
    - ``outbox``: {``pending`` (count), ``oldest_pending`` (created_at), ``last_error`` (newest error of a
      pending row), ``counts`` (per status), ``uncertain`` and ``dead`` (rows: id, channel, subject,
      attempts, last_error, created_at)}
    - ``stale_feeds``: [{``model``, ``driver``, plus the driver's own fields}] from the latest verdicts'
      drivers marked ``late: true``, then each late target feed (from its ``data-late`` action: ``series``,
      ``last_period``, ``next_due``, ``role: "target"``; ``driver`` is its series name too)
    - ``open_alerts``: model -> [{``condition``, ``action``, ``severity``, ``first_seen``, ``last_seen``}]
    - ``lock``: None, or the daemon lock row with ``stale`` (a reason or None)
    - ``epochs``: model -> its newest monitoring epoch (:meth:`drift.epochs.Epoch.as_json`), for every
      configured model (epoch 1, ``configured``, for those without a decision)

    An open alert the team snoozed carries ``snoozed_until`` and ``snoozed_by``.
    """
    from drift.scheduler import JOB_NAMES, build_trigger, job_id, schedule_timezone

    now = now or utcnow()
    tz = schedule_timezone(cfg)
    jobs: dict[str, Any] = {}
    for name in JOB_NAMES:
        text = getattr(cfg.schedule, name)
        runs = store.recent_runs(kind=name, limit=200)
        last = runs[0] if runs else None
        daemon_last = max((r["scheduled_for"] for r in runs
                           if r["job_id"] == job_id(name) and r["scheduled_for"] is not None), default=None)
        nxt = None
        if text is not None:
            trigger = build_trigger(text, tz, start=daemon_last or now)
            nxt = trigger.get_next_fire_time(None, now)
            nxt = nxt.astimezone(tz) if nxt is not None else None
        duration = None
        if last is not None and last["finished_at"] is not None:
            duration = (last["finished_at"] - last["started_at"]).total_seconds()
        outcome, error = (last["status"], last["error"]) if last else (None, None)
        if outcome == "running":
            assert last is not None
            why = store.run_stale_reason(last)  # against the real clock: liveness is now, whatever `now` says
            if why is not None:
                seen = last.get("heartbeat_at") or last["started_at"]
                outcome, error = "abandoned", (f"abandoned: {why}; last sign of life {seen:%Y-%m-%d %H:%M:%S} "
                                               "UTC (not yet recorded: the next run records it)")
        jobs[name] = {
            "schedule": text,
            "last_run": last["started_at"] if last else None,
            "finished_at": last["finished_at"] if last else None,
            "outcome": outcome,
            "duration": duration,
            "error": error,
            "next_run": nxt,
            "pid": last.get("pid") if last else None,
            "host": last.get("host") if last else None,
            "heartbeat_at": last.get("heartbeat_at") if last else None,
        }
        if name == "check":
            jobs[name]["failed_models"] = _failed_models(last)
    lock = read_lock(store, "daemon")
    if lock is not None:
        lock["stale"] = is_stale(lock, now=now, stale_after=STALE_AFTER_SECONDS)
    return {
        "now": now,
        "timezone": str(tz),
        "jobs": jobs,
        "outbox": _outbox(store),
        "stale_feeds": _stale_feeds(store),
        "open_alerts": _open_alerts(store),
        "lock": lock,
        "epochs": _epochs(cfg, store),
    }


def _epochs(cfg: Config, store: Store) -> dict[str, Any]:
    """Each configured model's newest epoch (a decision recorded for a later check date counts too)."""
    from drift.epochs import current

    eps = current(store, list(cfg.models), date.max)
    return {m.name: eps[m.name].as_json(m) for m in cfg.models}


def _failed_models(run: dict[str, Any] | None) -> int | None:
    """How many models a check run could not check (its detail's ``failed``); None when not recorded."""
    if run is None or not run.get("detail"):
        return None
    try:
        n = json.loads(run["detail"]).get("failed")
    except (ValueError, AttributeError):
        return None
    return int(n) if isinstance(n, int) else None


def _outbox(store: Store) -> dict[str, Any]:
    o = outbox
    with store.connect() as conn:
        counts = {str(s): int(n) for s, n in
                  conn.execute(sa.select(o.c.status, sa.func.count()).group_by(o.c.status))}
        oldest = conn.execute(sa.select(o.c.created_at).where(o.c.status == "pending")
                              .order_by(o.c.created_at, o.c.id).limit(1)).scalar()
        last_error = conn.execute(sa.select(o.c.last_error).where(o.c.status == "pending",
                                                                  o.c.last_error.is_not(None))
                                  .order_by(o.c.id.desc()).limit(1)).scalar()
        rows = conn.execute(sa.select(o.c.id, o.c.channel, o.c.subject, o.c.status, o.c.attempts,
                                      o.c.last_error, o.c.created_at)
                            .where(o.c.status.in_(_OPERATOR_STATUSES)).order_by(o.c.id)).fetchall()
    out: dict[str, Any] = {"pending": counts.get("pending", 0), "oldest_pending": oldest,
                           "last_error": last_error, "counts": counts}
    for st in _OPERATOR_STATUSES:
        out[st] = [dict(r._mapping) for r in rows if r.status == st]
    return out


def _stale_feeds(store: Store) -> list[dict[str, Any]]:
    """Every late feed of the newest verdicts (:func:`drift.delivery.present.late_feeds`), with its model."""
    from drift.delivery.present import late_feeds

    return [{**f, "model": v["model"]} for v in store.latest_verdicts(charts=False)  # the charts are not read
            for f in late_feeds(v["payload"])]


def _open_alerts(store: Store) -> dict[str, list[dict[str, Any]]]:
    a = alerts
    with store.connect() as conn:
        rows = conn.execute(sa.select(a.c.model, a.c.condition, a.c.action, a.c.severity, a.c.first_seen,
                                      a.c.last_seen).where(a.c.status == "open")
                            .order_by(a.c.model, a.c.severity.desc(), a.c.id)).fetchall()
        snoozed = {(str(r.model), str(r.condition)): r for r in conn.execute(
            sa.select(alert_snoozes).where(alert_snoozes.c.ended_at.is_(None)).order_by(alert_snoozes.c.id))}
    out: dict[str, list[dict[str, Any]]] = {}
    for r in rows:
        d = dict(r._mapping)
        sn = snoozed.get((str(d["model"]), str(d["condition"])))
        if sn is not None:
            d["snoozed_until"], d["snoozed_by"] = sn.until, sn.decided_by
        out.setdefault(d.pop("model"), []).append(d)
    return out


# ------------------------------------------------------------------------------------------ rendering
def _t(x: datetime | None) -> str:
    return "-" if x is None else x.strftime("%Y-%m-%d %H:%M %Z").strip()


def _outbox_lines(ob: dict[str, Any]) -> list[str]:
    """The outbox section: counts, the pending backlog, and every row waiting on an operator."""
    counts = ob.get("counts") or {}
    n_unc = len(ob["uncertain"])
    head = f"outbox: {ob['pending']} pending" + (f" (oldest {_t(ob['oldest_pending'])})" if ob["oldest_pending"]
                                                  else "")
    head += f", {n_unc} uncertain, {counts.get('sent', 0)} sent"
    in_flight = counts.get("sending", 0) + counts.get("delivering", 0)
    if in_flight:
        head += f", {in_flight} being sent"
    if ob["dead"]:
        head += f", {len(ob['dead'])} given up"
    lines = [head]
    if ob["last_error"]:
        lines.append(f"  last error: {ob['last_error'][:200]}")
    if n_unc:
        lines.append(f"  {n_unc} notice{'s' if n_unc != 1 else ''} may have been delivered or not (the connection "
                     "failed after the message went out): never re-sent automatically; ask the recipients, then "
                     "`drift deliver --resend ID` or `--accept ID`")
    if ob["dead"]:
        n_dead = len(ob["dead"])
        lines.append(f"  {n_dead} notice{'s' if n_dead != 1 else ''} given up: fix the cause, then `drift deliver "
                     "--resend ID`, or `--dismiss ID` once handled another way")
    for st in _OPERATOR_STATUSES:
        for r in ob[st]:
            lines.append(f"  {st}: #{r['id']} via {r['channel']}: {r['subject']} ({r['attempts']} attempts)"
                         + (f": {r['last_error'][:120]}" if r["last_error"] else ""))
    return lines


def format_status(status: dict[str, Any]) -> str:
    """Plain-text rendering of :func:`collect_status` for a terminal."""
    lines = []
    lock = status.get("lock")
    if lock is None:
        lines.append("daemon: not running (no lock held on this store)")
    else:
        state = f"STALE ({lock['stale']})" if lock.get("stale") else "running"
        lines.append(f"daemon: {state}, pid {lock['pid']} on {lock['host']} since {_t(lock['acquired_at'])}, "
                     f"last heartbeat {_t(lock['heartbeat_at'])}")
    lines.append("")
    lines.append(f"jobs (schedule time zone {status.get('timezone')}):")
    header = f"  {'job':<8} {'schedule':<16} {'last run':<22} {'outcome':<10} {'took':>8}  next run"
    lines.append(header)
    for name, j in status["jobs"].items():
        took = "-" if j["duration"] is None else f"{j['duration']:.1f}s"
        lines.append(f"  {name:<8} {(j['schedule'] or 'off'):<16} {_t(j['last_run']):<22} "
                     f"{(j['outcome'] or '-'):<10} {took:>8}  {_t(j['next_run'])}")
        if j["outcome"] == "running":
            lines.append(f"           pid {j['pid']} on {j['host']}, last heartbeat {_t(j['heartbeat_at'])}")
        elif j["outcome"] not in (None, "ok") and j["error"]:
            lines.append(f"           {j['error'][:200]}")
        elif j.get("failed_models"):
            lines.append(f"           {j['failed_models']} model(s) could not be checked")
    lines.append("")
    lines += _outbox_lines(status["outbox"])
    feeds = status["stale_feeds"]
    lines.append("")
    lines.append(f"late feeds: {len(feeds)}" if feeds else "late feeds: none")
    for f in feeds:
        role = " (target)" if f.get("role") == "target" else ""
        lines.append(f"  {f['model']}: {f['driver']}{role}: last period {f.get('last_period') or '?'}, "
                     f"next value was due {str(f.get('next_due') or '?').replace('T', ' ')[:16]} UTC")
    al = status["open_alerts"]
    lines.append("")
    lines.append(f"open alerts: {sum(len(v) for v in al.values())}" if al else "open alerts: none")
    for model, items in al.items():
        for a in items:
            lines.append(f"  {model}: {label(a['action'])} ({a['condition']}), since {_t(a['first_seen'])}"
                         + (f"; snoozed until {a['snoozed_until']} by {a['snoozed_by']}" if a.get("snoozed_until")
                            else ""))
    eps = [e for e in (status.get("epochs") or {}).items() if e[1].get("number", 1) > 1]
    if eps:
        lines.append("")
        lines.append(f"models in a later epoch: {len(eps)} (the others as configured)")
        for model, e in eps:
            lines.append(f"  {model}: epoch {e['number']}, {e['action']} since {e['since']} by {e['decided_by']}; "
                         f"reference {e['reference']['start']} to {e['reference']['end']}")
    return "\n".join(lines)
