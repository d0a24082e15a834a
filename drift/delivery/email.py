"""E-mail channel: smtplib only, security none | starttls | ssl, optional login from environment variables.

The message is ``multipart/alternative`` with a plain-text part and a ``multipart/related`` HTML part that
holds the charts as inline PNG images (``cid:`` references). Its ``Message-ID`` is
``<KEY@drift>`` with the outbox idempotency key (characters not allowed there become dots; the raw key is
also in ``X-Drift-Key``). A row whose notice already carries ``text`` and ``html`` strings (the digest)
is sent with those bodies as they are. User strings (model and series names, reasons) only reach headers
through the ``Subject``, which is folded to one line with control characters removed, so a name holding a
line break cannot add a header or a recipient; recipients come from the config alone.

Which failures mean "not delivered" and which mean "unknown" (see :mod:`drift.delivery.outbox`). The
session is driven step by step (greeting, EHLO, [STARTTLS, AUTH], MAIL, RCPT, DATA, the data, the final
reply) so every failure is placed before or after the moment the server could have taken the message:

===================================================  ===========================================
what happened                                        outcome
===================================================  ===========================================
cannot connect; greeting not 220; EHLO and HELO      ChannelUnavailable: retried later, the
refused; TLS or login fails; a credential variable   channel's other rows wait for the next round
is missing; a ``421`` reply at any step; the
connection drops or times out before the data
MAIL refused (4xx or 5xx: it concerns the sender or  DeliveryError: retried later, until
the session, e.g. TLS required, and is the same for  ``alerts.max_attempts`` tries
every notice); RCPT (every recipient, one at least
with 4xx), the DATA command or the final reply
refused with a 4xx code; the data could not be
written out in full
the DATA command or the final reply refused with a   DeliveryRefused: the row is dead (given
5xx code; every recipient refused, each with a 5xx   up, shown by status and the digest)
code
some recipients refused at RCPT, the others took     PartialDelivery: recorded per recipient;
the message                                          the ones refused with 4xx are retried
                                                     alone, a 5xx one makes the row dead
the connection drops or times out after the whole    DeliveryUncertain: the server may have
message was written, before the final reply          accepted it; never re-sent automatically
===================================================  ===========================================

A refusal after the data (a 4xx/5xx final reply) is certain: the server answered that it did not take
the message. Only silence after the data is uncertain. A 5xx reply is permanent (RFC 5321 section 4.2.1:
"the SMTP client SHOULD NOT repeat the exact request"); a 4xx one is transient. The row's ``recipients``
record says who got the message: a later try (or an operator's resend) goes to the others only.

Credentials are read from the variables named by ``username_env`` / ``password_env`` at send time, never
from the YAML, and never appear in a log line or an error message (errors name the variable only).
"""

from __future__ import annotations

import base64
import email.policy
import logging
import os
import re
import smtplib
import ssl
from collections.abc import Callable, Mapping, Sequence
from email.message import EmailMessage
from email.utils import formatdate
from typing import Any

from drift.config import Config, EmailChannel
from drift.delivery.messages import CHART_KINDS, RenderedMessage, render
from drift.delivery.outbox import (
    Channel,
    ChannelUnavailable,
    DeliveryError,
    DeliveryRefused,
    DeliveryUncertain,
    OutboxMessage,
    PartialDelivery,
    register_channel,
)

log = logging.getLogger(__name__)

ChartRenderer = Callable[..., Mapping[str, bytes]]

#: domain part of the Message-ID and of the image Content-IDs
MSGID_DOMAIN = "drift"
_NOT_ATOM = re.compile(r"[^A-Za-z0-9!#$%&'*+/=?^_`{|}~.-]+")
#: control characters (line breaks included) replaced by a space in a header value
_CONTROL = re.compile(r"[\x00-\x1f\x7f\u0085\u2028\u2029]+")
#: longest subject kept (characters); longer ones are cut with an ellipsis
MAX_SUBJECT = 250
#: the reply that means "service not available, closing the connection": the server, not the message
_CLOSING = 421
#: a line starting with a dot is sent with one more (RFC 5321 section 4.5.2, transparency)
_LEADING_DOT = re.compile(rb"(?m)^\.")


def tls_context() -> ssl.SSLContext:
    """The TLS context for ``starttls`` and ``ssl`` (system trust store, hostname checked)."""
    return ssl.create_default_context()


def _default_renderer() -> ChartRenderer | None:
    try:
        from drift.delivery.charts import render_model_charts
    except ImportError:
        return None
    return render_model_charts


def _env(var: str | None, what: str) -> str | None:
    if not var:
        return None
    value = os.environ.get(var)
    if value is None or value == "":
        raise ChannelUnavailable(f"the environment variable {var} (the SMTP {what}) is not set")
    return value


