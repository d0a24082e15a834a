"""Alert state: which conditions are open per model, when they got worse, when they cleared.

A check run produces, per model, a list of actions (see the check payload). Each action is reduced to a
*condition key*::

    refit                      the relationship moved: refit
    drop-driver:<series>       a driver no longer earns its place
    relag:<series>             a driver fits better at another lag
    data-late:<series>         a driver's feed is late
    watch                      something is drifting, not yet enough to act

and the ``alerts`` table keeps one *open* row per (model, condition). :func:`process_alerts` compares a
run's conditions with the open rows of the models in that run, and only those models:

============================  =========================================================================
this run vs the open row      what happens
============================  =========================================================================
new condition                 open a row; enqueue one notice per channel (if severity >= min_action)
same, or lower, or no worse   update ``last_seen`` / ``as_of`` / latest numbers; no notice
worse (rule below)            update the row to the new state; enqueue one notice per channel again
absent from this run          ``status = cleared``, ``cleared_at = now``; a "cleared" notice only when
                              ``alerts.notify_cleared`` is true *and* the alert had been sent
============================  =========================================================================

"Worse" (the whole rule, compared with the state last recorded as worse-or-new)
    1. the severity rose (watch -> act); or
    2. at the same or higher severity, a ``relag`` now names a *different* lag; or
    3. at the same or higher severity, a ``refit`` dates the change *earlier* (``since`` moved back).
    Anything else (fewer alarms, act -> watch, a data-late feed whose last period moved on but is still
    late) is "not worse": the alert stays open and visible, and nothing is re-sent.

``alerts.min_action`` gates messages, not state: with ``act`` (the default) a watch-severity alert is
opened and shown by :func:`open_alerts` but not sent; when it later becomes act it counts as worse and is
sent then (as a first notice). A model whose payload has no ``actions`` list (its check did not run) is
left untouched. Everything runs in one transaction per model, so an alert row and its outbox rows appear
together or not at all. Iteration order is by model name and condition key: same input, same rows.

After a decision (see :mod:`drift.epochs`)
    ``drift accept`` closes the model's open alerts with ``status = acted`` (``cleared_at`` is when, the
    state's ``acted_on`` says which epoch, who and why): they are history, not open. A check whose payload
    belongs to an earlier epoch than the model's newest (an ``--as-of`` before the decision, replayed)
    records its verdict but leaves the alerts alone.

Snoozed (``drift snooze``, the ``alert_snoozes`` table)
    An open alert the team has seen and chosen to wait on is not sent again before the snooze's ``until``
    day (compared with the check's as-of date): if its condition clears and comes back meanwhile, the
    reopened alert is recorded but not sent. It comes back at once if it gets worse than it was when
    snoozed (the "worse" rule above; the snooze ends, reason ``worse``). At the first check on or after
    ``until`` the snooze ends (reason ``expired``) and an alert still open is sent again, once, as a
    reminder (a new notice of the same alert).
"""

from __future__ import annotations

import json
import logging
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from dataclasses import replace as dataclasses_replace
from datetime import date, datetime
from typing import Any, Literal

import sqlalchemy as sa

from drift.config import Config
from drift.delivery import outbox as _outbox
from drift.exceptions import DecisionError
from drift.jsontext import JSONText, json_default
from drift.store import Store, alert_snoozes, alerts, model_epochs, utcnow

log = logging.getLogger(__name__)

#: stored severity ranks (the ``alerts.severity`` column)
SEVERITY_RANK: dict[str, int] = {"watch": 1, "act": 2}
_RANK_NAME = {v: k for k, v in SEVERITY_RANK.items()}
#: actions whose condition key carries the driver
_PER_DRIVER = ("drop-driver", "relag", "data-late")
#: payload keys copied into each notice as context for the message (charts only go to e-mail)
CONTEXT_KEYS = ("target", "unit", "frequency", "verdict", "reference", "monitor_start", "alarms", "tests",
                "drivers", "accuracy")
#: version of the JSON kept in ``alerts.payload``
_STATE_VERSION = 1
#: models whose alerts one transaction of :func:`process_alerts` updates (SQL ``IN`` lists stay short, and a
#: SQLite writer waits at most one batch for the lock)
ALERT_BATCH = 400

