"""The outbox: every notice is written to the store first, then delivered, retried, and never sent twice.

Life of an outbox row::

    pending --claim--> sending --hand-over--> delivering --sent ok--> sent
       ^                  |                      |  \\--DeliveryUncertain / unexpected error--> uncertain
       |                  |                      \\--DeliveryError (known not delivered)--> pending, backoff
       |                  \\--DeliveryError or unexpected error before the hand-over--> pending, backoff
       |   any failure: DeliveryRefused (a permanent refusal), every recipient refused for good,
       |                or the alerts.max_attempts-th failed try --> dead
       |   found on a later run, claim expired:
       |     sending    -> pending (nothing had left; for a channel that reports its hand-over)
       |     delivering -> idempotent channel: pending again; other channels: uncertain
       \\------ resolve_uncertain(resend=True) by an operator (uncertain or dead rows) ------/

Recipients
    A channel with several recipients (e-mail) records what each one answered in ``recipients`` (JSON
    ``{address: {status: sent | refused | uncertain, permanent, reply, at}}``). A try that reached some
    recipients and not others raises :class:`PartialDelivery`: the row goes back to pending for the ones
    refused for now (a later try sends to them alone) and becomes ``dead`` once only recipients refused for
    good are left; it is ``sent`` only when every recipient got it.

Rows
    :func:`enqueue` writes one row per channel inside the caller's transaction (the one that writes the
    alert row), so an alert and its notices exist together or not at all. The idempotency key is
    ``sha256(alert id | condition | severity | as_of | notice number | channel name)``, unique in the table.

Delivery (:func:`deliver_pending`)
    Due ``pending`` rows are taken in id order. Each row is *claimed* first — ``status = sending``,
    ``attempts + 1``, ``next_attempt_at = now + lease`` — in its own committed transaction (a conditional
    update, so two processes can never both claim it). Then the channel sends; then the row is marked
    ``sent`` with ``sent_at``. A failure the channel knows left nothing delivered (connection refused, SMTP
    reply 4xx/5xx, HTTP non-2xx) puts the row back to ``pending`` with ``last_error`` and
    ``next_attempt_at = now + min(retry_backoff * 2**(attempts-1), retry_max_backoff)``.

The hand-over
    A channel that sets ``reports_handover`` calls :meth:`OutboxMessage.handing_over` at its point of no
    return — the e-mail channel just before it writes the message data (after the server said 354 to
    DATA), the webhook just before it opens the request — and the row becomes ``delivering`` in a committed
    transaction before anything leaves. Composing the message, drawing its charts, connecting, TLS, login,
    MAIL and RCPT all happen while the row is ``sending``: a process that dies there has certainly
    delivered nothing.

The rule that guarantees "never twice"
    A row that may have reached the recipient is never re-sent automatically:

    - a channel error that leaves it unknown whether the message got through (the SMTP connection dropped
      after the message data was sent, an HTTP timeout after the request went out) marks the row
      ``uncertain`` at once;
    - a row found ``sending`` or ``delivering`` on a later run (the process died, or the store failed while
      marking) is left alone while its claim lease runs (another process may be sending it); once it has
      expired: a ``sending`` row of a channel that reports its hand-over is put back to ``pending`` (nothing
      had left); a row of an *idempotent* channel (the folder sink, which checks the key in its file under a
      lock before appending) is put back to ``pending`` and sent again — the channel itself drops the
      duplicate; every other row is marked ``uncertain``;
    - after an uncertain send, the channel's other rows wait for the next round (a receiver that stopped
      answering would make them uncertain too);
    - ``uncertain`` rows are reported by :func:`outbox_summary` (for ``drift status``) and stay so until
      an operator calls :func:`resolve_uncertain` (re-send, or accept as delivered).

    The e-mail ``Message-ID`` and the webhook ``Idempotency-Key`` header carry the key as well, so a
    receiver that deduplicates can drop a manual re-send; the rule above does not rely on that.

Channels
    A registry keyed by ``kind`` (``email``, ``folder``, ``webhook``); :func:`register_channel` adds one.
    A channel's ``send`` raises :class:`DeliveryError` when the message was certainly not delivered,
    :class:`ChannelUnavailable` (a DeliveryError) when no message can go through it now (the remaining
    rows of that channel wait for the next call), and :class:`DeliveryUncertain` when delivery is unknown.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import logging
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from typing import Any, ClassVar

import sqlalchemy as sa

from drift.config import Config
from drift.exceptions import DeliveryError
from drift.jsontext import json_default
from drift.store import Store, outbox, utcnow

log = logging.getLogger(__name__)

#: how long a claimed ("sending") row belongs to the process that claimed it, unless the config sets
#: ``alerts.sending_timeout``; well above any channel's own timeout (20 s for SMTP by default)
DEFAULT_SENDING_LEASE = timedelta(minutes=15)
#: cap on the backoff exponent (the delay is capped by retry_max_backoff anyway; this avoids overflow)
_MAX_DOUBLINGS = 30
#: built-in channel kinds and the modules that register them (imported on first use)
_BUILTIN = {"email": "drift.delivery.email", "folder": "drift.delivery.folder", "webhook": "drift.delivery.webhook"}
#: statuses of an outbox row
STATUSES = ("pending", "sending", "delivering", "sent", "uncertain", "dead", "dismissed")
#: statuses of a row claimed by a process (its claim lease in next_attempt_at)
_CLAIMED = ("sending", "delivering")


class ChannelUnavailable(DeliveryError):
    """Nothing can be delivered through this channel right now (server down, missing credentials)."""


class DeliveryUncertain(DeliveryError):
    """The message may or may not have been delivered; the row is not re-sent automatically."""


class ClaimLost(DeliveryError):
    """This run's claim on a row expired and another run took it over; nothing was sent."""


