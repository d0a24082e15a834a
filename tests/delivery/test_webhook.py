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
    assert b["subject"] == "drift: k000 — consider dropping k000_temp"


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