Event = Literal["opened", "worse", "unchanged", "cleared"]


@dataclass(frozen=True)
class AlertEvent:
    """What :func:`process_alerts` did with one condition of one model.

    Attributes
    ----------
    alert_id : the ``alerts`` row.
    model, condition, action : e.g. ``"k000"``, ``"relag:k000_promo"``, ``"relag"``.
    severity : ``"act"`` or ``"watch"`` (this run's, or the last one for a cleared alert).
    event : ``opened`` | ``worse`` | ``unchanged`` | ``cleared``.
    as_of : the check's as-of date.
    notified : whether notices were enqueued for it in this run.
    keys : idempotency keys of the enqueued outbox rows (empty when not notified).
    """

    alert_id: int
    model: str
    condition: str
    action: str
    severity: str
    event: Event
    as_of: date | None
    notified: bool
    keys: tuple[str, ...] = ()


@dataclass(frozen=True)
class AlertRecord:
    """One row of the ``alerts`` table, decoded (for status and digest)."""

    id: int
    model: str
    condition: str
    action: str
    severity: str
    status: str
    first_seen: datetime
    last_seen: datetime
    cleared_at: datetime | None
    as_of: date | None
    reason: str | None
    detail: dict[str, Any]
    notified: bool
    snoozed_until: date | None = None
    snoozed_by: str | None = None


# --------------------------------------------------------------------------------------------- helpers


def condition_key(action: Mapping[str, Any]) -> str:
    """``"refit"``, ``"drop-driver:k000_temp"``, ... (driver-specific actions carry the series)."""
    name = str(action.get("action") or "watch")
    driver = action.get("driver")
    if name in _PER_DRIVER and driver:
        return f"{name}:{driver}"
    return name


def severity_of(action: Mapping[str, Any]) -> str:
    """The action's severity; a missing/unknown one counts as ``act``, except for ``watch`` itself."""
    sev = action.get("severity")
    if sev in SEVERITY_RANK:
        return str(sev)
    return "watch" if action.get("action") == "watch" else "act"


def is_worse(previous: Mapping[str, Any], prev_rank: int, current: Mapping[str, Any], cur_rank: int) -> bool:
    """The "worse" rule of the module docstring."""
    if cur_rank > prev_rank:
        return True
    if cur_rank < prev_rank:
        return False
    name = current.get("action")
    if name == "relag":
        lag, old = current.get("lag"), previous.get("lag")
        return lag is not None and old is not None and lag != old
    if name == "refit":
        since, old = _as_date(current.get("since")), _as_date(previous.get("since"))
        return since is not None and old is not None and since < old
    return False


def _as_date(value: Any) -> date | None:
    if isinstance(value, datetime):
        return value.date()
    if isinstance(value, date):
        return value
    if isinstance(value, str):
        try:
            return date.fromisoformat(value[:10])
        except ValueError:
            return None
    return None


def _current_conditions(actions: Iterable[Any]) -> dict[str, dict[str, Any]]:
    """Condition key -> action dict; of two actions with one key, the more severe (then the first) wins."""
    out: dict[str, dict[str, Any]] = {}
    for a in actions:
        if not isinstance(a, Mapping) or not a.get("action"):
            continue
        key = condition_key(a)
        if key not in out or SEVERITY_RANK[severity_of(a)] > SEVERITY_RANK[severity_of(out[key])]:
            out[key] = dict(a)
    return out


def _jsonable(obj: Any) -> Any:
    return json.loads(json.dumps(obj, default=json_default))


def _dict(value: Any) -> dict[str, Any]:
    return dict(value) if isinstance(value, Mapping) else {}


def _state(row: Any) -> dict[str, Any]:
    try:
        st = json.loads(row.payload) if row.payload else {}
    except ValueError:
        st = {}
    return st if isinstance(st, dict) else {}


def _notice(payload: Mapping[str, Any], *, event: str, alert_id: int, condition: str, action: Mapping[str, Any],
            severity: str, as_of: date | None, run_id: Any, previous: Mapping[str, Any] | None) -> dict[str, Any]:
    notice = _jsonable({
        "version": 1, "event": event, "alert_id": alert_id, "model": payload.get("name"),
        "condition": condition, "action": action.get("action"), "severity": severity,
        "as_of": as_of.isoformat() if as_of else None, "run_id": run_id,
        "detail": dict(action), "previous": dict(previous) if previous else None,
        "context": {k: payload.get(k) for k in CONTEXT_KEYS if payload.get(k) is not None},
    })
    notice["charts"] = _charts_copy(payload.get("charts"))
    return notice


