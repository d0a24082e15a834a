"""The digest: one self-contained HTML page (and a short text version) summing up every model's state.

What it reads
    - the newest verdict per model (``store.latest_verdicts()``), with its check payload;
    - what the models looked like *before*: by default the verdicts recorded by the previous successful
      digest run (the newest ``runs`` row of kind ``"digest"`` with status ``ok``; its ``detail`` JSON
      holds ``{"verdicts": {model: verdict}}``); with ``since`` the newest verdict per model created
      before that time;
    - the open alerts (``alerts`` table, ``status = 'open'``), with the reason of their latest action.

What it writes (:func:`run_digest`)
    ``<alerts.digest_path>/digest-<date>.html`` (charts embedded as ``data:`` URIs, so the file stands
    alone) and ``digest-<date>.txt``; a ``runs`` row of kind ``digest`` whose detail records this
    digest's verdicts for the next one; with ``send=True`` one outbox row per e-mail channel, key
    ``digest:<date>:<channel>`` (so a second run on the same day enqueues nothing new), delivered later by
    :func:`drift.delivery.outbox.deliver_pending`.

Changes between the two states, per model (verdicts ranked by the check's own order,
:data:`drift.verdicts.ORDER`: keep < watch < data-late < drop-driver < relag < refit < error):

=========  ====================================================================
new        was keep (or not there before), now anything else
worse      was not keep, now a more pressing verdict
eased      was not keep, now a less pressing verdict that is still not keep
cleared    was not keep, now keep
=========  ====================================================================

Model and series names are user data: the HTML template is rendered with autoescaping on.
"""

from __future__ import annotations

import json
import logging
import math
import os
import tempfile
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, time
from pathlib import Path
from typing import Any, Literal
from zoneinfo import ZoneInfo

import jinja2
import sqlalchemy as sa

from drift.config import Config
from drift.delivery import charts as _charts
from drift.delivery.present import accuracy_text, driver_table, late_feeds
from drift.store import Store, alert_snoozes, alerts, outbox, runs, utcnow, verdicts
from drift.verdicts import LABEL, ORDER, accuracy_short, fmt_num, fmt_p, label

log = logging.getLogger(__name__)

#: run kind recorded in the ``runs`` table
RUN_KIND = "digest"
#: version of the JSON kept in a digest run's ``detail``
DETAIL_VERSION = 1
#: pressing order of verdicts (higher = more pressing): the check's own order (drift.verdicts.ORDER)
VERDICT_RANK: dict[str, int] = {v: len(ORDER) - 1 - i for i, v in enumerate(ORDER)}
#: words shown for each verdict (drift.verdicts.LABEL, the one vocabulary)
VERDICT_WORDS: dict[str, str] = LABEL
#: words shown for each state of a model (the digest's own three-step scale)
STATE_WORDS: dict[str, str] = {"act": "Needs action", "watch": "Keep an eye on", "steady": "Steady"}
#: with at most this many models every model gets a section with charts
ALL_SECTIONS_MAX = 30
#: at most this many model sections carry charts (the most pressing first); keeps the page mailable
CHART_SECTIONS_MAX = 40
#: which charts illustrate which verdict or action (union over a model's actions, in charts.KINDS order)
CHARTS_FOR: dict[str, tuple[str, ...]] = {
    "refit": ("cusum", "coefficients", "forecast"),
    "relag": ("lag_profile", "coefficients"),
    "drop-driver": ("coefficients", "forecast"),
    "data-late": ("feeds",),
    "watch": ("cusum", "forecast"),
    "keep": ("cusum", "forecast"),
}
#: the footer of every digest
FOOTER = ("These verdicts are statistical evidence, not certainty. Every test has a false-alarm rate and can "
          "miss a slow change; the decision to refit, re-lag or drop a driver stays with the people "
          "accountable for each model.")
#: significant digits of numbers in tables
DIGITS = 3