class DeliveryRefused(DeliveryError):
    """The receiver refused this message for good (an SMTP 5xx reply): the row becomes ``dead``, not retried."""


class PartialDelivery(DeliveryError):
    """Some recipients got the message and others did not; ``recipients`` says which (see the module docstring)."""

    def __init__(self, message: str, recipients: Mapping[str, Mapping[str, Any]]) -> None:
        super().__init__(message)
        self.recipients = {str(k): dict(v) for k, v in recipients.items()}


@dataclass(frozen=True)
class OutboxMessage:
    """One outbox row as a channel sees it."""

    id: int
    key: str
    channel: str
    subject: str
    notice: dict[str, Any]
    attempts: int
    alert_id: int | None
    #: what each recipient answered on earlier tries (``{address: {status, permanent, reply, at}}``)
    recipients: Mapping[str, Mapping[str, Any]] = field(default_factory=dict, compare=False)
    #: set by :func:`deliver_pending`: records the hand-over (see the module docstring)
    handover: Callable[[], None] | None = field(default=None, compare=False, repr=False)

    def handing_over(self) -> None:
        """Call right before the first byte that could deliver the message leaves (the point of no return)."""
        if self.handover is not None:
            self.handover()


class Channel:
    """Base class of a delivery channel. Subclasses set ``kind`` and implement :meth:`send`.

    Parameters
    ----------
    cfg : the whole configuration (for paths relative to the config file).
    spec : the channel's own config entry.
    name : the channel's name (``spec.name`` or a default, see :func:`configured_channels`).
    """

    kind: ClassVar[str] = ""
    #: True when ``send`` itself skips a message whose key was already delivered, so a row found
    #: ``sending`` after a crash can safely be sent again
    idempotent: ClassVar[bool] = False
    #: True when ``send`` calls ``msg.handing_over()`` before anything that could deliver leaves, so a row
    #: found ``sending`` (not ``delivering``) after a crash was certainly not delivered
    reports_handover: ClassVar[bool] = False

    def __init__(self, cfg: Config, spec: Any, name: str) -> None:
        self.cfg = cfg
        self.spec = spec
        self.name = name

    def send(self, msg: OutboxMessage) -> Mapping[str, Mapping[str, Any]] | None:  # pragma: no cover
        """Deliver one message or raise DeliveryError / ChannelUnavailable / DeliveryRefused / PartialDelivery /
        DeliveryUncertain. May return what each recipient answered (recorded in ``recipients``)."""
        raise NotImplementedError

    def flush(self, delivered: Sequence[OutboxMessage]) -> None:
        """Called once after a delivery round with the messages this channel delivered in it."""

    def close(self) -> None:
        """Release connections; called once after the round."""