def _charts_copy(charts: Any) -> dict[str, Any] | None:
    """The notice's own copy of a payload's chart data, as JSON values: a block the check kept as its JSON
    text (:class:`drift.jsontext.JSONText`) decoded afresh (the payload goes on holding only its text), a
    plain mapping through the same JSON round trip as the rest of the notice; None when there is none."""
    if isinstance(charts, JSONText):
        return charts.decoded()
    if isinstance(charts, Mapping):
        return _jsonable(charts)  # type: ignore[no-any-return]
    return None


# --------------------------------------------------------------------------------------------- main


def process_alerts(cfg: Config, store: Store, outcome: Any, *, now: datetime | None = None) -> list[AlertEvent]:
    """Update alert state from one check run and enqueue the notices it calls for.

    Parameters
    ----------
    cfg : the configuration (``alerts.channels``, ``alerts.min_action``, optional ``alerts.notify_cleared``).
    store : the store holding the ``alerts`` and ``outbox`` tables.
    outcome : a check outcome: ``.models`` (payload dicts), ``.run_id``, ``.as_of``.
    now : the time to record (tz-aware); defaults to the current UTC time.

    Returns
    -------
    list of AlertEvent
        one per condition touched, in model then condition order.

    Notes
    -----
    Only models present in ``outcome.models`` are touched. The rules (new, unchanged, worse, cleared)
    are in the module docstring. Nothing is delivered here: see :func:`drift.delivery.outbox.deliver_pending`.
    """
    now = now or utcnow()
    if now.tzinfo is None:
        raise ValueError("now must be a tz-aware datetime")
    run_id = getattr(outcome, "run_id", None)
    default_as_of = _as_date(getattr(outcome, "as_of", None))
    models: dict[str, Mapping[str, Any]] = {}
    for p in getattr(outcome, "models", None) or []:
        if isinstance(p, Mapping) and p.get("name"):
            models[str(p["name"])] = p
    channels = _outbox.configured_channels(cfg)
    min_rank = SEVERITY_RANK[cfg.alerts.min_action]
    notify_cleared = cfg.alerts.notify_cleared

    events: list[AlertEvent] = []
    # read once for the run: the newest epoch of each model, and which models have a snooze running
    with store.connect() as conn:
        newest_epoch = {str(mo): int(n) for mo, n in conn.execute(
            sa.select(model_epochs.c.model, sa.func.max(model_epochs.c.epoch)).group_by(model_epochs.c.model))}
        snoozing = {str(mo) for (mo,) in conn.execute(
            sa.select(alert_snoozes.c.model).where(alert_snoozes.c.ended_at.is_(None)).distinct())}
    # models whose payload can change their alerts, in the order they are processed
    todo: list[tuple[str, Mapping[str, Any], date | None, dict[str, dict[str, Any]]]] = []
    for name in sorted(models):
        payload = models[name]
        actions = payload.get("actions")
        if not isinstance(actions, list):
            log.info("model %s: no actions list in its payload; its alerts are left as they are", name)
            continue
        as_of = _as_date(payload.get("as_of")) or default_as_of
        if _older_epoch(newest_epoch.get(name), payload):
            log.info("model %s: the check as of %s belongs to an earlier epoch; its alerts are left as they are",
                     name, as_of)
            continue
        todo.append((name, payload, as_of, _current_conditions(actions)))
    # a few hundred models per transaction: each transaction reads its models' open alerts and snoozes in
    # one query each (they cannot change before its commit) and writes what the run calls for; a model with
    # no condition and no open alert costs nothing more
    for start in range(0, len(todo), ALERT_BATCH):
        part = todo[start:start + ALERT_BATCH]
        names = [t[0] for t in part]
        with store.begin() as conn:
            open_by_model: dict[str, dict[str, Any]] = {}
            for r in conn.execute(sa.select(alerts).where(alerts.c.model.in_(names), alerts.c.status == "open")
                                  .order_by(alerts.c.id)):
                open_by_model.setdefault(r.model, {})[r.condition] = r  # the newest row wins if ever duplicated
            snoozed = [n for n in names if n in snoozing]
            snooze_by_model: dict[str, dict[str, Any]] = {}
            if snoozed:
                for r in conn.execute(sa.select(alert_snoozes).where(alert_snoozes.c.model.in_(snoozed),
                                                                     alert_snoozes.c.ended_at.is_(None))
                                      .order_by(alert_snoozes.c.id)):
                    snooze_by_model.setdefault(r.model, {})[r.condition] = r
            for name, payload, as_of, current in part:
                events.extend(_model_alerts(conn, cfg, channels, payload, current, open_by_model.get(name, {}),
                                            snooze_by_model.get(name, {}), as_of=as_of, run_id=run_id, now=now,
                                            min_rank=min_rank, notify_cleared=notify_cleared))
    return events