ChangeKind = Literal["new", "worse", "eased", "cleared"]
State = Literal["act", "watch", "steady"]

_TEMPLATES = Path(__file__).resolve().parent.parent / "templates"
_html_env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(_TEMPLATES)), autoescape=True,
                               undefined=jinja2.ChainableUndefined, trim_blocks=True, lstrip_blocks=True)
_text_env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(_TEMPLATES)), autoescape=False,
                               undefined=jinja2.ChainableUndefined, trim_blocks=True, lstrip_blocks=True,
                               keep_trailing_newline=True)


# ---------------------------------------------------------------------------------------------- types
@dataclass(frozen=True)
class ModelLine:
    """One model's row of the digest table.

    Attributes
    ----------
    name, verdict : the model and its newest verdict.
    previous : its verdict in the state compared against (None: not there before).
    state : "act" (an action with severity act), "watch" (something to look at), "steady".
    as_of : the check date of the verdict (ISO), or None.
    reason : the reason of the most pressing action, or "".
    evidence : the key statistical number in words (an alarm, or the smallest p-value).
    accuracy : e.g. "MASE 0.80 vs 1.00 baseline (n=52)", or "".
    late_feeds : drivers whose feed is late.
    actions : the payload's action dicts.
    payload : the whole check payload.
    """

    name: str
    verdict: str
    previous: str | None
    state: State
    as_of: str | None
    reason: str
    evidence: str
    accuracy: str
    late_feeds: tuple[str, ...]
    actions: tuple[Mapping[str, Any], ...]
    payload: Mapping[str, Any] = field(repr=False)
    epoch: str = ""  # the monitoring epoch after a decision (drift.epochs), "" for the config as written

    @property
    def needs_action(self) -> bool:
        return self.state == "act"


@dataclass(frozen=True)
class Change:
    """A model whose verdict moved between the two states compared."""

    model: str
    kind: ChangeKind
    before: str | None
    after: str


@dataclass(frozen=True)
class OpenAlert:
    """An open row of the ``alerts`` table, with the reason of its latest action."""

    id: int
    model: str
    condition: str
    action: str
    severity: str
    first_seen: datetime | None
    last_seen: datetime | None
    as_of: date | None
    reason: str
    snoozed_until: date | None = None  # the team chose to wait on it until then (drift snooze)


@dataclass(frozen=True)
class Undelivered:
    """A notice that may not have reached its recipients: given up (``dead``) or ``uncertain``."""

    id: int
    channel: str
    subject: str
    status: str
    error: str
    created_at: datetime | None


@dataclass(frozen=True)
class Digest:
    """A built digest.

    Attributes
    ----------
    date : the digest's date (in the configured time zone).
    path : where the HTML file goes (``.../digest-<date>.html``); written by :func:`run_digest`.
    html, text, subject : the page, its short text version, and a subject line.
    models : every model's line, most pressing first.
    changed : what moved since the state compared against.
    open_alerts : open alerts, most severe first.
    undelivered : notices given up or uncertain (outbox rows waiting on an operator), newest first (the
        page shows 20 of them and says how many more ``drift status`` lists).
    compared_with : words naming the state compared against ("the digest of 2025-12-22", ...).
    run_id : the ``runs`` row (only from :func:`run_digest`).
    queued : idempotency keys of outbox rows written by this run (``send=True``).
    """

    date: date
    path: Path
    html: str
    text: str
    subject: str
    models: tuple[ModelLine, ...]
    changed: tuple[Change, ...]
    open_alerts: tuple[OpenAlert, ...]
    compared_with: str
    undelivered: tuple[Undelivered, ...] = ()
    run_id: int | None = None
    queued: tuple[str, ...] = ()

    @property
    def text_path(self) -> Path:
        return self.path.with_suffix(".txt")

    @property
    def need_action(self) -> int:
        return sum(1 for m in self.models if m.state == "act")