_REGISTRY: dict[str, type[Channel]] = {}


def register_channel(cls: type[Channel]) -> type[Channel]:
    """Class decorator: register a channel class under its ``kind``."""
    if not cls.kind:
        raise ValueError("a channel class needs a non-empty 'kind'")
    _REGISTRY[cls.kind] = cls
    return cls


def channel_class(kind: str) -> type[Channel]:
    """The channel class registered for ``kind`` (importing the built-in module on first use)."""
    if kind not in _REGISTRY and kind in _BUILTIN:
        importlib.import_module(_BUILTIN[kind])
    try:
        return _REGISTRY[kind]
    except KeyError:
        raise ValueError(f"unknown channel kind {kind!r}; known: {sorted(set(_REGISTRY) | set(_BUILTIN))}") from None


def channel_kinds() -> list[str]:
    """Every known channel kind (built-in ones included)."""
    return sorted(set(_REGISTRY) | set(_BUILTIN))


def configured_channels(cfg: Config) -> list[tuple[str, Any]]:
    """``(name, spec)`` of every configured channel.

    A channel without ``name`` is called by its kind (``email``), or ``email-2``, ``email-3`` ... for the
    second and later unnamed channels of one kind, in config order. Names must be unique.
    """
    out: list[tuple[str, Any]] = []
    seen: dict[str, int] = {}
    for spec in cfg.alerts.channels:
        if spec.name:
            name = spec.name
        else:
            seen[spec.kind] = seen.get(spec.kind, 0) + 1
            name = spec.kind if seen[spec.kind] == 1 else f"{spec.kind}-{seen[spec.kind]}"
        if any(n == name for n, _ in out):
            raise ValueError(f"alerts.channels: two channels are named {name!r}; give each a unique 'name'")
        out.append((name, spec))
    return out


def make_channels(cfg: Config) -> dict[str, Channel]:
    """One channel object per configured channel, by name."""
    return {name: channel_class(spec.kind)(cfg, spec, name) for name, spec in configured_channels(cfg)}


def idempotency_key(alert_id: int, condition: str, severity: str, as_of: Any, seq: int, channel: str) -> str:
    """sha256 hex of the alert id, condition, severity, as-of date, notice number and channel name."""
    raw = "|".join([str(alert_id), condition, severity, str(as_of), str(seq), channel])
    return hashlib.sha256(raw.encode("utf-8")).hexdigest()


def enqueue(conn: Any, channels: Sequence[tuple[str, Any]], notice: Mapping[str, Any], *, alert_id: int,
            condition: str, severity: str, as_of: Any, seq: int, now: datetime) -> tuple[str, ...]:
    """Write one pending row per channel in the caller's transaction; return their keys.

    ``seq`` numbers the notices of one alert (1 for the first, 2 for the first "worse" ...), so every
    notice gets its own keys. Chart data is kept only on e-mail rows (the only channel that shows charts), as
    JSON: a block kept as its JSON text (:class:`drift.jsontext.JSONText`) is written decoded, anything else
    the standard encoder does not know as its ``str()``.
    """
    from drift.delivery.messages import subject_for

    keys: list[str] = []
    rows = []
    for name, spec in channels:
        key = idempotency_key(alert_id, condition, severity, as_of, seq, name)
        doc = dict(notice)
        doc.update(channel=name, key=key)
        if getattr(spec, "kind", None) != "email":
            doc["charts"] = None
        doc["subject"] = subject_for(doc)
        rows.append({"alert": alert_id, "channel": name, "idempotency_key": key, "subject": doc["subject"],
                     "payload": json.dumps(doc, default=json_default), "status": "pending", "attempts": 0,
                     "next_attempt_at": now, "created_at": now})
        keys.append(key)
    if rows:
        conn.execute(outbox.insert(), rows)
    return tuple(keys)