def _model_alerts(conn: Any, cfg: Config, channels: Sequence[tuple[str, Any]], payload: Mapping[str, Any],
                  current: dict[str, dict[str, Any]], open_rows: dict[str, Any], snoozes: dict[str, Any], *,
                  as_of: date | None, run_id: Any, now: datetime, min_rank: int,
                  notify_cleared: bool) -> list[AlertEvent]:
    """One model's alert events inside the run's transaction (its open alerts and snoozes read by the caller)."""
    events: list[AlertEvent] = []
    snoozes = dict(snoozes)
    for cond in sorted(set(snoozes) - set(current)):
        if as_of is not None and as_of >= snoozes[cond].until:
            _end_snooze(conn, snoozes.pop(cond), "expired", now)
    for cond in sorted(current):
        sn = snoozes.get(cond)
        row = open_rows.get(cond)
        if sn is None:
            events.append(_apply(conn, cfg, channels, payload, cond, current[cond], row, as_of=as_of,
                                 run_id=run_id, now=now, min_rank=min_rank))
            continue
        events.append(_apply_snoozed(conn, cfg, channels, payload, cond, current[cond], row, sn,
                                     as_of=as_of, run_id=run_id, now=now, min_rank=min_rank))
    for cond in sorted(set(open_rows) - set(current)):
        events.append(_clear(conn, cfg, channels, payload, open_rows[cond], as_of=as_of, run_id=run_id,
                             now=now, notify=notify_cleared))
    return events


def _older_epoch(newest: int | None, payload: Mapping[str, Any]) -> bool:
    """Whether the payload's epoch is older than the model's newest recorded one (a replayed check)."""
    ep = payload.get("epoch")
    number = ep.get("number") if isinstance(ep, Mapping) else None
    return isinstance(number, int) and newest is not None and number < newest


def _end_snooze(conn: Any, row: Any, reason: str, now: datetime) -> None:
    conn.execute(alert_snoozes.update().where(alert_snoozes.c.id == row.id)
                 .values(ended_at=now, ended_reason=reason))


def _apply_snoozed(conn: Any, cfg: Config, channels: Sequence[tuple[str, Any]], payload: Mapping[str, Any],
                   cond: str, action: dict[str, Any], row: Any, snooze: Any, *, as_of: date | None, run_id: Any,
                   now: datetime, min_rank: int) -> AlertEvent:
    """:func:`_apply` for a condition under a snooze (the rules in the module docstring)."""
    if as_of is not None and as_of >= snooze.until:
        _end_snooze(conn, snooze, "expired", now)
        ev = _apply(conn, cfg, channels, payload, cond, action, row, as_of=as_of, run_id=run_id, now=now,
                    min_rank=min_rank)
        if ev.event == "unchanged" and SEVERITY_RANK[ev.severity] >= min_rank and channels:
            return _remind(conn, cfg, channels, payload, cond, action, ev, as_of=as_of, run_id=run_id, now=now)
        return ev
    try:
        baseline = json.loads(snooze.baseline)
    except ValueError:
        baseline = {}
    base = _dict(baseline)
    worse = is_worse(base, SEVERITY_RANK[severity_of(base)] if base else 0, action, SEVERITY_RANK[severity_of(action)])
    if row is not None:
        ev = _apply(conn, cfg, channels, payload, cond, action, row, as_of=as_of, run_id=run_id, now=now,
                    min_rank=min_rank)
        if ev.event == "worse":
            _end_snooze(conn, snooze, "worse", now)
        return ev
    if worse:  # back during the snooze, and worse than when it was snoozed: it comes back
        _end_snooze(conn, snooze, "worse", now)
        return _apply(conn, cfg, channels, payload, cond, action, None, as_of=as_of, run_id=run_id, now=now,
                      min_rank=min_rank)
    # back during the snooze, no worse: recorded, not sent (the reminder at the end of the snooze sends it)
    return _apply(conn, cfg, channels, payload, cond, action, None, as_of=as_of, run_id=run_id, now=now,
                  min_rank=max(SEVERITY_RANK.values()) + 1)


