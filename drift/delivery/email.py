"""E-mail channel: smtplib only, security none | starttls | ssl, optional login from environment variables.

The message is ``multipart/alternative`` with a plain-text part and a ``multipart/related`` HTML part that
holds the charts as inline PNG images (``cid:`` references). Its ``Message-ID`` is
``<KEY@drift>`` with the outbox idempotency key (characters not allowed there become dots; the raw key is
also in ``X-Drift-Key``). A row whose notice already carries ``text`` and ``html`` strings (the digest)
is sent with those bodies as they are.

Which failures mean "not delivered" and which mean "unknown" (see :mod:`drift.delivery.outbox`):

- cannot connect, TLS or login fails, a credential variable is missing -> ChannelUnavailable (retried later,
  the channel's other rows wait);
- the server refuses MAIL/RCPT/DATA with a reply code, or drops the connection before the message data
  was sent -> DeliveryError (retried later);
- the connection drops or times out *while the message data is sent or its reply awaited* ->
  DeliveryUncertain (the server may have accepted it; not re-sent automatically).

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
    DeliveryUncertain,
    OutboxMessage,
    register_channel,
)

log = logging.getLogger(__name__)

ChartRenderer = Callable[..., Mapping[str, bytes]]

#: domain part of the Message-ID and of the image Content-IDs
MSGID_DOMAIN = "drift"
_NOT_ATOM = re.compile(r"[^A-Za-z0-9!#$%&'*+/=?^_`{|}~.-]+")


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
        em["Subject"] = msg.subject or body.subject
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
        try:
            if s.security == "ssl":
                smtp: smtplib.SMTP = smtplib.SMTP_SSL(s.host, s.port, timeout=s.timeout, context=tls_context())
            else:
                smtp = smtplib.SMTP(s.host, s.port, timeout=s.timeout)
            try:
                smtp.ehlo()
                if s.security == "starttls":
                    smtp.starttls(context=tls_context())
                    smtp.ehlo()
            except BaseException:
                _quiet_close(smtp)
                raise
        except (OSError, smtplib.SMTPException) as exc:
            raise ChannelUnavailable(f"cannot reach the SMTP server {s.host}:{s.port} ({s.security}): "
                                     f"{exc.__class__.__name__}: {exc}") from None
        return smtp

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
        except smtplib.SMTPException as exc:
            code = getattr(exc, "smtp_code", None)
            raise ChannelUnavailable(f"SMTP login to {self.spec.host} failed (credentials from "
                                     f"{self.spec.username_env}/{self.spec.password_env}; reply {code})") from None
        except OSError as exc:
            raise ChannelUnavailable(f"SMTP login to {self.spec.host} failed: {exc.__class__.__name__}") from None

    def send(self, msg: OutboxMessage) -> None:
        em = self.build(msg)
        # read the credentials before connecting, so a missing variable is reported as such
        _env(self.spec.username_env, "user name")
        _env(self.spec.password_env, "password")
        smtp = self._connect()
        try:
            self._login(smtp)
            self._transfer(smtp, em)
        finally:
            _quiet_close(smtp)
        log.info("e-mail %s sent to %d recipient(s) via %s", msg.key[:12], len(self.spec.to), self.name)

    def _transfer(self, smtp: smtplib.SMTP, em: EmailMessage) -> None:
        """MAIL, RCPT, DATA step by step, so a failure can be placed before or after the data went out."""
        host = self.spec.host
        try:
            code, resp = smtp.mail(self.spec.sender)
            if code != 250:
                raise DeliveryError(f"SMTP server {host} refused the sender: {code} {_text(resp)}")
            accepted = 0
            refusals = []
            for rcpt in self.spec.to:
                code, resp = smtp.rcpt(rcpt)
                if code in (250, 251):
                    accepted += 1
                else:
                    refusals.append(f"{rcpt}: {code} {_text(resp)}")
            if accepted == 0:
                raise DeliveryError(f"SMTP server {host} refused every recipient ({'; '.join(refusals)})")
            if refusals:
                log.warning("SMTP server %s refused some recipients: %s", host, "; ".join(refusals))
        except (smtplib.SMTPServerDisconnected, OSError) as exc:
            raise DeliveryError(f"SMTP server {host} closed the connection before the message was sent: "
                                f"{exc.__class__.__name__}: {exc}") from None
        except smtplib.SMTPException as exc:
            raise DeliveryError(f"SMTP server {host}: {exc.__class__.__name__}: {exc}") from None
        try:
            # bytes go to the wire as they are: CRLF line ends (smtplib fixes them for str only)
            code, resp = smtp.data(em.as_bytes(policy=email.policy.SMTP))
        except smtplib.SMTPDataError as exc:
            raise DeliveryError(f"SMTP server {host} refused the message: {exc.smtp_code} "
                                f"{_text(exc.smtp_error)}") from None
        except (smtplib.SMTPServerDisconnected, OSError) as exc:
            raise DeliveryUncertain(f"SMTP server {host} dropped the connection while the message was being "
                                    f"sent ({exc.__class__.__name__}); it may have been delivered") from None
        except smtplib.SMTPException as exc:
            raise DeliveryError(f"SMTP server {host}: {exc.__class__.__name__}: {exc}") from None
        if code != 250:
            raise DeliveryError(f"SMTP server {host} refused the message: {code} {_text(resp)}")


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