def backoff(cfg: Config, attempts: int) -> timedelta:
    """Delay before the next try after ``attempts`` failed ones: doubling from retry_backoff, capped."""
    base, cap = cfg.alerts.retry_backoff, cfg.alerts.retry_max_backoff
    if attempts < 1:
        return timedelta(0)
    factor = 2 ** min(attempts - 1, _MAX_DOUBLINGS)
    return min(base * factor, cap)


def sending_lease(cfg: Config) -> timedelta:
    lease = cfg.alerts.sending_timeout
    return lease if lease > timedelta(0) else DEFAULT_SENDING_LEASE


@dataclass(frozen=True)
class DeliveryFailure:
    """One failed try: which channel, which row, what went wrong (no secrets in it)."""

    channel: str
    key: str
    error: str


@dataclass(frozen=True)
class DeliveryReport:
    """What one :func:`deliver_pending` call did.

    Attributes
    ----------
    sent : rows delivered and marked sent.
    failed : rows tried and put back to pending (with backoff).
    uncertain : rows newly marked uncertain (not re-sent automatically).
    dead : rows given up in this call (a permanent refusal, or ``alerts.max_attempts`` tries).
    recovered : stale claimed rows put back to pending in this call (idempotent channels, or rows whose
        process died before the hand-over).
    deferred : due rows not tried (their channel was unavailable or is no longer configured).
    pending : pending rows left after the call (due later or deferred).
    errors : one entry per failed or uncertain try.
    """

    sent: int = 0
    failed: int = 0
    uncertain: int = 0
    dead: int = 0
    recovered: int = 0
    deferred: int = 0
    pending: int = 0
    errors: tuple[DeliveryFailure, ...] = field(default_factory=tuple)

    @property
    def ok(self) -> bool:
        return self.failed == 0 and self.uncertain == 0 and self.deferred == 0 and self.dead == 0

    def describe(self) -> str:
        """A few lines for the CLI."""
        lines = [f"outbox: {self.sent} sent, {self.failed} failed (kept, retried later), "
                 f"{self.uncertain} uncertain (not resent; see drift status), "
                 + (f"{self.dead} given up (see drift status), " if self.dead else "")
                 + f"{self.deferred} deferred, {self.pending} still pending"]
        lines += [f"  {e.channel}: {e.error}" for e in self.errors]
        return "\n".join(lines)


def _recipients(raw: Any) -> dict[str, dict[str, Any]]:
    try:
        got = json.loads(raw) if raw else {}
    except ValueError:
        return {}
    return {str(k): dict(v) for k, v in got.items() if isinstance(v, dict)} if isinstance(got, dict) else {}


def _message(row: Any) -> OutboxMessage:
    try:
        notice = json.loads(row.payload)
    except ValueError:
        notice = {}
    return OutboxMessage(id=int(row.id), key=str(row.idempotency_key), channel=str(row.channel),
                         subject=str(row.subject), notice=notice if isinstance(notice, dict) else {},
                         attempts=int(row.attempts or 0), alert_id=row.alert,
                         recipients=_recipients(getattr(row, "recipients", None)))


class _Handover:
    """The hand-over callable given to a channel: marks the row ``delivering`` and remembers it did."""

    def __init__(self, store: Store, row_id: int, claim: datetime) -> None:
        self.store, self.row_id, self.claim, self.done = store, row_id, claim, False

    def __call__(self) -> None:
        _mark_handover(self.store, self.row_id, self.claim)
        self.done = True


def _claim(store: Store, row_id: int, now: datetime, lease: timedelta) -> bool:
    with store.begin() as conn:
        res = conn.execute(outbox.update().where(outbox.c.id == row_id, outbox.c.status == "pending").values(
            status="sending", attempts=outbox.c.attempts + 1, next_attempt_at=now + lease))
        return res.rowcount == 1