def _remind(conn: Any, cfg: Config, channels: Sequence[tuple[str, Any]], payload: Mapping[str, Any], cond: str,
            action: dict[str, Any], ev: AlertEvent, *, as_of: date | None, run_id: Any, now: datetime) -> AlertEvent:
    """Send an open alert again once its snooze is over (a new notice of the same alert)."""
    row = conn.execute(sa.select(alerts).where(alerts.c.id == ev.alert_id)).first()
    state = _state(row)
    was_sent = bool(state.get("sent"))
    seq = int(state.get("notices") or 0) + 1
    notice = _notice(payload, event="opened", alert_id=ev.alert_id, condition=cond, action=action,
                     severity=ev.severity, as_of=as_of, run_id=run_id, previous=None)
    notice["reminder"] = True
    keys = _enqueue(conn, cfg, channels, notice, ev.alert_id, f"{cond}#reminder", ev.severity, seq, now)
    state.update(notified=action, latest=action, notices=seq, sent=was_sent or bool(keys), reminded=as_of)
    conn.execute(alerts.update().where(alerts.c.id == ev.alert_id).values(payload=json.dumps(_jsonable(state))))
    return AlertEvent(ev.alert_id, ev.model, cond, ev.action, ev.severity, "opened", as_of, bool(keys), keys)


def close_acted_on(conn: Any, model: str, decision: Mapping[str, Any], *, now: datetime) -> list[int]:
    """Close the model's open alerts as acted on (``status = acted``), inside the caller's transaction, and
    end its snoozes; returns the ids closed. ``decision``: epoch, action, by, note, effective."""
    rows = conn.execute(sa.select(alerts).where(alerts.c.model == model, alerts.c.status == "open")
                        .order_by(alerts.c.id)).fetchall()
    for r in rows:
        state = _state(r)
        state["acted_on"] = _jsonable(dict(decision))
        conn.execute(alerts.update().where(alerts.c.id == r.id).values(
            status="acted", cleared_at=now, payload=json.dumps(_jsonable(state))))
    conn.execute(alert_snoozes.update().where(alert_snoozes.c.model == model, alert_snoozes.c.ended_at.is_(None))
                 .values(ended_at=now, ended_reason="acted"))
    return [int(r.id) for r in rows]


def snooze(store: Store, model: str, *, until: date, action: str | None = None, decided_by: str,
           note: str | None = None, now: datetime | None = None) -> list[AlertRecord]:
    """Snooze the model's open alerts (those of ``action``: an action name such as ``refit`` or a condition
    key such as ``drop-driver:x1``) until a day; returns the alerts snoozed.

    Raises
    ------
    DecisionError : no open alert of the model matches, or ``until`` is not after the check date the
        alert was last seen at (a snooze that would end at once).
    """
    now = now or utcnow()
    with store.begin() as conn:
        rows = conn.execute(sa.select(alerts).where(alerts.c.model == model, alerts.c.status == "open")
                            .order_by(alerts.c.condition, alerts.c.id)).fetchall()
        chosen = [r for r in rows if action is None or action in (r.condition, r.action)]
        if not chosen:
            have = ", ".join(sorted({str(r.condition) for r in rows}))
            raise DecisionError(f"model '{model}' has no open alert" + (f" for '{action}'" if action else "")
                                + (f"; its open alerts: {have}" if have else "") + ": nothing to snooze")
        seen = max((_as_date(r.as_of) for r in chosen if r.as_of is not None), default=None)
        if seen is not None and until <= seen:
            raise DecisionError(f"model '{model}': --until {until.isoformat()} is not after {seen.isoformat()}, the "
                                "check date its alert was last seen at: the snooze would end at once; give a later day")
        conds = [str(r.condition) for r in chosen]
        conn.execute(alert_snoozes.update().where(alert_snoozes.c.model == model,
                                                  alert_snoozes.c.condition.in_(conds),
                                                  alert_snoozes.c.ended_at.is_(None))
                     .values(ended_at=now, ended_reason="replaced"))
        conn.execute(alert_snoozes.insert(), [
            {"model": model, "condition": str(r.condition), "until": until, "decided_by": decided_by, "note": note,
             "created_at": now, "baseline": json.dumps(_jsonable({**_dict(_state(r).get("latest")),
                                                                   "severity": _RANK_NAME.get(int(r.severity))}))}
            for r in chosen])
    return [dataclasses_replace(_record(r), snoozed_until=until, snoozed_by=decided_by) for r in chosen]


