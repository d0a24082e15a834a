"""Webhook: JSON POST to a loopback http.server; a 500 keeps the row pending; headers from env."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import pytest

from drift.delivery.alerts import process_alerts
from drift.delivery.outbox import deliver_pending
from tests.delivery.conftest import T0, HttpSink, action, free_port, make_cfg, outcome, payload

pytestmark = pytest.mark.network


def hook_cfg(tmp_path: Path, url: str, **extra: Any) -> Any:
    return make_cfg(tmp_path, [{"kind": "webhook", "url": url, "timeout": 5, **extra}])


def test_post_json(tmp_path: Path, store: Any, http_sink: HttpSink, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("DRIFT_T_TOKEN", "Bearer t0ken")
    cfg = hook_cfg(tmp_path, http_sink.url, headers_env={"Authorization": "DRIFT_T_TOKEN"})
    [ev] = process_alerts(cfg, store, outcome(payload("k000", [action("drop-driver", driver="k000_temp")])), now=T0)
    assert deliver_pending(cfg, store, now=T0).sent == 1
    [req] = http_sink.requests
    assert req.path == "/hook" and req.headers["Authorization"] == "Bearer t0ken"
    assert req.headers["Idempotency-Key"] == ev.keys[0] == req.body["key"]
    b = req.body
    assert (b["model"], b["condition"], b["severity"], b["as_of"]) == ("k000", "drop-driver:k000_temp", "act",
                                                                       "2025-12-29")
    assert "charts" not in b and "statistical evidence" in b["text"]
    assert b["subject"] == "drift: k000 — drop a driver: k000_temp"


def test_500_keeps_pending_then_sends_once(tmp_path: Path, store: Any, http_sink: HttpSink) -> None:
    cfg = hook_cfg(tmp_path, http_sink.url)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    http_sink.status = 500
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.failed == 1 and "HTTP 500" in rep.errors[0].error and rep.pending == 1
    http_sink.status = 200
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1)).sent == 1
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=2)).sent == 0
    assert len(http_sink.requests) == 1


def test_missing_header_variable_names_it(tmp_path: Path, store: Any, http_sink: HttpSink,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("DRIFT_T_NOPE", raising=False)
    cfg = hook_cfg(tmp_path, http_sink.url, headers_env={"X-Token": "DRIFT_T_NOPE"})
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.failed == 1 and "DRIFT_T_NOPE" in rep.errors[0].error and http_sink.requests == []


def test_closed_port_keeps_pending(tmp_path: Path, store: Any) -> None:
    cfg = hook_cfg(tmp_path, f"http://127.0.0.1:{free_port()}/hook")
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.failed == 1 and rep.pending == 1 and "cannot reach" in rep.errors[0].error


class _Redirector:
    """A loopback server answering every POST with a redirect to ``target``."""

    def __init__(self, code: int, target: str) -> None:
        import http.server
        import threading

        class Handler(http.server.BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                self.rfile.read(int(self.headers.get("Content-Length") or 0))
                self.send_response(code)
                self.send_header("Location", target)
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        self.server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hook"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()

    def close(self) -> None:
        self.server.shutdown()
        self.server.server_close()


@pytest.mark.parametrize("code", [301, 302, 303, 307, 308])
def test_redirects_are_not_followed(tmp_path: Path, store: Any, http_sink: HttpSink, code: int,
                                    monkeypatch: pytest.MonkeyPatch) -> None:
    # common practice, no source: a redirect would carry the notice and its token elsewhere
    monkeypatch.setenv("DRIFT_T_TOKEN", "Bearer t0ken")
    for target in (http_sink.url, "ftp://127.0.0.1/x", "file:///etc/passwd"):
        red = _Redirector(code, target)
        try:
            cfg = hook_cfg(tmp_path, red.url, headers_env={"Authorization": "DRIFT_T_TOKEN"})
            process_alerts(cfg, store, outcome(payload(f"k{target[:3]}", [action("refit")])), now=T0)
            rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(days=len(target)))
        finally:
            red.close()
        assert rep.sent == 0 and rep.failed >= 1, rep.describe()
        assert f"HTTP {code}" in rep.errors[0].error and "not followed" in rep.errors[0].error
    assert http_sink.requests == []


@pytest.mark.parametrize(("status", "outcome"), [(404, "dead"), (410, "dead"), (422, "dead"), (429, "pending"),
                                                 (500, "pending"), (503, "pending"), (401, "pending")])
def test_a_refusal_for_good_is_given_up(tmp_path: Path, store: Any, http_sink: HttpSink, status: int,
                                        outcome: str) -> None:
    """RFC 9110 (Fielding et al., 2022) section 15.5: a 4xx says the request itself is at fault, so sending it
    again unchanged cannot succeed, except 408 (RFC 9110), 425 (RFC 8470) and 429 (RFC 6585), which ask to try
    later, and the credentials (401/403/407: fixed in the environment, the same for every notice); a 5xx is
    the receiver's own trouble, retried."""
    from drift.delivery.outbox import outbox_summary

    cfg = hook_cfg(tmp_path, http_sink.url)
    process_alerts(cfg, store, outcome_of("k000"), now=T0)
    http_sink.status = status
    rep = deliver_pending(cfg, store, now=T0)
    assert (rep.dead, rep.failed) == ((1, 0) if outcome == "dead" else (0, 1)), rep.describe()
    assert f"HTTP {status}" in rep.errors[0].error
    http_sink.status = 200
    deliver_pending(cfg, store, now=T0 + dt.timedelta(days=1))
    counts = outbox_summary(store).counts
    assert (counts["dead"], counts["sent"]) == ((1, 0) if outcome == "dead" else (0, 1))
    assert len(http_sink.requests) == (0 if outcome == "dead" else 1)