# Every mark after the claim names the claim by its lease deadline (``next_attempt_at`` as set by the claim),
# so a run whose lease expired and whose row was taken over by a later run cannot change that row.

def _mark_handover(store: Store, row_id: int, claim: datetime) -> None:
    with store.begin() as conn:
        res = conn.execute(outbox.update().where(outbox.c.id == row_id, outbox.c.status == "sending",
                                                 outbox.c.next_attempt_at == claim).values(status="delivering"))
    if res.rowcount != 1:  # the lease expired and another run took the row over: do not send
        raise ClaimLost(f"outbox row {row_id} is no longer claimed by this run (its lease expired); not sent")


def _recipients_json(recipients: Mapping[str, Mapping[str, Any]] | None) -> dict[str, Any]:
    """The ``recipients`` column value to write (nothing when there is no record)."""
    return {"recipients": json.dumps(recipients, default=str, sort_keys=True)} if recipients else {}


def _mark_sent(store: Store, row_id: int, now: datetime, claim: datetime,
               recipients: Mapping[str, Mapping[str, Any]] | None = None) -> None:
    with store.begin() as conn:
        conn.execute(outbox.update().where(outbox.c.id == row_id, outbox.c.status.in_(_CLAIMED),
                                           outbox.c.next_attempt_at == claim)
                     .values(status="sent", sent_at=now, last_error=None, **_recipients_json(recipients)))


def _mark_failed(store: Store, row_id: int, error: str, next_at: datetime, claim: datetime,
                 recipients: Mapping[str, Mapping[str, Any]] | None = None, *, dead: bool = False) -> None:
    values: dict[str, Any] = ({"status": "dead"} if dead else {"status": "pending", "next_attempt_at": next_at})
    with store.begin() as conn:
        conn.execute(outbox.update().where(outbox.c.id == row_id, outbox.c.status.in_(_CLAIMED),
                                           outbox.c.next_attempt_at == claim)
                     .values(last_error=error, **values, **_recipients_json(recipients)))


def _mark_uncertain(store: Store, row_id: int, error: str, *, from_status: Sequence[str] = _CLAIMED,
                    claim: datetime | None = None, recipients: Mapping[str, Mapping[str, Any]] | None = None) -> bool:
    q = outbox.update().where(outbox.c.id == row_id, outbox.c.status.in_(from_status))
    if claim is not None:
        q = q.where(outbox.c.next_attempt_at == claim)
    with store.begin() as conn:
        res = conn.execute(q.values(status="uncertain", last_error=error, **_recipients_json(recipients)))
        return res.rowcount == 1


def _merge(old: Mapping[str, Mapping[str, Any]], new: Mapping[str, Mapping[str, Any]] | None,
           now: datetime) -> dict[str, dict[str, Any]]:
    out = {k: dict(v) for k, v in old.items()}
    for k, v in (new or {}).items():
        out[str(k)] = {**dict(v), "at": v.get("at") or now.isoformat()}
    return out


def _partial_outcome(recipients: Mapping[str, Mapping[str, Any]]) -> tuple[bool, str]:
    """(something left to retry, the error text) for a row some of whose recipients did not get it."""
    got = sorted(k for k, v in recipients.items() if v.get("status") == "sent")
    refused = {k: v for k, v in sorted(recipients.items()) if v.get("status") == "refused"}
    retry = any(not v.get("permanent") for v in refused.values())
    text = "; ".join(f"{k}: {v.get('reply') or 'refused'}" + ("" if v.get("permanent") else " (retried)")
                     for k, v in refused.items())
    return retry, (f"delivered to {', '.join(got) or 'nobody'}; not to {text}")