@register_channel
class EmailSender(Channel):
    """Deliver notices by SMTP (one connection per message).

    Parameters
    ----------
    cfg, spec, name : see :class:`drift.delivery.outbox.Channel`; ``spec`` is an EmailChannel.
    chart_renderer : ``f(model_payload, kinds) -> {kind: png bytes}``; default
        ``drift.delivery.charts.render_model_charts`` when importable, else no charts.
    """

    kind = "email"
    idempotent = False
    reports_handover = True

    def __init__(self, cfg: Config, spec: EmailChannel, name: str, *,
                 chart_renderer: ChartRenderer | None = None) -> None:
        super().__init__(cfg, spec, name)
        self.spec: EmailChannel = spec
        self._renderer = chart_renderer if chart_renderer is not None else _default_renderer()

    # ------------------------------------------------------------------ building
    def _charts(self, notice: Mapping[str, Any]) -> tuple[dict[str, bytes], list[str]]:
        charts = notice.get("charts")
        if not isinstance(charts, Mapping) or self._renderer is None:
            return {}, []
        kinds: Sequence[str] = CHART_KINDS.get(str(notice.get("action")), ())
        model_payload = {"name": notice.get("model"), **(notice.get("context") or {}), "charts": charts,
                         "as_of": notice.get("as_of"), "actions": [notice.get("detail") or {}]}
        try:
            images = dict(self._renderer(model_payload, list(kinds)))
        except Exception:
            log.exception("charts for %s could not be drawn; sending without them", notice.get("model"))
            return {}, ["The charts could not be drawn for this message."]
        notes = [f"No {k.replace('_', ' ')} chart: no data for it." for k in kinds if k not in images]
        return {k: v for k, v in images.items() if isinstance(v, (bytes, bytearray))}, notes

    def build(self, msg: OutboxMessage) -> EmailMessage:
        """The complete e-mail for one outbox message."""
        notice = msg.notice
        ident = _msgid_safe(msg.key)
        pre_text, pre_html = notice.get("text"), notice.get("html")
        if isinstance(pre_text, str) and isinstance(pre_html, str):
            # a message rendered by its producer (the digest): its embedded data: images become inline
            # attachments (many mail clients block data: URIs in e-mail)
            html, pngs = _inline_data_images(pre_html)
            cids = {kind: f"{kind}.{ident[:16]}@{MSGID_DOMAIN}" for kind in pngs}
            for kind, cid in cids.items():
                html = html.replace(f'src="cid:{kind}"', f'src="cid:{cid}"')
            body = RenderedMessage(subject=msg.subject, text=pre_text, html=html)
        else:
            pngs, notes = self._charts(notice)
            cids = {kind: f"{kind}.{ident[:16]}@{MSGID_DOMAIN}" for kind in pngs}
            body = render(notice, images={k: f"cid:{c}" for k, c in cids.items()}, notes=notes)
        em = EmailMessage()
        em["Subject"] = header_text(msg.subject or body.subject)
        em["From"] = self.spec.sender
        em["To"] = ", ".join(self.spec.to)
        em["Date"] = formatdate(localtime=False, usegmt=True)
        em["Message-ID"] = f"<{ident}@{MSGID_DOMAIN}>"
        em["X-Drift-Key"] = msg.key
        em.set_content(body.text)
        em.add_alternative(body.html, subtype="html")
        if pngs:
            html_part = em.get_body(preferencelist=("html",))
            if not isinstance(html_part, EmailMessage):  # pragma: no cover - we just added it
                raise DeliveryError("internal: the HTML part of the message is missing")
            for kind, data in pngs.items():
                html_part.add_related(bytes(data), maintype="image", subtype="png", cid=f"<{cids[kind]}>",
                                      filename=f"{kind}.png", disposition="inline")
        return em

    # ------------------------------------------------------------------ sending
    def _connect(self) -> smtplib.SMTP:
        s = self.spec
        where = f"the SMTP server {s.host}:{s.port} ({s.security})"
        try:
            if s.security == "ssl":
                smtp: smtplib.SMTP = smtplib.SMTP_SSL(s.host, s.port, timeout=s.timeout, context=tls_context())
            else:
                smtp = smtplib.SMTP(s.host, s.port, timeout=s.timeout)
        except smtplib.SMTPConnectError as exc:
            raise ChannelUnavailable(f"{where} refused the connection: {exc.smtp_code} "
                                     f"{_text(exc.smtp_error)}") from None
        except (OSError, smtplib.SMTPException) as exc:
            raise ChannelUnavailable(f"cannot reach {where}: {exc.__class__.__name__}: {exc}") from None
        try:
            self._hello(smtp, where)
            if s.security == "starttls":
                smtp.starttls(context=tls_context())
                self._hello(smtp, where)
        except ChannelUnavailable:
            _quiet_close(smtp)
            raise
        except (OSError, smtplib.SMTPException) as exc:
            _quiet_close(smtp)
            raise ChannelUnavailable(f"cannot reach {where}: {exc.__class__.__name__}: {exc}") from None
        return smtp

    @staticmethod
    def _hello(smtp: smtplib.SMTP, where: str) -> None:
        """EHLO, falling back to HELO (RFC 5321 section 3.2) unless the server is closing (421)."""
        code, resp = smtp.ehlo()
        if code == 250:
            return
        if code != _CLOSING:
            code2, resp2 = smtp.helo()
            if code2 == 250:
                return
            code, resp = code2, resp2
        raise ChannelUnavailable(f"{where} refused EHLO/HELO: {code} {_text(resp)}")

    def _login(self, smtp: smtplib.SMTP) -> None:
        user = _env(self.spec.username_env, "user name")
        password = _env(self.spec.password_env, "password")
        if user is None and password is None:
            return
        if user is None or password is None:
            missing = "username_env" if user is None else "password_env"
            raise ChannelUnavailable(f"SMTP login needs both username_env and password_env; {missing} is not set "
                                     "in the config")
        try:
            smtp.login(user, password)
        except UnicodeError:  # smtplib sends AUTH as ASCII: nothing has been sent yet
            raise ChannelUnavailable(f"the SMTP user name or password (from {self.spec.username_env}/"
                                     f"{self.spec.password_env}) is not plain ASCII, which SMTP AUTH here cannot "
                                     "carry") from None
        except smtplib.SMTPException as exc:
            code = getattr(exc, "smtp_code", None)
            raise ChannelUnavailable(f"SMTP login to {self.spec.host} failed (credentials from "
                                     f"{self.spec.username_env}/{self.spec.password_env}; reply {code})") from None
        except OSError as exc:
            raise ChannelUnavailable(f"SMTP login to {self.spec.host} failed: {exc.__class__.__name__}") from None

    def send(self, msg: OutboxMessage) -> dict[str, dict[str, Any]]:
        # recipients that already got it (an earlier try) or were refused for good are not sent to again
        to = [r for r in self.spec.to if msg.recipients.get(r, {}).get("status") != "sent"
              and not msg.recipients.get(r, {}).get("permanent")]
        if not to:
            return {}
        try:
            em = self.build(msg)
            data = em.as_bytes(policy=email.policy.SMTP)  # CRLF line ends, as the wire wants them
        except Exception as exc:  # nothing was sent: a message that cannot be built is certainly not delivered
            log.exception("e-mail %s could not be composed", msg.key[:12])
            raise DeliveryError(f"the message could not be composed ({exc.__class__.__name__}); nothing was "
                                "sent") from None
        # read the credentials before connecting, so a missing variable is reported as such
        _env(self.spec.username_env, "user name")
        _env(self.spec.password_env, "password")
        smtp = self._connect()
        try:
            self._login(smtp)
            outcome = self._transfer(smtp, data, msg.handing_over, to)
        finally:
            _quiet_close(smtp)
        log.info("e-mail %s sent to %d recipient(s) via %s", msg.key[:12], len(outcome), self.name)
        return outcome

    def _transfer(self, smtp: smtplib.SMTP, data: bytes, handing_over: Callable[[], None],
                  to: Sequence[str]) -> dict[str, dict[str, Any]]:
        """MAIL, RCPT, DATA, the data and the final reply, each failure placed before or after the data
        went out (the table in the module docstring); ``handing_over`` is called just before the data.
        Returns ``{recipient: {"status": "sent"}}``; raises PartialDelivery when some were refused."""
        host = self.spec.host

        def refused(step: str, code: int, resp: Any, recipients: dict[str, dict[str, Any]] | None = None
                    ) -> DeliveryError:
            text = f"SMTP server {host} refused {step}: {code} {_text(resp)}"
            if code == _CLOSING:
                return ChannelUnavailable(text)
            err = DeliveryRefused(text) if 500 <= code < 600 else DeliveryError(text)
            err.recipients = recipients  # type: ignore[attr-defined]
            return err

        refusals: dict[str, dict[str, Any]] = {}
        accepted: list[str] = []
        try:
            code, resp = smtp.mail(self.spec.sender)
            if code != 250:  # about the sender or the session, the same for every notice: retried even on 5xx
                text = f"SMTP server {host} refused the sender (MAIL): {code} {_text(resp)}"
                raise ChannelUnavailable(text) if code == _CLOSING else DeliveryError(text)
            for rcpt in to:
                code, resp = smtp.rcpt(rcpt)
                if code in (250, 251):
                    accepted.append(rcpt)
                elif code == _CLOSING:
                    raise refused(f"the recipient {rcpt} (RCPT)", code, resp)
                else:
                    refusals[rcpt] = {"status": "refused", "permanent": 500 <= code < 600,
                                      "reply": f"{code} {_text(resp)}"[:300]}
            if not accepted:
                text = "; ".join(f"{r}: {v['reply']}" for r, v in refusals.items())
                every = f"SMTP server {host} refused every recipient ({text})"
                err = (DeliveryRefused(every) if all(v["permanent"] for v in refusals.values())
                       else DeliveryError(every))
                err.recipients = refusals  # type: ignore[attr-defined]
                raise err
            if refusals:
                log.warning("SMTP server %s refused some recipients: %s", host,
                            "; ".join(f"{r}: {v['reply']}" for r, v in refusals.items()))
            code, resp = smtp.docmd("data")
            if code != 354:
                raise refused("to take the message (DATA)", code, resp)
        except (smtplib.SMTPServerDisconnected, OSError) as exc:
            raise ChannelUnavailable(f"SMTP server {host} closed the connection or stopped answering before the "
                                     f"message was sent: {exc.__class__.__name__}: {exc}") from None
        except smtplib.SMTPException as exc:
            raise DeliveryError(f"SMTP server {host}: {exc.__class__.__name__}: {exc}") from None
        except UnicodeError:
            raise DeliveryError("the sender or a recipient address is not plain ASCII, which this SMTP "
                                "session cannot carry; fix alerts.channels in the config") from None
        body = _LEADING_DOT.sub(b"..", data)
        if not body.endswith(b"\r\n"):
            body += b"\r\n"
        handing_over()  # the point of no return (the outbox records it before the data leaves)
        try:
            smtp.send(body + b".\r\n")
        except (smtplib.SMTPServerDisconnected, OSError) as exc:
            # the end-of-data mark is the last thing written, so the server cannot have taken the message
            raise DeliveryError(f"SMTP server {host}: the connection failed while the message was being written "
                                f"({exc.__class__.__name__}); it was not complete, so not delivered") from None
        try:
            code, resp = smtp.getreply()
        except (smtplib.SMTPServerDisconnected, OSError, smtplib.SMTPException) as exc:
            what = ("did not answer" if isinstance(exc, (smtplib.SMTPServerDisconnected, OSError))
                    else "gave an unreadable answer")
            err = DeliveryUncertain(f"SMTP server {host} {what} after the whole message was sent "
                                    f"({exc.__class__.__name__}); it may have been delivered")
            err.recipients = {**refusals, **{r: {"status": "uncertain"} for r in accepted}}  # type: ignore[attr-defined]
            raise err from None
        if code != 250:
            raise refused("the message after its data", code, resp, refusals or None)
        got = {r: {"status": "sent"} for r in accepted}
        if refusals:
            raise PartialDelivery(f"SMTP server {host} took the message for {', '.join(accepted)} only",
                                  {**got, **refusals})
        return got