# ---------------------------------------------------------------------------------------------- helpers
def _rank(verdict: str | None) -> int:
    if verdict is None:
        return -1
    return VERDICT_RANK.get(verdict, VERDICT_RANK["watch"])


def _num(x: Any, digits: int = DIGITS) -> str:
    """A figure as the reasons print it (:func:`drift.verdicts.fmt_num`), "–" for none."""
    if isinstance(x, (jinja2.Undefined, bool)):
        return "–"
    try:
        v = float(x)
    except (TypeError, ValueError):
        return "–"
    if not math.isfinite(v):
        return "–"
    return fmt_num(v, digits)


def _aware(now: datetime | None) -> datetime:
    now = now or utcnow()
    if not isinstance(now, datetime):
        raise TypeError(f"now must be a datetime, got {type(now).__name__}")
    if now.tzinfo is None:
        raise ValueError("now must be a tz-aware datetime")
    return now


def _since_time(cfg: Config, since: datetime | date | str | None) -> datetime | None:
    """``since`` as a tz-aware datetime; a date means its midnight in the configured time zone."""
    if since is None:
        return None
    if isinstance(since, str):
        try:
            since = datetime.fromisoformat(since) if "T" in since or " " in since else date.fromisoformat(since)
        except ValueError:
            raise ValueError(f"since must be a date (YYYY-MM-DD) or an ISO time, got {since!r}") from None
    if isinstance(since, datetime):
        return since if since.tzinfo else since.replace(tzinfo=ZoneInfo(cfg.timezone))
    if isinstance(since, date):
        return datetime.combine(since, time(0), tzinfo=ZoneInfo(cfg.timezone))
    raise TypeError(f"since must be a date, datetime or ISO string, got {type(since).__name__}")


def _state(payload: Mapping[str, Any], verdict: str) -> State:
    actions = [a for a in payload.get("actions") or [] if isinstance(a, Mapping)]
    if any(a.get("severity") == "act" for a in actions):
        return "act"
    if not actions and verdict not in ("keep", "watch"):
        return "act"  # a verdict without its actions list: trust the verdict
    if actions or verdict != "keep":
        return "watch"
    return "steady"


def _main_action(payload: Mapping[str, Any], verdict: str) -> Mapping[str, Any] | None:
    """The action the verdict names (else the most pressing one)."""
    actions = [a for a in payload.get("actions") or [] if isinstance(a, Mapping)]
    if not actions:
        return None
    for a in actions:
        if a.get("action") == verdict:
            return a
    return max(actions, key=lambda a: (a.get("severity") == "act", _rank(str(a.get("action")))))


def _evidence(payload: Mapping[str, Any]) -> str:
    alarms = [a for a in payload.get("alarms") or [] if isinstance(a, Mapping)]
    if alarms:
        # the alarm a refit names (the first monitor to cross), else the earliest; warnings after alarms
        a = min(alarms, key=lambda a: (bool(a.get("warning")), str(a.get("date") or "9999")))
        lvl = a.get("level")
        at = f" at {_num(float(lvl) * 100)}%" if isinstance(lvl, (int, float)) else ""
        kind = "warning" if a.get("warning") else "alarm"
        return (f"{a.get('test', 'test')}{' (' + str(a['driver']) + ')' if a.get('driver') else ''} {kind}{at}"
                + (f" on {a['date']}" if a.get("date") else "")
                + (" after the horizon" if a.get("beyond_horizon") else "")
                + (f" ({_num(a.get('statistic'))} > {_num(a.get('threshold'))})"
                   if a.get("statistic") is not None and a.get("threshold") is not None else ""))
    tests = [t for t in payload.get("tests") or []
             if isinstance(t, Mapping) and isinstance(t.get("pvalue"), (int, float)) and math.isfinite(t["pvalue"])]
    if tests:
        t = min(tests, key=lambda t: t["pvalue"])
        return f"smallest p-value: {t.get('test', 'test')} {fmt_p(t['pvalue'], t.get('test'))}"
    return ""


