"""E-mail over a real SMTP server on 127.0.0.1 (aiosmtpd): structure, login, outages, never twice."""

from __future__ import annotations

import datetime as dt
import email
import email.policy
import re
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.delivery.alerts import process_alerts
from drift.delivery.email import EmailSender
from drift.delivery.outbox import configured_channels, deliver_pending, outbox_summary
from drift.store import outbox as outbox_t
from tests.delivery.conftest import (
    PASSWORD,
    T0,
    USER,
    SmtpServer,
    action,
    fake_renderer,
    make_cfg,
    outcome,
    payload,
)

pytestmark = pytest.mark.network


def email_cfg(tmp_path: Path, port: int, **extra: Any) -> Any:
    ch = {"kind": "email", "name": "mail", "host": "127.0.0.1", "port": port, "sender": "drift@example.test",
          "to": ["owner@example.test", "team@example.test"], "timeout": 5, **extra}
    return make_cfg(tmp_path, [ch])


def senders(cfg: Any) -> dict[str, EmailSender]:
    return {n: EmailSender(cfg, s, n, chart_renderer=fake_renderer) for n, s in configured_channels(cfg)}


def rows(store: Any) -> list[Any]:
    with store.connect() as conn:
        return conn.execute(sa.select(outbox_t).order_by(outbox_t.c.id)).fetchall()


def parse(raw: bytes) -> email.message.EmailMessage:
    return email.message_from_bytes(raw, policy=email.policy.default)  # type: ignore[return-value]


def test_message_structure(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit", since="2024-11-04")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.sent, rep.failed, rep.pending) == (1, 0, 0)
    [m] = smtp_server.messages
    assert m.mail_from == "drift@example.test"
    assert m.rcpt_tos == ["owner@example.test", "team@example.test"]
    msg = parse(m.content)
    assert msg["Subject"] == "drift: k000 — refit"
    [row] = rows(store)
    assert row.status == "sent" and row.sent_at == T0
    assert row.idempotency_key in msg["Message-ID"]
    assert msg.get_content_type() == "multipart/alternative"
    text = msg.get_body(preferencelist=("plain",)).get_content()
    html = msg.get_body(preferencelist=("html",)).get_content()
    for body in (text, html):
        assert "refit" in body and "2025-12-29" in body and "2024-11-04" in body
        assert "statistical evidence, not certainty" in body
        assert "CUSUM of recursive residuals" in body
    # inline charts: every cid reference in the HTML resolves to an attached image part
    cids = re.findall(r'src="cid:([^"]+)"', html)
    assert sorted(c.split(".")[0] for c in cids) == ["cusum", "forecast"]
    parts = {p["Content-ID"].strip("<>"): p for p in msg.walk() if p["Content-ID"]}
    for cid in cids:
        assert parts[cid].get_content_type() == "image/png"
        assert parts[cid].get_content().startswith(b"\x89PNG")
    related = [p for p in msg.walk() if p.get_content_type() == "multipart/related"]
    assert len(related) == 1


def test_no_charts_when_renderer_missing(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")], charts=False)), now=T0)
    deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    msg = parse(smtp_server.messages[0].content)
    assert "cid:" not in msg.get_body(preferencelist=("html",)).get_content()


@pytest.mark.filterwarnings("ignore:Requiring AUTH while not requiring TLS:UserWarning")
def test_plain_auth_with_env_credentials(tmp_path: Path, store: Any, smtp_auth_server: SmtpServer,
                                         monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture) -> None:
    cfg = email_cfg(tmp_path, smtp_auth_server.port, username_env="DRIFT_T_USER", password_env="DRIFT_T_PW")
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    # missing variable: a DeliveryError naming the variable, the row stays pending
    monkeypatch.setenv("DRIFT_T_USER", USER)
    monkeypatch.delenv("DRIFT_T_PW", raising=False)
    caplog.set_level("DEBUG")
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.failed == 1 and "DRIFT_T_PW" in rep.errors[0].error
    assert rows(store)[0].status == "pending" and "DRIFT_T_PW" in rows(store)[0].last_error
    # wrong password: refused, pending, and the secret never shows up in errors or logs
    monkeypatch.setenv("DRIFT_T_PW", "wrong-" + PASSWORD)
    rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1), channels=senders(cfg))
    assert rep.failed == 1 and smtp_auth_server.messages == []
    monkeypatch.setenv("DRIFT_T_PW", PASSWORD)
    rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=2), channels=senders(cfg))
    assert rep.sent == 1 and len(smtp_auth_server.messages) == 1
    everything = caplog.text + " ".join(str(r.last_error) for r in rows(store)) + repr(rep)
    assert PASSWORD not in everything and USER not in everything