def outcome_of(name: str) -> Any:
    return outcome(payload(name, [action("refit")]))


@pytest.mark.parametrize("url", ["ftp://127.0.0.1/hook", "file:///tmp/hook", "127.0.0.1:8080/hook", "http:///x"])
def test_only_http_urls_in_the_config(tmp_path: Path, url: str) -> None:
    from drift.config import load_config
    from drift.exceptions import ConfigError

    f = tmp_path / "drift.yaml"
    f.write_text(f"alerts:\n  channels:\n    - kind: webhook\n      url: '{url}'\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"http:// or https://") as err:
        load_config(f)
    assert "alerts.channels[0].url" in str(err.value)


def test_a_receiver_echoing_the_token_does_not_leak_it(tmp_path: Path, store: Any,
                                                      monkeypatch: pytest.MonkeyPatch,
                                                      caplog: pytest.LogCaptureFixture) -> None:
    """A 401 whose body repeats the request's Authorization header: the error kept in the outbox and the log
    show *** instead of the token. Common practice, no source."""
    import http.server
    import threading

    class Echo(http.server.BaseHTTPRequestHandler):
        def do_POST(self) -> None:
            self.rfile.read(int(self.headers.get("Content-Length") or 0))
            body = f"bad token {self.headers.get('Authorization')}".encode()
            self.send_response(401)
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args: Any) -> None:
            pass

    srv = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Echo)
    threading.Thread(target=srv.serve_forever, daemon=True).start()
    token = "Bearer tok-5e1f-MARKER"
    monkeypatch.setenv("DRIFT_T_TOKEN", token)
    caplog.set_level("DEBUG")
    try:
        cfg = hook_cfg(tmp_path, f"http://127.0.0.1:{srv.server_address[1]}/hook",
                       headers_env={"Authorization": "DRIFT_T_TOKEN"})
        process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
        rep = deliver_pending(cfg, store, now=T0)
    finally:
        srv.shutdown()
        srv.server_close()
    assert rep.failed == 1 and "HTTP 401: bad token ***" in rep.errors[0].error
    from drift.store import outbox as outbox_t  # the stored error is what drift status shows

    with store.connect() as conn:
        stored = conn.execute(outbox_t.select()).fetchall()
    everything = caplog.text + repr(rep) + " ".join(str(r.last_error) for r in stored)
    assert "tok-5e1f-MARKER" not in everything


@pytest.mark.parametrize("fault", [KeyboardInterrupt, RuntimeError])
def test_nothing_is_handed_over_before_the_connection_is_up(tmp_path: Path, store: Any, http_sink: HttpSink,
                                                            monkeypatch: pytest.MonkeyPatch, fault: Any) -> None:
    """A process killed (KeyboardInterrupt stands in) or an unexpected error while connecting: no byte reached
    the receiver, so the row is not ``delivering`` (which a later run would turn uncertain): it is sent again,
    once. Common practice, no source."""
    import socket

    import drift.delivery.outbox as ob
    from drift.store import outbox as outbox_t

    cfg = hook_cfg(tmp_path, http_sink.url)
    process_alerts(cfg, store, outcome_of("k000"), now=T0)

    def broken(*a: Any, **k: Any) -> Any:
        raise fault("while connecting")

    monkeypatch.setattr(socket, "create_connection", broken)
    if fault is KeyboardInterrupt:
        with pytest.raises(KeyboardInterrupt):
            deliver_pending(cfg, store, now=T0)
    else:
        rep = deliver_pending(cfg, store, now=T0)
        assert (rep.failed, rep.uncertain) == (1, 0), rep.describe()
    monkeypatch.undo()
    with store.connect() as conn:
        status = conn.execute(outbox_t.select()).one().status
    assert status == ("sending" if fault is KeyboardInterrupt else "pending")
    rep = deliver_pending(cfg, store, now=T0 + ob.DEFAULT_SENDING_LEASE)
    assert (rep.sent, rep.uncertain) == (1, 0) and len(http_sink.requests) == 1