def _enqueue(conn: Any, cfg: Config, channels: Sequence[tuple[str, Any]], notice: dict[str, Any], alert_id: int,
             condition: str, severity: str, seq: int, now: datetime) -> tuple[str, ...]:
    return _outbox.enqueue(conn, channels, notice, alert_id=alert_id, condition=condition, severity=severity,
                           as_of=notice.get("as_of"), seq=seq, now=now)


def _apply(conn: Any, cfg: Config, channels: Sequence[tuple[str, Any]], payload: Mapping[str, Any], cond: str,
           action: dict[str, Any], row: Any, *, as_of: date | None, run_id: Any, now: datetime,
           min_rank: int) -> AlertEvent:
    name = str(payload["name"])
    sev = severity_of(action)
    rank = SEVERITY_RANK[sev]
    send = rank >= min_rank and bool(channels)
    act_name = str(action.get("action"))
    if row is None:
        state = {"version": _STATE_VERSION, "notified": action, "latest": action, "notices": 0, "sent": False,
                 "run_id": run_id}
        res = conn.execute(alerts.insert().values(
            model=name, condition=cond, action=act_name, severity=rank, status="open", first_seen=now,
            last_seen=now, as_of=as_of, payload=json.dumps(_jsonable(state))))
        alert_id = int(res.inserted_primary_key[0])
        keys: tuple[str, ...] = ()
        if send:
            notice = _notice(payload, event="opened", alert_id=alert_id, condition=cond, action=action,
                             severity=sev, as_of=as_of, run_id=run_id, previous=None)
            keys = _enqueue(conn, cfg, channels, notice, alert_id, cond, sev, 1, now)
            state.update(notices=1, sent=True)
            conn.execute(alerts.update().where(alerts.c.id == alert_id).values(payload=json.dumps(_jsonable(state))))
        return AlertEvent(alert_id, name, cond, act_name, sev, "opened", as_of, bool(keys), keys)

    state = _state(row)
    previous = _dict(state.get("notified"))
    alert_id = int(row.id)
    if is_worse(previous, int(row.severity), action, rank):
        keys = ()
        seq = int(state.get("notices") or 0)
        if send:
            was_sent = bool(state.get("sent"))
            notice = _notice(payload, event="worse" if was_sent else "opened", alert_id=alert_id, condition=cond,
                             action=action, severity=sev, as_of=as_of, run_id=run_id,
                             previous=previous if was_sent else None)
            seq += 1
            keys = _enqueue(conn, cfg, channels, notice, alert_id, cond, sev, seq, now)
        state.update(notified=action, latest=action, notices=seq, sent=bool(state.get("sent")) or bool(keys),
                     run_id=run_id)
        conn.execute(alerts.update().where(alerts.c.id == alert_id).values(
            action=act_name, severity=rank, last_seen=now, as_of=as_of, payload=json.dumps(_jsonable(state))))
        return AlertEvent(alert_id, name, cond, act_name, sev, "worse", as_of, bool(keys), keys)

    state.update(latest=action, run_id=run_id)
    conn.execute(alerts.update().where(alerts.c.id == alert_id).values(
        last_seen=now, as_of=as_of, payload=json.dumps(_jsonable(state))))
    return AlertEvent(alert_id, name, cond, act_name, sev, "unchanged", as_of, False)