def test_starttls_login(tmp_path: Path, store: Any, smtp_tls_server: SmtpServer,
                        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("DRIFT_T_USER", USER)
    monkeypatch.setenv("DRIFT_T_PW", PASSWORD)
    cfg = email_cfg(tmp_path, smtp_tls_server.port, security="starttls", username_env="DRIFT_T_USER",
                    password_env="DRIFT_T_PW")
    process_alerts(cfg, store, outcome(payload("k000", [action("relag", driver="k000_promo", lag=3)])), now=T0)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.sent == 1, rep.errors
    assert "re-lag: k000_promo to lag 3" in parse(smtp_tls_server.messages[0].content)["Subject"]


def test_starttls_required_but_not_configured_fails(tmp_path: Path, store: Any,
                                                    smtp_tls_server: SmtpServer) -> None:
    cfg = email_cfg(tmp_path, smtp_tls_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.failed == 1 and smtp_tls_server.messages == []


def test_refused_connection_then_recovery_sends_once(tmp_path: Path, store: Any) -> None:
    srv = SmtpServer()  # port chosen, server not started: connection refused
    cfg = email_cfg(tmp_path, srv.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")]), payload("k001", [action("refit")])),
                   now=T0)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    # the first row fails, the channel's second row waits for the next round
    assert (rep.sent, rep.failed, rep.deferred, rep.pending) == (0, 1, 1, 2)
    r0 = rows(store)[0]
    assert r0.status == "pending" and r0.attempts == 1 and "cannot reach" in r0.last_error
    assert r0.next_attempt_at == T0 + cfg.alerts.retry_backoff
    srv.start()
    try:
        # before the backoff has passed only the never-tried row goes
        rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(minutes=1), channels=senders(cfg))
        assert rep.sent == 1 and len(srv.messages) == 1
        rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(minutes=6), channels=senders(cfg))
        assert rep.sent == 1 and len(srv.messages) == 2
        rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(days=1), channels=senders(cfg))
        assert rep.sent == 0 and len(srv.messages) == 2
    finally:
        srv.stop()
    assert [r.status for r in rows(store)] == ["sent", "sent"]


@pytest.mark.parametrize("mode", ["reject", "drop-rcpt"])
def test_server_refuses_mid_session_then_recovers(tmp_path: Path, store: Any, smtp_server: SmtpServer,
                                                  mode: str) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    smtp_server.handler.mode = mode
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.failed == 1 and smtp_server.messages == []
    [r] = rows(store)
    assert r.status == "pending" and r.last_error
    smtp_server.handler.mode = "ok"
    later = T0 + dt.timedelta(hours=1)
    assert deliver_pending(cfg, store, now=later, channels=senders(cfg)).sent == 1
    assert deliver_pending(cfg, store, now=later + dt.timedelta(hours=1), channels=senders(cfg)).sent == 0
    assert len(smtp_server.messages) == 1


def test_drop_after_data_is_uncertain_and_not_resent(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    smtp_server.handler.mode = "drop-after-data"
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.uncertain == 1 and smtp_server.handler.dropped_after_data == 1
    smtp_server.handler.mode = "ok"
    for h in (1, 24, 24 * 30):
        deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=h), channels=senders(cfg))
    assert smtp_server.messages == []
    summary = outbox_summary(store)
    assert summary.counts["uncertain"] == 1 and "may have been delivered" in summary.uncertain[0]["last_error"]