def _accuracy(payload: Mapping[str, Any]) -> str:
    acc = payload.get("accuracy")
    return accuracy_short(acc) if isinstance(acc, Mapping) else ""


def condition_words(condition: str) -> str:
    """An alert's condition key in the vocabulary's words: ``data-late:x1`` -> ``data late: x1``."""
    code, _, rest = str(condition).partition(":")
    return label(code) + (f": {rest}" if rest else "")


def _late(payload: Mapping[str, Any]) -> tuple[str, ...]:
    return tuple(str(f["driver"]) for f in late_feeds(payload))


def _line(row: Mapping[str, Any], previous: Mapping[str, str]) -> ModelLine:
    raw = row.get("payload")
    payload: Mapping[str, Any] = raw if isinstance(raw, Mapping) else {}
    name = str(row.get("model") or payload.get("name") or "?")
    verdict = str(row.get("verdict") or payload.get("verdict") or "keep")
    as_of = row.get("as_of") or payload.get("as_of")
    main = _main_action(payload, verdict)
    return ModelLine(
        name=name, verdict=verdict, previous=previous.get(name), state=_state(payload, verdict),
        as_of=str(as_of)[:10] if as_of else None,
        reason=str(main.get("reason") or "") if main else str(payload.get("reason") or ""),
        evidence=_evidence(payload), accuracy=_accuracy(payload), late_feeds=_late(payload),
        actions=tuple(a for a in payload.get("actions") or [] if isinstance(a, Mapping)), payload=payload,
        epoch=_epoch_words(payload))


def _epoch_words(payload: Mapping[str, Any]) -> str:
    """``epoch 2: refit since 2024-12-31 by alice`` (the payload's ``epoch``); "" for epoch 1."""
    ep = payload.get("epoch")
    if not isinstance(ep, Mapping) or not isinstance(ep.get("number"), int) or ep["number"] <= 1:
        return ""
    return (f"epoch {ep['number']}: {ep.get('action')} since {ep.get('since') or '?'}"
            + (f" by {ep['decided_by']}" if ep.get("decided_by") else ""))


def _changes(lines: Iterable[ModelLine]) -> list[Change]:
    out = []
    for m in lines:
        before, after = m.previous, m.verdict
        if before == after:
            continue
        if before in (None, "keep"):
            if after != "keep":
                out.append(Change(m.name, "new", before, after))
        elif after == "keep":
            out.append(Change(m.name, "cleared", before, after))
        elif _rank(after) > _rank(before):
            out.append(Change(m.name, "worse", before, after))
        else:
            out.append(Change(m.name, "eased", before, after))
    order = {"new": 0, "worse": 1, "eased": 2, "cleared": 3}
    return sorted(out, key=lambda c: (order[c.kind], -_rank(c.after), c.model))


def _previous_digest(store: Store) -> tuple[dict[str, str], str, date | None]:
    q = (sa.select(runs.c.id, runs.c.as_of, runs.c.detail, runs.c.started_at)
         .where(runs.c.kind == RUN_KIND, runs.c.status == "ok").order_by(runs.c.id.desc()).limit(1))
    with store.connect() as conn:
        row = conn.execute(q).first()
    if row is None:
        return {}, "nothing (this is the first digest)", None
    try:
        detail = json.loads(row.detail) if row.detail else {}
    except ValueError:
        detail = {}
    got = detail.get("verdicts") if isinstance(detail, dict) else None
    prev = {str(k): str(v) for k, v in got.items()} if isinstance(got, dict) else {}
    when = row.as_of or (row.started_at.date() if row.started_at else None)
    return prev, f"the digest of {when}" if when else "the previous digest", when


