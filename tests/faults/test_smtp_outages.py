"""SMTP outages, step by step, against a scripted loopback server (tests/faults/smtp.py): down, refusing
with 4xx and 5xx replies at each step, dropping the connection, and silent beyond the client's timeout.

The rule under test (common practice, no source; RFC 5321 sections 3.8 and 4.2 for what a reply means):
a failure before the server could have taken the message is a certain non-delivery and is retried until
it goes through; a refusal reply after the data is certain too; a permanent refusal of the message (5xx to
RCPT, DATA or the data) gives the notice up (``dead``, counted by ``drift status``), while a 5xx to MAIL
(the sender or the session, the same for every notice) is retried; only silence after the whole message was
written is *uncertain*: such a row is never re-sent automatically and is counted by ``drift status``.
After the server recovers, each alert not given up arrives exactly once. Invented payloads (tests/delivery/conftest.py).
"""

from __future__ import annotations

import datetime as dt
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.delivery.alerts import process_alerts
from drift.delivery.email import EmailSender
from drift.delivery.outbox import configured_channels, deliver_pending
from drift.status import collect_status, format_status
from drift.store import outbox as outbox_t
from tests.delivery.conftest import T0, action, fake_renderer, make_cfg, outcome, payload
from tests.faults.smtp import ScriptedSmtp

pytestmark = pytest.mark.network

#: client timeout (seconds) and how long a stalling server stays silent (beyond it)
TIMEOUT, STALL = 0.5, 1.5

REFUSALS = {"4xx": {"greeting": "450 4.3.2 not now", "ehlo": "451 4.3.0 try later", "mail": "451 4.3.0 try later",
                    "rcpt": "450 4.2.1 mailbox busy", "data": "451 4.3.0 try later", "eod": "452 4.3.1 full"},
            "5xx": {"greeting": "554 5.3.2 no service", "ehlo": "550 5.7.1 go away", "mail": "550 5.7.1 sender refused",
                    "rcpt": "550 5.1.1 no such user", "data": "554 5.3.0 no", "eod": "554 5.6.0 rejected"},
            "421": {s: "421 4.3.2 closing" for s in ("greeting", "ehlo", "mail", "rcpt", "data", "eod")}}

#: (step, fault) -> (failed, deferred, uncertain, dead) in the round of the outage, for two due rows
#: "server": the channel is unavailable (first row failed, second deferred);
#: "message": each row refused on its own; "after": silence after the data (uncertain, the second waits);
#: "refused": each row refused for good (dead)
SERVER, MESSAGE, AFTER, REFUSED = (1, 1, 0, 0), (2, 0, 0, 0), (0, 1, 1, 0), (0, 0, 0, 2)


def expected(step: str, fault: str) -> tuple[int, int, int, int]:
    if fault == "421" or step in ("greeting", "ehlo"):
        return SERVER
    if fault in ("drop", "stall"):
        return AFTER if step == "eod" else SERVER
    if fault == "5xx" and step in ("rcpt", "data", "eod"):
        return REFUSED
    return MESSAGE


CASES = [(step, fault) for step in ("greeting", "ehlo", "mail", "rcpt", "data", "eod")
         for fault in ("4xx", "5xx", "421", "drop", "stall")]


@pytest.fixture
def store(sqlite_store: Any) -> Any:
    """The outbox logic is the same on both backends (tests/delivery runs it on each); SQLite here."""
    return sqlite_store


@pytest.fixture
def smtp() -> Iterator[ScriptedSmtp]:
    with ScriptedSmtp(stall=STALL) as srv:
        yield srv


def _cfg(tmp_path: Path, port: int) -> Any:
    return make_cfg(tmp_path, [{"kind": "email", "name": "mail", "host": "127.0.0.1", "port": port,
                                "sender": "drift@example.test", "to": ["owner@example.test"], "timeout": TIMEOUT}])


def _senders(cfg: Any) -> dict[str, EmailSender]:
    return {n: EmailSender(cfg, s, n, chart_renderer=fake_renderer) for n, s in configured_channels(cfg)}


def _rows(store: Any) -> list[Any]:
    with store.connect() as conn:
        return conn.execute(sa.select(outbox_t).order_by(outbox_t.c.id)).fetchall()


def _two_alerts(cfg: Any, store: Any) -> list[str]:
    evs = process_alerts(cfg, store, outcome(payload("k000", [action("refit")]),
                                             payload("k001", [action("data-late", driver="k001_temp")])), now=T0)
    return [k for ev in evs for k in ev.keys]


@pytest.mark.parametrize(("step", "fault"), CASES, ids=[f"{s}-{f}" for s, f in CASES])
def test_outage_at_each_step_then_each_alert_once(tmp_path: Path, store: Any, smtp: ScriptedSmtp,
                                                  step: str, fault: str) -> None:
    cfg = _cfg(tmp_path, smtp.port)
    keys = _two_alerts(cfg, store)
    smtp.fault = (step, REFUSALS[fault][step] if fault in REFUSALS else fault)
    rep = deliver_pending(cfg, store, now=T0, channels=_senders(cfg))
    failed, deferred, uncertain, dead = expected(step, fault)
    assert (rep.sent, rep.failed, rep.deferred, rep.uncertain, rep.dead) == (0, failed, deferred, uncertain, dead), \
        rep.describe()
    taken = smtp.keys()
    assert taken == keys[:uncertain]  # only silence after the data can hide a delivery
    for r in _rows(store):
        if r.status in ("pending", "dead") and r.attempts:
            assert r.last_error and (fault not in REFUSALS or REFUSALS[fault][step].split()[0] in r.last_error
                                     or step in ("greeting", "ehlo")), r.last_error
    # the server recovers: every alert not given up arrives, exactly once, the uncertain one never again
    smtp.fault = None
    for hours in (1, 2, 30):
        deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=hours), channels=_senders(cfg))
    assert Counter(smtp.keys()) == Counter(keys[:len(keys) - dead])
    statuses = [r.status for r in _rows(store)]
    assert statuses.count("uncertain") == uncertain and statuses.count("dead") == dead
    assert statuses.count("sent") == len(keys) - uncertain - dead
    status = collect_status(cfg, store, now=T0 + dt.timedelta(hours=31))
    assert len(status["outbox"]["uncertain"]) == uncertain and len(status["outbox"]["dead"]) == dead


def test_server_down_then_up(tmp_path: Path, store: Any, smtp: ScriptedSmtp) -> None:
    cfg = _cfg(tmp_path, smtp.port)
    keys = _two_alerts(cfg, store)
    smtp.stop()
    rep = deliver_pending(cfg, store, now=T0, channels=_senders(cfg))
    assert (rep.failed, rep.deferred, rep.pending) == (1, 1, 2) and "cannot reach" in rep.errors[0].error
    smtp.start()
    for hours in (1, 2):
        deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=hours), channels=_senders(cfg))
    assert Counter(smtp.keys()) == Counter(keys)


def test_uncertain_rows_are_counted_by_status(tmp_path: Path, store: Any, smtp: ScriptedSmtp) -> None:
    cfg = _cfg(tmp_path, smtp.port)
    _two_alerts(cfg, store)
    smtp.fault = ("eod", "drop")
    deliver_pending(cfg, store, now=T0, channels=_senders(cfg))
    smtp.fault = None
    deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1), channels=_senders(cfg))
    text = format_status(collect_status(cfg, store, now=T0 + dt.timedelta(hours=2)))
    assert "1 uncertain" in text and "may have been delivered" in text