def test_crash_between_send_and_mark_sent_never_sends_twice(tmp_path: Path, store: Any, smtp_server: SmtpServer,
                                                            monkeypatch: pytest.MonkeyPatch) -> None:
    import drift.delivery.outbox as ob

    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    real = ob._mark_sent

    def crash(*a: Any, **k: Any) -> None:
        raise RuntimeError("killed between send and mark-sent")

    monkeypatch.setattr(ob, "_mark_sent", crash)
    with pytest.raises(RuntimeError):
        deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert len(smtp_server.messages) == 1 and rows(store)[0].status == "delivering"  # handed over
    monkeypatch.setattr(ob, "_mark_sent", real)
    # within the claim lease: left alone; after it: uncertain, reported, never re-sent
    rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(minutes=1), channels=senders(cfg))
    assert (rep.sent, rep.uncertain) == (0, 0) and rows(store)[0].status == "delivering"
    rep = deliver_pending(cfg, store, now=T0 + ob.DEFAULT_SENDING_LEASE, channels=senders(cfg))
    assert (rep.sent, rep.uncertain) == (0, 1)
    deliver_pending(cfg, store, now=T0 + dt.timedelta(days=3), channels=senders(cfg))
    assert len(smtp_server.messages) == 1
    assert rows(store)[0].status == "uncertain"
    assert outbox_summary(store).counts["uncertain"] == 1


def test_crash_before_the_handover_is_sent_again_once(tmp_path: Path, store: Any, smtp_server: SmtpServer,
                                                      monkeypatch: pytest.MonkeyPatch) -> None:
    """A process that dies after claiming a row but before the message data left (here: while composing it)
    certainly delivered nothing: once the lease has passed the row is sent again, once."""
    import drift.delivery.outbox as ob

    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)

    def die(*a: Any, **k: Any) -> None:
        raise KeyboardInterrupt  # stands in for the process being killed: not a channel error

    monkeypatch.setattr(EmailSender, "_connect", die)
    with pytest.raises(KeyboardInterrupt):
        deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    monkeypatch.undo()
    assert rows(store)[0].status == "sending" and smtp_server.messages == []
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(minutes=1), channels=senders(cfg)).sent == 0
    rep = deliver_pending(cfg, store, now=T0 + ob.DEFAULT_SENDING_LEASE, channels=senders(cfg))
    assert (rep.recovered, rep.sent, rep.uncertain) == (1, 1, 0)
    assert len(smtp_server.messages) == 1 and rows(store)[0].status == "sent"


def test_a_run_whose_claim_expired_does_not_touch_the_row(tmp_path: Path, store: Any, smtp_server: SmtpServer,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    """A run that stalls past its lease, while a later run takes the row over, neither sends it nor marks it."""
    import drift.delivery.outbox as ob

    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    real_connect = EmailSender._connect
    later = T0 + ob.DEFAULT_SENDING_LEASE + dt.timedelta(minutes=1)

    def stall_then_connect(self: Any) -> Any:
        # meanwhile a later run finds the claim expired, recovers the row and sends it
        monkeypatch.setattr(EmailSender, "_connect", real_connect)
        assert deliver_pending(cfg, store, now=later, channels=senders(cfg)).sent == 1
        return real_connect(self)

    monkeypatch.setattr(EmailSender, "_connect", stall_then_connect)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.sent, rep.failed, rep.uncertain) == (0, 0, 0)
    assert len(smtp_server.messages) == 1 and rows(store)[0].status == "sent"


