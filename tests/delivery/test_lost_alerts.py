"""Alerts that used to be lost (issue 15): each test reproduces one defect found by the fault trials, against a
real aiosmtpd server on 127.0.0.1 (or the loopback HTTP sink).

- "uncertain" means *may have been received*: only a failure after the server answered 354 to DATA leaves a
  row uncertain; anything earlier (an error while composing, a non-ASCII password, a line break in a model
  name, a chart that cannot be drawn, a refused connection, an unexpected exception) is a plain failure,
  retried;
- a recipient refused at RCPT is recorded per recipient and retried or reported, the row is not "sent";
- a permanent refusal (5xx), or ``alerts.max_attempts`` tries, makes the row ``dead``, shown by ``drift
  status`` and the digest;
- ``check --no-deliver`` records alerts and queues their notices, only does not send them;
- ``drift deliver`` sends what is pending now, without waiting out the backoff.

RFC 5321 (Klensin, 2008) sections 4.2.1 and 4.2.5 for what 2xx/4xx/5xx replies and the reply after the data
mean; the rest is common practice, no source. Invented payloads (tests/delivery/conftest.py).
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.delivery.alerts import process_alerts
from drift.delivery.email import EmailSender
from drift.delivery.outbox import configured_channels, deliver_pending, outbox_summary
from drift.store import outbox as outbox_t
from drift.store import utcnow
from tests.delivery.conftest import (
    PASSWORD,
    T0,
    USER,
    SmtpServer,
    action,
    fake_renderer,
    folder_outbox,
    make_cfg,
    outcome,
    payload,
)

pytestmark = pytest.mark.network

OWNER, TEAM = "owner@example.test", "team@example.test"


@pytest.fixture(params=["sqlite", pytest.param("postgres", marks=pytest.mark.postgres)])
def store(request: pytest.FixtureRequest) -> Any:
    """The outbox states on both store backends (tests/conftest.py)."""
    return request.getfixturevalue("sqlite_store" if request.param == "sqlite" else "pg_store")


def email_cfg(tmp_path: Path, port: int, **extra: Any) -> Any:
    alerts = {k: extra.pop(k) for k in ("max_attempts",) if k in extra}
    ch = {"kind": "email", "name": "mail", "host": "127.0.0.1", "port": port, "sender": "drift@example.test",
          "to": [OWNER, TEAM], "timeout": 5, **extra}
    return make_cfg(tmp_path, [ch], **alerts)


def senders(cfg: Any, renderer: Any = fake_renderer) -> dict[str, EmailSender]:
    return {n: EmailSender(cfg, s, n, chart_renderer=renderer) for n, s in configured_channels(cfg)}


def rows(store: Any) -> list[Any]:
    with store.connect() as conn:
        return conn.execute(sa.select(outbox_t).order_by(outbox_t.c.id)).fetchall()


def one_alert(cfg: Any, store: Any, name: str = "k000") -> None:
    process_alerts(cfg, store, outcome(payload(name, [action("refit")])), now=T0)


# ------------------------------------------------------------------------ uncertain only after DATA's 354
def test_an_unexpected_error_before_the_data_is_a_plain_failure(tmp_path: Path, store: Any, smtp_server: SmtpServer,
                                                                monkeypatch: pytest.MonkeyPatch) -> None:
    """An exception nobody planned for (here in the login step) before the server said 354: nothing left, so
    the row is retried after its backoff, not reported uncertain nor left claimed."""
    cfg = email_cfg(tmp_path, smtp_server.port)
    one_alert(cfg, store)

    def broken(self: Any, smtp: Any) -> None:
        raise RuntimeError("a bug before the data")

    monkeypatch.setattr(EmailSender, "_login", broken)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.sent, rep.failed, rep.uncertain) == (0, 1, 0), rep.describe()
    [r] = rows(store)
    assert r.status == "pending" and r.attempts == 1 and "RuntimeError" in r.last_error
    assert r.next_attempt_at == T0 + cfg.alerts.retry_backoff
    monkeypatch.undo()
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(minutes=5), channels=senders(cfg)).sent == 1
    assert len(smtp_server.messages) == 1


def test_an_unexpected_error_after_the_handover_is_uncertain_at_once(tmp_path: Path, store: Any,
                                                                     smtp_server: SmtpServer,
                                                                     monkeypatch: pytest.MonkeyPatch) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    one_alert(cfg, store)
    real_send = __import__("smtplib").SMTP.send

    def explode(self: Any, data: Any) -> None:
        if isinstance(data, bytes) and data.endswith(b".\r\n"):
            real_send(self, data)
            raise RuntimeError("a bug after the data left")
        real_send(self, data)

    monkeypatch.setattr("smtplib.SMTP.send", explode)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.sent, rep.failed, rep.uncertain) == (0, 0, 1), rep.describe()
    assert rows(store)[0].status == "uncertain"  # not left "delivering" for a later run to decide


@pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS:UserWarning")
def test_a_non_ascii_password_is_a_plain_failure_naming_the_variable(tmp_path: Path, store: Any,
                                                                     smtp_auth_server: SmtpServer,
                                                                     monkeypatch: pytest.MonkeyPatch,
                                                                     caplog: pytest.LogCaptureFixture) -> None:
    cfg = email_cfg(tmp_path, smtp_auth_server.port, username_env="DRIFT_T_USER", password_env="DRIFT_T_PW")
    one_alert(cfg, store)
    monkeypatch.setenv("DRIFT_T_USER", USER)
    monkeypatch.setenv("DRIFT_T_PW", "pässwörd-MARKER")
    caplog.set_level("DEBUG")
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.failed, rep.uncertain) == (1, 0), rep.describe()
    [r] = rows(store)
    assert r.status == "pending" and "DRIFT_T_PW" in r.last_error and "ASCII" in r.last_error
    assert "MARKER" not in caplog.text + r.last_error + repr(rep)
    monkeypatch.setenv("DRIFT_T_PW", PASSWORD)
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1), channels=senders(cfg)).sent == 1
    assert len(smtp_auth_server.messages) == 1


def test_hostile_or_broken_notices_are_sent_or_retried_never_uncertain(tmp_path: Path, store: Any,
                                                                       smtp_server: SmtpServer) -> None:
    """A model name holding CR/LF and a chart renderer that raises: each notice arrives once; none is left
    uncertain."""
    cfg = email_cfg(tmp_path, smtp_server.port)

    def raising(model_payload: Any, kinds: Any = None) -> Any:
        raise ValueError("cannot draw")

    process_alerts(cfg, store, outcome(payload("k0\r\nBcc: x@example.test", [action("refit")]),
                                       payload("k1\nname", [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg, renderer=raising))
    assert (rep.sent, rep.uncertain) == (2, 0), rep.describe()
    assert all(m.rcpt_tos == [OWNER, TEAM] for m in smtp_server.messages)
    assert all(b"could not be drawn" in m.content for m in smtp_server.messages)


def test_resend_says_it_may_duplicate(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from drift.cli import cli

    with folder_outbox(tmp_path, ("k000",), "uncertain", "may have been delivered") as (_, cfg_file):
        res = CliRunner().invoke(cli, ["deliver", "--config", cfg_file, "--resend", "1"])
        assert res.exit_code == 0, res.output
        assert "may receive it twice" in res.output


# ------------------------------------------------------------------------ partial recipients
def test_a_recipient_refused_for_now_is_retried_alone(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    one_alert(cfg, store)
    smtp_server.handler.refuse_rcpt = {TEAM: "450 4.2.1 mailbox busy"}
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.sent == 0 and rep.failed == 1, rep.describe()
    [m] = smtp_server.messages
    assert m.rcpt_tos == [OWNER]
    [r] = rows(store)
    assert r.status == "pending" and TEAM in r.last_error and "450" in r.last_error
    got = json.loads(r.recipients)
    assert got[OWNER]["status"] == "sent" and got[TEAM]["status"] == "refused" and "450" in got[TEAM]["reply"]
    smtp_server.handler.refuse_rcpt = {}
    rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1), channels=senders(cfg))
    assert rep.sent == 1, rep.describe()
    assert [m.rcpt_tos for m in smtp_server.messages] == [[OWNER], [TEAM]]  # the owner did not get it twice
    [r] = rows(store)
    assert r.status == "sent" and {v["status"] for v in json.loads(r.recipients).values()} == {"sent"}


def test_a_recipient_refused_for_good_makes_the_row_dead_and_reported(tmp_path: Path, store: Any,
                                                                      smtp_server: SmtpServer) -> None:
    from drift.status import collect_status, format_status

    cfg = email_cfg(tmp_path, smtp_server.port)
    one_alert(cfg, store)
    smtp_server.handler.refuse_rcpt = {TEAM: "550 5.1.1 no such user"}
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.sent, rep.dead) == (0, 1), rep.describe()
    [r] = rows(store)
    assert r.status == "dead" and TEAM in r.last_error and "550" in r.last_error and OWNER in r.last_error
    for h in (1, 24):
        deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=h), channels=senders(cfg))
    assert [m.rcpt_tos for m in smtp_server.messages] == [[OWNER]]
    text = format_status(collect_status(cfg, store, now=T0 + dt.timedelta(days=2)))
    assert "1 given up" in text and TEAM in text


def test_one_refused_for_now_and_one_for_good(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    """The recipient refused for now gets it on the next try; the one refused for good keeps the row dead."""
    gone = "gone@example.test"
    cfg = make_cfg(tmp_path, [{"kind": "email", "name": "mail", "host": "127.0.0.1", "port": smtp_server.port,
                               "sender": "drift@example.test", "to": [OWNER, TEAM, gone], "timeout": 5}])
    one_alert(cfg, store)
    smtp_server.handler.refuse_rcpt = {TEAM: "450 4.2.1 mailbox busy", gone: "550 5.1.1 no such user"}
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.failed, rep.dead) == (1, 0) and rows(store)[0].status == "pending"
    smtp_server.handler.refuse_rcpt = {gone: "550 5.1.1 no such user"}
    rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1), channels=senders(cfg))
    assert (rep.sent, rep.dead) == (0, 1), rep.describe()
    [r] = rows(store)
    assert r.status == "dead" and gone in r.last_error and f"delivered to {OWNER}, {TEAM}" in r.last_error
    assert [m.rcpt_tos for m in smtp_server.messages] == [[OWNER], [TEAM]]


def test_every_recipient_refused_for_good_is_dead(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    one_alert(cfg, store)
    smtp_server.handler.refuse_rcpt = {OWNER: "550 5.1.1 no such user", TEAM: "553 5.1.3 bad address"}
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.dead == 1 and smtp_server.messages == [] and rows(store)[0].status == "dead"


# ------------------------------------------------------------------------ permanent refusals, tries
def test_a_permanent_refusal_is_dead_not_retried_forever(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    one_alert(cfg, store)
    smtp_server.handler.mode = "refuse"  # 554 to the message data
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.failed, rep.dead, rep.uncertain) == (0, 1, 0), rep.describe()
    [r] = rows(store)
    assert r.status == "dead" and "554" in r.last_error and r.attempts == 1
    smtp_server.handler.mode = "ok"
    for h in (1, 24, 24 * 7):
        deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=h), channels=senders(cfg))
    assert smtp_server.messages == [] and outbox_summary(store).counts["dead"] == 1


def test_max_attempts_makes_the_row_dead(tmp_path: Path, store: Any) -> None:
    srv = SmtpServer()  # never started: every try is refused
    cfg = email_cfg(tmp_path, srv.port, max_attempts=3)
    one_alert(cfg, store)
    t = T0
    for _ in range(3):
        rep = deliver_pending(cfg, store, now=t, channels=senders(cfg))
        t += dt.timedelta(days=1)
    assert rep.dead == 1, rep.describe()
    [r] = rows(store)
    assert (r.status, r.attempts) == ("dead", 3) and "3 tries" in r.last_error and "cannot reach" in r.last_error
    assert deliver_pending(cfg, store, now=t, channels=senders(cfg)).failed == 0


def test_a_dead_row_can_be_resent_by_the_operator(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    from drift.delivery.outbox import resolve_uncertain

    cfg = email_cfg(tmp_path, smtp_server.port)
    one_alert(cfg, store)
    smtp_server.handler.refuse_rcpt = {TEAM: "550 5.1.1 no such user"}
    deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    smtp_server.handler.refuse_rcpt = {}  # the address was fixed on the server
    [r] = rows(store)
    assert resolve_uncertain(store, [r.id], resend=True, now=T0) == 1
    assert deliver_pending(cfg, store, now=T0, channels=senders(cfg)).sent == 1
    assert [m.rcpt_tos for m in smtp_server.messages] == [[OWNER], [TEAM]]


def test_dead_and_uncertain_notices_are_in_the_digest(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    from drift.delivery.digest import build_digest

    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")]), payload("k001", [action("refit")])),
                   now=T0)
    smtp_server.handler.mode = "refuse"
    deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    d = build_digest(cfg, store, now=T0 + dt.timedelta(days=1))
    assert len(d.undelivered) == 2 and {u.status for u in d.undelivered} == {"dead"}
    for body in (d.text, d.html):
        assert "not delivered" in body and "554" in body and "k000" in body
    # a long list is cut at 20, newest first, and says how many more drift status lists
    with store.begin() as conn:
        conn.execute(outbox_t.insert(), [{"channel": "mail", "idempotency_key": f"x{i}", "subject": f"old {i}",
                                          "payload": "{}", "status": "dead", "attempts": 20, "last_error": "gone",
                                          "next_attempt_at": T0, "created_at": T0} for i in range(21)])
    d = build_digest(cfg, store, now=T0 + dt.timedelta(days=1))
    assert len(d.undelivered) == 23 and d.undelivered[0].subject == "old 20"
    assert "old 0 - gone" not in d.text and "old 1 - gone" in d.text
    for body in (d.text, d.html):
        assert "and 3 more" in body and "old 20" in body and ("old 0<" not in body and "old 0 -" not in body)


# ------------------------------------------------------------------------ check --no-deliver, deliver now
def test_check_no_deliver_records_alerts_and_queues_them(tmp_path: Path, smtp_server: SmtpServer) -> None:
    from drift.demo import AS_OF
    from drift.pipeline import run_check, run_deliver, run_ingest
    from drift.store import alerts, open_store
    from tests.delivery.test_check_to_smtp import _demo_with_email

    cfg = _demo_with_email(tmp_path, smtp_server.port)
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store, progress=False)
        run_check(cfg, store, as_of=AS_OF, deliver=False)
        with store.connect() as conn:
            opened = conn.execute(sa.select(alerts.c.model).where(alerts.c.status == "open")).scalars().all()
            queued = conn.execute(sa.select(outbox_t.c.status)).scalars().all()
        assert {"east", "west"} <= set(opened)
        assert queued and set(queued) == {"pending"} and smtp_server.messages == []
        assert not (tmp_path / "alerts" / "alerts.jsonl").exists()
        rep = run_deliver(cfg, store)
        assert rep.sent == len(queued) and len(smtp_server.messages) == len(queued) // 2  # email + folder
    finally:
        store.dispose()


def test_drift_deliver_does_not_wait_out_the_backoff(tmp_path: Path, store: Any) -> None:
    from drift.pipeline import run_deliver

    srv = SmtpServer()
    cfg = email_cfg(tmp_path, srv.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=utcnow())
    rep = deliver_pending(cfg, store, channels=senders(cfg))  # the server is down: a backoff starts
    assert rep.failed == 1 and rows(store)[0].next_attempt_at > utcnow()
    srv.start()
    try:
        rep = run_deliver(cfg, store)  # what `drift deliver` runs, a minute later
        assert rep.sent == 1, rep.describe()
        assert len(srv.messages) == 1
    finally:
        srv.stop()