def _verdicts_before(store: Store, before: datetime) -> dict[str, str]:
    v = verdicts
    sub = (sa.select(v.c.model, sa.func.max(v.c.id).label("mid")).where(v.c.created_at < before)
           .group_by(v.c.model).subquery())
    q = sa.select(v.c.model, v.c.verdict).join(sub, v.c.id == sub.c.mid)
    with store.connect() as conn:
        return {str(m): str(vd) for m, vd in conn.execute(q)}


def _open_alerts(store: Store) -> list[OpenAlert]:
    a = alerts
    q = sa.select(a).where(a.c.status == "open").order_by(a.c.severity.desc(), a.c.model, a.c.condition, a.c.id)
    out = []
    with store.connect() as conn:
        snoozed = {(str(r.model), str(r.condition)): r.until for r in conn.execute(
            sa.select(alert_snoozes.c.model, alert_snoozes.c.condition, alert_snoozes.c.until)
            .where(alert_snoozes.c.ended_at.is_(None)))}
        for r in conn.execute(q):
            try:
                st = json.loads(r.payload) if r.payload else {}
            except ValueError:
                st = {}
            reason = ""
            if isinstance(st, dict):
                got = st.get("latest")
                latest: Mapping[str, Any] = got if isinstance(got, dict) else st
                reason = str(latest.get("reason") or "")
            sev = {2: "act", 1: "watch"}.get(int(r.severity), "act" if int(r.severity) > 2 else "watch")
            out.append(OpenAlert(id=int(r.id), model=str(r.model), condition=str(r.condition), action=str(r.action),
                                 severity=sev, first_seen=r.first_seen, last_seen=r.last_seen, as_of=r.as_of,
                                 reason=reason, snoozed_until=snoozed.get((str(r.model), str(r.condition)))))
    return out


def _undelivered(store: Store) -> list[Undelivered]:
    o = outbox
    with store.connect() as conn:
        got = conn.execute(sa.select(o.c.id, o.c.channel, o.c.subject, o.c.status, o.c.last_error, o.c.created_at)
                           .where(o.c.status.in_(("dead", "uncertain"))).order_by(o.c.id.desc())).fetchall()
    return [Undelivered(id=int(r.id), channel=str(r.channel), subject=str(r.subject), status=str(r.status),
                        error=str(r.last_error or ""), created_at=r.created_at) for r in got]


def _chart_kinds(m: ModelLine) -> list[str]:
    want: set[str] = set(CHARTS_FOR.get(m.verdict, CHARTS_FOR["watch"]))
    for a in m.actions:
        want.update(CHARTS_FOR.get(str(a.get("action")), ()))
    return [k for k in _charts.KINDS if k in want]


def _digest_date(cfg: Config, now: datetime) -> date:
    return now.astimezone(ZoneInfo(cfg.timezone)).date()


def digest_path(cfg: Config, day: date) -> Path:
    """``<alerts.digest_path>/digest-<day>.html`` (relative paths are relative to the config file)."""
    return cfg.resolve(cfg.alerts.digest_path) / f"digest-{day.isoformat()}.html"


# ---------------------------------------------------------------------------------------------- build
def build_digest(cfg: Config, store: Store, *, since: datetime | date | str | None = None,
                 now: datetime | None = None) -> Digest:
    """Build the digest (HTML and text) from the store; writes nothing.

    Parameters
    ----------
    cfg : the configuration (``alerts.digest_path``, ``timezone``).
    store : the store with the verdicts, runs and alerts.
    since : compare with the verdicts as they stood at this time (a date means its midnight in the
        configured time zone) instead of with the previous digest.
    now : the digest's time (tz-aware; default now); its date names the file.

    Returns
    -------
    Digest

    Raises
    ------
    ValueError, TypeError
        for a naive ``now`` or an unreadable ``since``.
    """
    now = _aware(now)
    since_t = _since_time(cfg, since)
    day = _digest_date(cfg, now)
    if since_t is not None:
        previous = _verdicts_before(store, since_t)
        compared = f"the verdicts as of {since_t.astimezone(ZoneInfo(cfg.timezone)).date().isoformat()}"
    else:
        previous, compared, _ = _previous_digest(store)
    rows = store.latest_verdicts()
    lines = sorted((_line(r, previous) for r in rows),
                   key=lambda m: ({"act": 0, "watch": 1, "steady": 2}[m.state], -_rank(m.verdict), m.name))
    changed = _changes(lines)
    open_alerts = _open_alerts(store)
    undelivered = _undelivered(store)
    html, text, subject = _render(cfg, day, now, lines, changed, open_alerts, compared, undelivered)
    return Digest(date=day, path=digest_path(cfg, day), html=html, text=text, subject=subject,
                  models=tuple(lines), changed=tuple(changed), open_alerts=tuple(open_alerts),
                  compared_with=compared, undelivered=tuple(undelivered))