def test_operator_resend_of_uncertain(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    from drift.delivery.outbox import resolve_uncertain

    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    smtp_server.handler.mode = "drop-after-data"
    deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    smtp_server.handler.mode = "ok"
    [r] = rows(store)
    assert resolve_uncertain(store, [r.id], resend=True, now=T0) == 1
    assert deliver_pending(cfg, store, now=T0, channels=senders(cfg)).sent == 1
    assert len(smtp_server.messages) == 1


def test_prerendered_row_is_sent_as_is(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    """The digest queues rows whose notice carries its own text and HTML (key ``digest:<date>:<channel>``)."""
    import json

    cfg = email_cfg(tmp_path, smtp_server.port)
    key = "digest:2025-12-29:mail"
    with store.begin() as conn:
        conn.execute(outbox_t.insert().values(
            alert=None, channel="mail", idempotency_key=key, subject="drift digest — week to 2025-12-29",
            payload=json.dumps({"event": "digest", "key": key, "text": "plain digest", "html": "<p>html digest</p>"}),
            status="pending", attempts=0, next_attempt_at=T0, created_at=T0))
    assert deliver_pending(cfg, store, now=T0, channels=senders(cfg)).sent == 1
    msg = parse(smtp_server.messages[0].content)
    assert msg["Subject"] == "drift digest — week to 2025-12-29" and msg["X-Drift-Key"] == key
    assert msg["Message-ID"] == "<digest.2025-12-29.mail@drift>"
    assert msg.get_body(preferencelist=("plain",)).get_content().strip() == "plain digest"
    assert "<p>html digest</p>" in msg.get_body(preferencelist=("html",)).get_content()


def test_real_chart_renderer_inline_images(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    pytest.importorskip("drift.delivery.charts")
    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit", since="2024-11-04")])), now=T0)
    assert deliver_pending(cfg, store, now=T0).sent == 1  # default renderer: drift.delivery.charts
    msg = parse(smtp_server.messages[0].content)
    html = msg.get_body(preferencelist=("html",)).get_content()
    cids = re.findall(r'src="cid:([^"]+)"', html)
    assert cids
    parts = {p["Content-ID"].strip("<>"): p for p in msg.walk() if p["Content-ID"]}
    assert all(parts[c].get_content().startswith(b"\x89PNG") for c in cids)


def test_digest_data_images_become_inline_parts() -> None:
    # common practice, no source: e-mail clients block data: URIs, so the digest's images go as cid parts
    import base64

    from drift.delivery.email import _inline_data_images

    png = b"\x89PNG\r\n\x1a\n" + b"0" * 20
    b64 = base64.b64encode(png).decode()
    html = "".join(f'<img alt="c{i}" src="data:image/png;base64,{b64}">' for i in range(12))
    out, pngs = _inline_data_images(html)
    assert "data:image" not in out and len(pngs) == 12
    assert out.count('src="cid:img1"') == 1 and out.count('src="cid:img11"') == 1
    assert all(v == png for v in pngs.values())


def test_hostile_model_name_cannot_inject_headers_or_markup(tmp_path: Path, store: Any,
                                                            smtp_server: SmtpServer) -> None:
    """A model named with a line break and markup (common practice, no source: header injection and HTML
    injection): the recipients are the configured ones only, the subject stays one line, the HTML part shows
    the name as text."""
    cfg = email_cfg(tmp_path, smtp_server.port)
    evil = "k0<img src=x onerror=alert(1)>\r\nBcc: thief@example.test\r\nX-Evil: 1"
    process_alerts(cfg, store, outcome(payload(evil, [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert rep.sent == 1, rep.describe()
    [m] = smtp_server.messages
    assert m.rcpt_tos == ["owner@example.test", "team@example.test"]
    msg = parse(m.content)
    assert msg["Bcc"] is None and msg["X-Evil"] is None
    subject = msg["Subject"]
    assert "\n" not in subject and "\r" not in subject and "Bcc: thief@example.test" in subject
    html = msg.get_body(preferencelist=("html",)).get_content()
    assert "<img src=x" not in html and "&lt;img src=x onerror=alert(1)&gt;" in html
    raw_headers = m.content.split(b"\r\n\r\n", 1)[0]
    assert not any(line.lower().startswith((b"bcc:", b"x-evil:")) for line in raw_headers.split(b"\r\n"))


def test_header_text_is_one_bounded_line() -> None:
    from drift.delivery.email import MAX_SUBJECT, header_text

    assert header_text("a\r\nb\tc\x00d\u2028e") == "a b c d e"
    long = header_text("x" * 1000)
    assert len(long) == MAX_SUBJECT and long.endswith("…")


def test_message_that_cannot_be_built_is_not_sent_and_stays_pending(tmp_path: Path, store: Any,
                                                                    smtp_server: SmtpServer,
                                                                    monkeypatch: pytest.MonkeyPatch) -> None:
    cfg = email_cfg(tmp_path, smtp_server.port)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)

    def broken(self: Any, msg: Any) -> Any:
        raise ValueError("cannot compose")

    monkeypatch.setattr(EmailSender, "build", broken)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.failed, rep.uncertain) == (1, 0) and "could not be composed" in rep.errors[0].error
    assert rows(store)[0].status == "pending" and smtp_server.messages == []


def test_non_ascii_address_is_a_certain_failure(tmp_path: Path, store: Any, smtp_server: SmtpServer) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "email", "name": "mail", "host": "127.0.0.1", "port": smtp_server.port,
                               "sender": "drift@example.test", "to": ["plánning@example.test"], "timeout": 5}])
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0, channels=senders(cfg))
    assert (rep.failed, rep.uncertain) == (1, 0) and "not plain ASCII" in rep.errors[0].error
    assert rows(store)[0].status == "pending"
