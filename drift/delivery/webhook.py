"""Webhook channel: one JSON POST per notice with ``urllib.request`` and a timeout.

Body: the notice without chart data, plus ``text`` (the plain-text message). Headers: ``Content-Type:
application/json``, ``Idempotency-Key: <key>`` (a receiver may deduplicate on it), and one header per
``headers_env`` entry whose value is read from the named environment variable (e.g. a token; never logged;
a missing variable is a ChannelUnavailable naming the variable).

Outcomes: 2xx -> sent. Non-2xx -> the receiver answered, so it did not take the notice: a 4xx answer that
refuses this request for good (400, 404, 410, 413, 422, ...) -> DeliveryRefused (the row is given up,
``dead``); 401, 403 and 407 (credentials: the same for every notice) -> ChannelUnavailable; 408, 425, 429
and 5xx -> DeliveryError, retried. Connection refused / name not resolved, or any failure before the
connection (TLS included) is up -> ChannelUnavailable. A timeout or a reset once connected, when the request
may have gone out -> DeliveryUncertain (not re-sent automatically). The hand-over (the row becomes
``delivering``) is reported once the connection is up, just before the request is written.

Only ``http://`` and ``https://`` URLs are accepted (checked when the config is loaded, and again here).
Redirects are never followed: a 3xx answer is a DeliveryError naming the ``Location`` (set ``url`` to the
final address). Following one would send the notice and its token headers to an address the config does
not name, possibly over another scheme, and would turn the POST into a GET on 301/302/303.
"""

from __future__ import annotations

import json
import os
import socket
import urllib.error
import urllib.parse
import urllib.request
from typing import Any

from drift.config import Config, WebhookChannel
from drift.delivery.messages import render
from drift.delivery.outbox import (
    Channel,
    ChannelUnavailable,
    DeliveryError,
    DeliveryRefused,
    DeliveryUncertain,
    OutboxMessage,
    register_channel,
)

#: bytes of a non-2xx response body quoted in the error
_ERROR_BODY = 200
#: URL schemes a webhook may use
SCHEMES = ("http", "https")
#: 4xx answers about the credentials (every notice alike: the channel waits) and those worth retrying
_CREDENTIALS, _TRANSIENT_4XX = (401, 403, 407), (408, 425, 429)


class _NoRedirect(urllib.request.HTTPRedirectHandler):
    """Never follow a redirect: urllib then raises the 3xx answer as an HTTPError."""

    def redirect_request(self, req: Any, fp: Any, code: int, msg: str, headers: Any, newurl: str) -> None:
        return None


def _after_connect(cls: Any, handover: Any) -> Any:
    """``cls`` (an http.client connection class) calling ``handover()`` once connected (TLS included)."""

    class Connection(cls):  # type: ignore[misc, valid-type]
        def connect(self) -> None:
            super().connect()
            handover()

    return Connection


class _HandoverHttp(urllib.request.HTTPHandler):
    def __init__(self, handover: Any) -> None:
        super().__init__()
        self._handover = handover

    def do_open(self, http_class: Any, req: Any, **kwargs: Any) -> Any:
        return super().do_open(_after_connect(http_class, self._handover), req, **kwargs)


class _HandoverHttps(urllib.request.HTTPSHandler):
    def __init__(self, handover: Any) -> None:
        super().__init__()
        self._handover = handover

    def do_open(self, http_class: Any, req: Any, **kwargs: Any) -> Any:
        return super().do_open(_after_connect(http_class, self._handover), req, **kwargs)


def _opener(handover: Any) -> urllib.request.OpenerDirector:
    """An opener that follows no redirect and reports the hand-over once the connection is up, just before
    the request is written (proxies from the environment still apply)."""
    return urllib.request.build_opener(_NoRedirect, _HandoverHttp(handover), _HandoverHttps(handover))


@register_channel
class WebhookSender(Channel):
    """POST notices as JSON (see the module docstring)."""

    kind = "webhook"
    idempotent = False
    reports_handover = True

    def __init__(self, cfg: Config, spec: WebhookChannel, name: str) -> None:
        super().__init__(cfg, spec, name)
        self.spec: WebhookChannel = spec
        if urllib.parse.urlsplit(spec.url).scheme.lower() not in SCHEMES:
            raise ValueError(f"webhook channel {name!r}: url must start with http:// or https://")

    def body(self, msg: OutboxMessage) -> dict[str, Any]:
        doc = {k: v for k, v in msg.notice.items() if k != "charts"}
        doc["key"] = msg.key
        doc["subject"] = msg.subject
        doc["text"] = render(msg.notice).text
        return doc

    def _headers(self) -> dict[str, str]:
        headers = {"Content-Type": "application/json; charset=utf-8", "User-Agent": "drift"}
        for header, var in sorted(self.spec.headers_env.items()):
            value = os.environ.get(var)
            if not value:
                raise ChannelUnavailable(f"the environment variable {var} (webhook header {header}) is not set")
            headers[header] = value
        return headers

    def send(self, msg: OutboxMessage) -> None:
        headers = self._headers()
        headers["Idempotency-Key"] = msg.key
        data = json.dumps(self.body(msg), default=str).encode("utf-8")
        req = urllib.request.Request(self.spec.url, data=data, headers=headers, method="POST")
        connected: list[bool] = []

        def handover() -> None:  # once connected: the request may reach the receiver from then on
            msg.handing_over()
            connected.append(True)

        try:
            with _opener(handover).open(req, timeout=self.spec.timeout) as resp:
                status = resp.status
        except urllib.error.HTTPError as exc:
            if 300 <= exc.code < 400:
                where = exc.headers.get("Location", "?") if exc.headers else "?"
                raise DeliveryError(f"webhook {self.name} answered HTTP {exc.code}, a redirect to {where[:200]}; "
                                    "redirects are not followed: set the channel's url to the final "
                                    "address") from None
            snippet = exc.read(_ERROR_BODY).decode("utf-8", "replace") if exc.fp else ""
            for header in self.spec.headers_env:  # a receiver echoing the request must not leak a token
                value = headers.get(header)
                if value:
                    snippet = snippet.replace(value, "***")
            text = f"webhook {self.name} answered HTTP {exc.code}: {snippet.strip()}"
            if exc.code in _CREDENTIALS:
                raise ChannelUnavailable(text) from None
            if 400 <= exc.code < 500 and exc.code not in _TRANSIENT_4XX:
                raise DeliveryRefused(text) from None
            raise DeliveryError(text) from None
        except urllib.error.URLError as exc:
            reason = exc.reason
            if not connected or isinstance(reason, (ConnectionRefusedError, socket.gaierror)):
                raise ChannelUnavailable(f"cannot reach webhook {self.name}: {reason}") from None
            if isinstance(reason, (TimeoutError, socket.timeout, ConnectionResetError)):
                raise DeliveryUncertain(f"webhook {self.name}: {reason.__class__.__name__} after the request "
                                        "was sent; it may have been received") from None
            raise ChannelUnavailable(f"cannot reach webhook {self.name}: {reason}") from None
        except (TimeoutError, ConnectionResetError, OSError) as exc:
            if not connected:
                raise ChannelUnavailable(f"cannot reach webhook {self.name}: {exc.__class__.__name__}") from None
            raise DeliveryUncertain(f"webhook {self.name}: {exc.__class__.__name__} while waiting for the "
                                    "answer; it may have been received") from None
        if not 200 <= status < 300:
            raise DeliveryError(f"webhook {self.name} answered HTTP {status}")