def _sections(lines: Sequence[ModelLine], changed: Sequence[Change]) -> tuple[list[dict[str, Any]], int]:
    changed_names = {c.model for c in changed}
    if len(lines) <= ALL_SECTIONS_MAX:
        chosen = list(lines)
    else:
        chosen = [m for m in lines if m.state == "act" or m.name in changed_names]
    out: list[dict[str, Any]] = []
    for i, m in enumerate(chosen):
        images: list[dict[str, str]] = []
        notes: list[str] = []
        if i < CHART_SECTIONS_MAX:
            cs = _charts.render_model_chart_set(m.payload, _chart_kinds(m))
            images = [{"kind": k, "src": _charts.data_uri(png), "alt": f"{m.name}: {k.replace('_', ' ')} chart"}
                      for k, png in cs.images.items()]
            notes = list(cs.notes.values())
        out.append({"m": m, "images": images, "notes": notes, "driver_table": driver_table(m.payload),
                    "accuracy_text": accuracy_text(m.payload),
                    "drivers": [d for d in m.payload.get("drivers") or [] if isinstance(d, Mapping)],
                    "alarms": [a for a in m.payload.get("alarms") or [] if isinstance(a, Mapping)],
                    "accuracy": m.payload.get("accuracy") if isinstance(m.payload.get("accuracy"), Mapping) else {},
                    "anchor": f"model-{i}"})
    return out, max(0, len(chosen) - CHART_SECTIONS_MAX)


def _render(cfg: Config, day: date, now: datetime, lines: Sequence[ModelLine], changed: Sequence[Change],
            open_alerts: Sequence[OpenAlert], compared: str,
            undelivered: Sequence[Undelivered] = ()) -> tuple[str, str, str]:
    counts = {s: sum(1 for m in lines if m.state == s) for s in ("act", "watch", "steady")}
    n = len(lines)
    if n == 0:
        headline = "No model has been checked yet."
    elif counts["act"] == 0:
        headline = f"{n} model{'s' if n != 1 else ''} checked; none needs action."
    else:
        headline = (f"{n} model{'s' if n != 1 else ''} checked; {counts['act']} need"
                    f"{'s' if counts['act'] == 1 else ''} action.")
    subject = f"drift digest {day.isoformat()}: " + (
        f"{counts['act']} of {n} models need action" if counts["act"] else f"{n} models, none needs action")
    sections, uncharted = _sections(lines, changed)
    anchors = {s["m"].name: s["anchor"] for s in sections}
    ctx = {
        "day": day.isoformat(), "generated": now.astimezone(ZoneInfo(cfg.timezone)).strftime("%Y-%m-%d %H:%M %Z"),
        "headline": headline, "counts": counts, "n": n, "compared": compared, "changed": changed,
        "open_alerts": open_alerts, "undelivered": undelivered, "models": lines, "sections": sections, "uncharted": uncharted,
        "anchors": anchors, "footer": FOOTER, "verdict_words": VERDICT_WORDS, "state_words": STATE_WORDS,
        "num": _num, "subject": subject, "condition_words": condition_words, "all_sections": n <= ALL_SECTIONS_MAX,
    }
    html = _html_env.get_template("digest.html.j2").render(**ctx)
    text = _text_env.get_template("digest.txt.j2").render(**ctx)
    return html, text, subject