def header_text(value: Any) -> str:
    """A header value made safe: one line, no control characters, at most :data:`MAX_SUBJECT` characters."""
    text = " ".join(_CONTROL.sub(" ", str(value)).split())
    return text if len(text) <= MAX_SUBJECT else text[:MAX_SUBJECT - 1].rstrip() + "…"


def _msgid_safe(key: str) -> str:
    """The key as the left part of a Message-ID (dot-atom characters only; hex keys pass unchanged)."""
    return _NOT_ATOM.sub(".", key).strip(".") or "drift"


def _text(resp: Any) -> str:
    if isinstance(resp, bytes):
        return resp.decode("utf-8", "replace")
    return str(resp)


def _quiet_close(smtp: smtplib.SMTP) -> None:
    try:
        smtp.quit()
    except (smtplib.SMTPException, OSError):
        try:
            smtp.close()
        except OSError:
            pass


_DATA_IMG = re.compile(r'src="data:image/png;base64,([A-Za-z0-9+/=\s]+)"')


def _inline_data_images(html: str) -> tuple[str, dict[str, bytes]]:
    """Replace ``src="data:image/png;base64,..."`` by ``cid:`` references; return the HTML and the PNGs
    keyed by a placeholder kind (``img0``, ``img1``, ...)."""
    pngs: dict[str, bytes] = {}

    def swap(mt: re.Match[str]) -> str:
        kind = f"img{len(pngs)}"
        pngs[kind] = base64.b64decode(mt.group(1))
        return f'src="cid:{kind}"'

    return _DATA_IMG.sub(swap, html), pngs