def _recover_stale(store: Store, channels: Mapping[str, Channel], now: datetime,
                   errors: list[DeliveryFailure]) -> tuple[int, int]:
    """Resolve claimed rows whose claim lease expired; return (recovered, uncertain)."""
    recovered = uncertain = 0
    with store.connect() as conn:
        stale = conn.execute(sa.select(outbox).where(outbox.c.status.in_(_CLAIMED), outbox.c.next_attempt_at <= now)
                             .order_by(outbox.c.id)).fetchall()
    for row in stale:
        ch = channels.get(row.channel)
        nothing_left = row.status == "sending" and ch is not None and ch.reports_handover
        if ch is not None and (ch.idempotent or nothing_left):
            with store.begin() as conn:
                res = conn.execute(outbox.update().where(outbox.c.id == row.id, outbox.c.status == row.status)
                                   .values(status="pending", next_attempt_at=now))
            recovered += res.rowcount
            if nothing_left and res.rowcount:
                log.info("outbox row %s (%s): an earlier run stopped before handing it over; sending it again",
                         row.id, row.channel)
            continue
        msg = ("claimed for sending at an earlier run but never marked sent (the process stopped or the store "
               "failed): it may or may not have been delivered, so it is not re-sent automatically")
        if _mark_uncertain(store, int(row.id), msg, from_status=(str(row.status),)):
            uncertain += 1
            errors.append(DeliveryFailure(str(row.channel), str(row.idempotency_key), msg))
            log.warning("outbox row %s (%s) is uncertain: %s", row.id, row.channel, msg)
    return recovered, uncertain


def deliver_pending(cfg: Config, store: Store, *, now: datetime | None = None,
                    channels: Mapping[str, Channel] | None = None, all_pending: bool = False) -> DeliveryReport:
    """Send every due pending outbox row through its channel (see the module docstring for the rules).

    Parameters
    ----------
    cfg : the configuration (channels, retry_backoff, retry_max_backoff, max_attempts).
    store : the store.
    now : the current time (tz-aware); defaults to UTC now. Tests pass a controlled clock.
    channels : channel objects by name, replacing those built from ``cfg`` (tests, custom channels).
    all_pending : send every pending row now, also those still waiting out their backoff (``drift
        deliver``: an operator asking to send now); the daemon and the check leave it False.

    Returns
    -------
    DeliveryReport
    """
    now = now or utcnow()
    if now.tzinfo is None:
        raise ValueError("now must be a tz-aware datetime")
    chans = dict(channels) if channels is not None else make_channels(cfg)
    lease = sending_lease(cfg)
    errors: list[DeliveryFailure] = []
    sent = failed = uncertain = dead = deferred = 0
    delivered: dict[str, list[OutboxMessage]] = {}
    down: set[str] = set()
    try:
        recovered, uncertain = _recover_stale(store, chans, now, errors)
        q = sa.select(outbox).where(outbox.c.status == "pending")
        if not all_pending:
            q = q.where(outbox.c.next_attempt_at <= now)
        with store.connect() as conn:
            due = conn.execute(q.order_by(outbox.c.id)).fetchall()
        for row in due:
            ch = chans.get(row.channel)
            if ch is None or row.channel in down:
                if ch is None:
                    log.warning("outbox row %s: no channel named %r in the config; left pending", row.id,
                                row.channel)
                deferred += 1
                continue
            if not _claim(store, int(row.id), now, lease):
                continue  # claimed by someone else meanwhile
            claim = now + lease
            msg = _message(row)
            handover = _Handover(store, msg.id, claim) if ch.reports_handover else None
            msg = replace(msg, attempts=msg.attempts + 1, handover=handover)
            outcome = _try(cfg, ch, msg, handover, now)
            if outcome.kind == "lost-claim":
                continue
            recipients = _merge(msg.recipients, outcome.recipients, now) if outcome.recipients else None
            if outcome.kind == "sent":
                _mark_sent(store, msg.id, now, claim, recipients)
                sent += 1
                delivered.setdefault(msg.channel, []).append(msg)
                continue
            errors.append(DeliveryFailure(msg.channel, msg.key, outcome.error))
            if outcome.kind == "uncertain":
                _mark_uncertain(store, msg.id, outcome.error, claim=claim, recipients=recipients)
                uncertain += 1
                log.warning("outbox row %s (%s): delivery uncertain, not re-sent: %s", msg.id, msg.channel,
                            outcome.error)
                down.add(msg.channel)  # the receiver stopped answering: its other rows wait for the next round
                continue
            error, give_up = outcome.error, outcome.kind == "dead"
            if not give_up and msg.attempts >= cfg.alerts.max_attempts:
                give_up = True
                error = f"given up after {msg.attempts} tries (alerts.max_attempts): {error}"
            _mark_failed(store, msg.id, error, now + backoff(cfg, msg.attempts), claim, recipients, dead=give_up)
            if give_up:
                dead += 1
                log.error("outbox row %s (%s) given up: %s", msg.id, msg.channel, error)
            else:
                failed += 1
                log.warning("outbox row %s (%s) not delivered (try %d): %s", msg.id, msg.channel, msg.attempts,
                            error)
            if outcome.channel_down:
                down.add(msg.channel)
    finally:
        for name, ch in chans.items():
            try:
                if delivered.get(name):
                    ch.flush(delivered[name])
            except Exception:
                log.exception("channel %s: writing its summary failed", name)
            try:
                ch.close()
            except Exception:
                log.exception("channel %s: close failed", name)
    with store.connect() as conn:
        pending = int(conn.execute(sa.select(sa.func.count()).select_from(outbox)
                                   .where(outbox.c.status == "pending")).scalar_one())
    return DeliveryReport(sent=sent, failed=failed, uncertain=uncertain, dead=dead, recovered=recovered,
                          deferred=deferred, pending=pending, errors=tuple(errors))