# ---------------------------------------------------------------------------------------------- run
def _write(path: Path, content: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=str(path.parent))
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(content)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def _email_channels(cfg: Config) -> list[str]:
    try:
        from drift.delivery.outbox import configured_channels
    except ImportError:  # the outbox module is optional for building a digest
        named = [(c.name or c.kind, c) for c in cfg.alerts.channels]
    else:
        named = configured_channels(cfg)
    return [name for name, spec in named if getattr(spec, "kind", None) == "email"]


def _enqueue(cfg: Config, store: Store, d: Digest, now: datetime) -> tuple[str, ...]:
    """One pending outbox row per e-mail channel, keyed ``digest:<date>:<channel>``; existing keys are kept."""
    keys = []
    with store.begin() as conn:
        for channel in _email_channels(cfg):
            key = f"digest:{d.date.isoformat()}:{channel}"
            if conn.execute(sa.select(outbox.c.id).where(outbox.c.idempotency_key == key)).first() is not None:
                log.info("digest %s already queued for channel %s; not queued again", d.date, channel)
                continue
            notice = {"version": 1, "event": "digest", "kind": "digest", "date": d.date.isoformat(),
                      "channel": channel, "key": key, "subject": d.subject, "text": d.text, "html": d.html,
                      "path": str(d.path), "models": len(d.models), "need_action": d.need_action}
            conn.execute(outbox.insert().values(
                alert=None, channel=channel, idempotency_key=key, subject=d.subject,
                payload=json.dumps(notice), status="pending", attempts=0, next_attempt_at=now, created_at=now))
            keys.append(key)
    return tuple(keys)


def run_digest(cfg: Config, store: Store, *, since: datetime | date | str | None = None, send: bool = False,
               now: datetime | None = None) -> Digest:
    """Build the digest, write its files, record the run, and (``send=True``) queue it for e-mail.

    Parameters
    ----------
    cfg, store, since, now : as for :func:`build_digest`.
    send : enqueue one outbox row per e-mail channel (delivery is left to ``deliver_pending``).

    Returns
    -------
    Digest
        with ``run_id`` and ``queued`` set.

    Raises
    ------
    OSError
        when the digest folder cannot be written (the run is recorded as failed).
    """
    now = _aware(now)
    day = _digest_date(cfg, now)
    run_id = store.start_run(RUN_KIND, as_of=day, detail={"since": str(since) if since else None})
    try:
        d = build_digest(cfg, store, since=since, now=now)
        _write(d.path, d.html)
        _write(d.text_path, d.text)
        queued = _enqueue(cfg, store, d, now) if send else ()
    except Exception as exc:
        store.finish_run(run_id, "failed", error=f"{exc.__class__.__name__}: {exc}")
        raise
    detail = {"version": DETAIL_VERSION, "date": day.isoformat(), "path": str(d.path),
              "compared_with": d.compared_with, "since": str(since) if since else None,
              "verdicts": {m.name: m.verdict for m in d.models},
              "as_of": {m.name: m.as_of for m in d.models},
              "need_action": d.need_action, "changed": len(d.changed), "open_alerts": len(d.open_alerts),
              "queued": list(queued)}
    store.finish_run(run_id, "ok", detail=detail)
    log.info("digest %s written to %s (%d models, %d need action, %d changes, %d queued)", day, d.path,
             len(d.models), d.need_action, len(d.changed), len(queued))
    return Digest(date=d.date, path=d.path, html=d.html, text=d.text, subject=d.subject, models=d.models,
                  changed=d.changed, open_alerts=d.open_alerts, compared_with=d.compared_with, run_id=run_id,
                  queued=queued)