def _clear(conn: Any, cfg: Config, channels: Sequence[tuple[str, Any]], payload: Mapping[str, Any], row: Any, *,
           as_of: date | None, run_id: Any, now: datetime, notify: bool) -> AlertEvent:
    state = _state(row)
    sev = _RANK_NAME.get(int(row.severity), "act")
    keys: tuple[str, ...] = ()
    if notify and state.get("sent") and channels:
        latest = _dict(state.get("latest")) or {"action": row.action}
        notice = _notice(payload, event="cleared", alert_id=int(row.id), condition=row.condition, action=latest,
                         severity=sev, as_of=as_of, run_id=run_id, previous=None)
        # a cleared notice is about the past state: drop this run's charts and numbers of other conditions
        notice["charts"] = None
        seq = int(state.get("notices") or 0) + 1
        keys = _enqueue(conn, cfg, channels, notice, int(row.id), f"{row.condition}#cleared", sev, seq, now)
        state["notices"] = seq
    state["cleared_run_id"] = run_id
    conn.execute(alerts.update().where(alerts.c.id == row.id).values(
        status="cleared", cleared_at=now, payload=json.dumps(_jsonable(state))))
    return AlertEvent(int(row.id), str(row.model), str(row.condition), str(row.action), sev, "cleared", as_of,
                      bool(keys), keys)


# --------------------------------------------------------------------------------------------- queries


def _record(row: Any) -> AlertRecord:
    state = _state(row)
    latest = _dict(state.get("latest"))
    return AlertRecord(
        id=int(row.id), model=str(row.model), condition=str(row.condition), action=str(row.action),
        severity=_RANK_NAME.get(int(row.severity), "act"), status=str(row.status), first_seen=row.first_seen,
        last_seen=row.last_seen, cleared_at=row.cleared_at,
        as_of=_as_date(row.as_of), reason=latest.get("reason"), detail=dict(latest),
        notified=bool(state.get("sent")))


def open_alerts(store: Store, model: str | None = None) -> list[AlertRecord]:
    """Every open alert (optionally of one model), ordered by model, then condition; a snoozed one carries
    ``snoozed_until`` and ``snoozed_by``."""
    q = sa.select(alerts).where(alerts.c.status == "open")
    sq = sa.select(alert_snoozes).where(alert_snoozes.c.ended_at.is_(None))
    if model is not None:
        q = q.where(alerts.c.model == model)
        sq = sq.where(alert_snoozes.c.model == model)
    with store.connect() as conn:
        snoozed = {(str(r.model), str(r.condition)): r for r in conn.execute(sq.order_by(alert_snoozes.c.id))}
        out = []
        for r in conn.execute(q.order_by(alerts.c.model, alerts.c.condition, alerts.c.id)):
            rec = _record(r)
            sn = snoozed.get((rec.model, rec.condition))
            if sn is not None:
                rec = dataclasses_replace(rec, snoozed_until=_as_date(sn.until), snoozed_by=str(sn.decided_by))
            out.append(rec)
        return out


def acted_on_alerts(store: Store, model: str | None = None) -> list[AlertRecord]:
    """Alerts closed by a decision (``drift accept``), newest first; ``detail['acted_on']`` says which."""
    q = sa.select(alerts).where(alerts.c.status == "acted")
    if model is not None:
        q = q.where(alerts.c.model == model)
    with store.connect() as conn:
        out = []
        for r in conn.execute(q.order_by(alerts.c.cleared_at.desc(), alerts.c.id.desc())):
            rec = _record(r)
            out.append(dataclasses_replace(rec, detail={**rec.detail, "acted_on": _state(r).get("acted_on")}))
        return out


def cleared_alerts(store: Store, since: datetime) -> list[AlertRecord]:
    """Alerts cleared at or after ``since`` (tz-aware), newest first (for the digest)."""
    if since.tzinfo is None:
        raise ValueError("since must be a tz-aware datetime")
    q = (sa.select(alerts).where(alerts.c.status == "cleared", alerts.c.cleared_at >= since)
         .order_by(alerts.c.cleared_at.desc(), alerts.c.id.desc()))
    with store.connect() as conn:
        return [_record(r) for r in conn.execute(q)]