@dataclass(frozen=True)
class _Outcome:
    """What one try of one row came to: ``kind`` sent | failed | dead | uncertain | lost-claim."""

    kind: str
    error: str = ""
    recipients: Mapping[str, Mapping[str, Any]] | None = None
    channel_down: bool = False


def _try(cfg: Config, ch: Channel, msg: OutboxMessage, handover: _Handover | None, now: datetime) -> _Outcome:
    """Send one claimed row through its channel and classify the result (never raises an Exception)."""
    try:
        got = ch.send(msg)
    except ClaimLost as exc:
        log.warning("outbox row %s (%s): %s", msg.id, msg.channel, exc)
        return _Outcome("lost-claim")
    except PartialDelivery as exc:
        merged = _merge(msg.recipients, exc.recipients, now)
        retry, text = _partial_outcome(merged)
        return _Outcome("failed" if retry else "dead", text, exc.recipients)
    except DeliveryUncertain as exc:
        return _Outcome("uncertain", str(exc), getattr(exc, "recipients", None))
    except DeliveryRefused as exc:
        return _Outcome("dead", str(exc), getattr(exc, "recipients", None))
    except DeliveryError as exc:
        return _Outcome("failed", str(exc), getattr(exc, "recipients", None),
                        channel_down=isinstance(exc, ChannelUnavailable))
    except Exception as exc:
        text = f"{exc.__class__.__name__}: {exc}"
        if handover is not None and not handover.done:
            # the channel reports its hand-over and had not reached it: nothing left, a plain failure
            log.exception("outbox row %s (%s): unexpected error before anything was sent", msg.id, msg.channel)
            return _Outcome("failed", f"{text} (before anything was sent)")
        log.exception("outbox row %s (%s): unexpected error while sending", msg.id, msg.channel)
        return _Outcome("uncertain", f"{text} (while sending: it may have been delivered)")
    merged = _merge(msg.recipients, got, now)
    if any(v.get("status") != "sent" for v in merged.values()):  # an earlier try's refusal still stands
        retry, text = _partial_outcome(merged)
        return _Outcome("failed" if retry else "dead", text, got)
    return _Outcome("sent", recipients=got or None)


# --------------------------------------------------------------------------------------------- status


@dataclass(frozen=True)
class OutboxSummary:
    """Counts per status, the uncertain rows (for an operator) and the next retry time."""

    counts: dict[str, int]
    uncertain: tuple[dict[str, Any], ...]
    next_attempt_at: datetime | None


def outbox_summary(store: Store) -> OutboxSummary:
    """For ``drift status``: how many rows per status, which are uncertain, when the next retry is due."""
    with store.connect() as conn:
        counts = {s: 0 for s in STATUSES}
        for status, n in conn.execute(sa.select(outbox.c.status, sa.func.count()).group_by(outbox.c.status)):
            counts[str(status)] = int(n)
        unc = conn.execute(sa.select(outbox.c.id, outbox.c.channel, outbox.c.idempotency_key, outbox.c.subject,
                                     outbox.c.last_error, outbox.c.created_at, outbox.c.attempts)
                           .where(outbox.c.status == "uncertain").order_by(outbox.c.id)).fetchall()
        nxt = conn.execute(sa.select(sa.func.min(outbox.c.next_attempt_at))
                           .where(outbox.c.status == "pending")).scalar_one()
    if isinstance(nxt, str):  # aggregate results bypass the column type on some backends
        nxt = datetime.fromisoformat(nxt)
    if isinstance(nxt, datetime) and nxt.tzinfo is None:
        from datetime import timezone
        nxt = nxt.replace(tzinfo=timezone.utc)
    return OutboxSummary(counts=counts, uncertain=tuple(dict(r._mapping) for r in unc), next_attempt_at=nxt)


def row_statuses(store: Store, ids: Sequence[int]) -> dict[int, str]:
    """The status of each given outbox row id (``no such row`` for an unknown id)."""
    wanted = sorted({int(i) for i in ids})
    if not wanted:
        return {}
    with store.connect() as conn:
        found = {int(i): str(st) for i, st in conn.execute(
            sa.select(outbox.c.id, outbox.c.status).where(outbox.c.id.in_(wanted)))}
    return {i: found.get(i, "no such row") for i in wanted}


def not_uncertain(store: Store, ids: Sequence[int], allowed: Sequence[str] = ("uncertain",)) -> dict[int, str]:
    """Of the given outbox row ids, those whose status is not in ``allowed``, with their status."""
    return {i: st for i, st in row_statuses(store, ids).items() if st not in allowed}


def dismiss_given_up(store: Store, ids: Sequence[int]) -> int:
    """An operator's decision on given-up rows (status ``dead``): handled another way, no longer listed by
    ``drift status`` or the digest. The row is kept (status ``dismissed``, its last error as it was) and
    never sent. Returns the number of rows changed."""
    with store.begin() as conn:
        res = conn.execute(outbox.update().where(outbox.c.id.in_([int(i) for i in ids]), outbox.c.status == "dead")
                           .values(status="dismissed"))
        return int(res.rowcount)


def resolve_uncertain(store: Store, ids: Sequence[int], *, resend: bool, now: datetime | None = None) -> int:
    """An operator's decision on uncertain rows: ``resend=True`` queues them again now (dead rows too: a
    given-up notice sent again after the cause was fixed), ``False`` accepts uncertain rows as delivered
    (status sent). A resent row is sent again to every recipient not recorded as having got it, with its
    tries counted afresh. Returns the number of rows changed."""
    now = now or utcnow()
    ids = [int(i) for i in ids]
    with store.begin() as conn:
        if not resend:
            res = conn.execute(outbox.update().where(outbox.c.id.in_(ids), outbox.c.status == "uncertain")
                               .values(status="sent", sent_at=now))
            return int(res.rowcount)
        n = 0
        for row in conn.execute(sa.select(outbox.c.id, outbox.c.recipients)
                                .where(outbox.c.id.in_(ids), outbox.c.status.in_(("uncertain", "dead")))).fetchall():
            got = {k: v for k, v in _recipients(row.recipients).items() if v.get("status") == "sent"}
            n += conn.execute(outbox.update().where(outbox.c.id == row.id, outbox.c.status.in_(("uncertain", "dead")))
                              .values(status="pending", next_attempt_at=now, attempts=0,
                                      recipients=json.dumps(got, sort_keys=True) if got else None)).rowcount
        return n
