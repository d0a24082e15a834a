"""One contract test body over every channel kind in the registry (email, folder, webhook):
delivered once with its key, nothing on a second round, an outage keeps the row pending with an
error, recovery sends exactly once. Common practice, no source."""

from __future__ import annotations

import datetime as dt
import email
import email.policy
import json
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.delivery.alerts import process_alerts
from drift.delivery.outbox import channel_class, channel_kinds, deliver_pending, make_channels
from drift.store import outbox as outbox_t
from tests.delivery.conftest import T0, HttpSink, SmtpServer, action, make_cfg, outcome, payload


@dataclass
class Harness:
    cfg: Any
    delivered_keys: Callable[[], list[str]]
    break_it: Callable[[], None]
    repair: Callable[[], None]


def _email(tmp_path: Path) -> Iterator[Harness]:
    srv = SmtpServer()
    srv.start()
    cfg = make_cfg(tmp_path, [{"kind": "email", "host": "127.0.0.1", "port": srv.port, "sender": "d@x.test",
                               "to": "o@x.test", "timeout": 5}])

    def keys() -> list[str]:
        return [email.message_from_bytes(m.content, policy=email.policy.default)["X-Drift-Key"]
                for m in srv.messages]

    def repair() -> None:
        srv.start()

    try:
        yield Harness(cfg, keys, srv.stop, repair)
    finally:
        srv.stop()


def _folder(tmp_path: Path) -> Iterator[Harness]:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "sink"}])
    target = tmp_path / "sink"

    def keys() -> list[str]:
        f = target / "alerts.jsonl"
        return [json.loads(x)["key"] for x in f.read_text().splitlines()] if f.exists() else []

    aside = tmp_path / "sink-aside"

    def break_it() -> None:  # a file where the folder should be
        target.rename(aside)
        target.write_text("not a folder")

    def repair() -> None:
        target.unlink()
        aside.rename(target)

    yield Harness(cfg, keys, break_it, repair)


def _webhook(tmp_path: Path) -> Iterator[Harness]:
    sink = HttpSink()
    cfg = make_cfg(tmp_path, [{"kind": "webhook", "url": sink.url, "timeout": 5}])

    def set_status(code: int) -> Callable[[], None]:
        def f() -> None:
            sink.status = code
        return f

    try:
        yield Harness(cfg, lambda: [r.body["key"] for r in sink.requests], set_status(503), set_status(200))
    finally:
        sink.close()


HARNESSES = {"email": _email, "folder": _folder, "webhook": _webhook}


def test_every_registered_kind_has_a_harness() -> None:
    assert sorted(HARNESSES) == channel_kinds()
    for kind in channel_kinds():
        assert channel_class(kind).kind == kind


@pytest.fixture(params=[pytest.param(k, marks=[pytest.mark.network] if k != "folder" else []) for k in HARNESSES])
def harness(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Harness]:
    yield from HARNESSES[request.param](tmp_path)


def test_channel_contract(harness: Harness, store: Any) -> None:
    cfg = harness.cfg
    [ev] = process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    assert isinstance(make_channels(cfg)[_only_channel(store)], channel_class(cfg.alerts.channels[0].kind))
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.sent == 1 and harness.delivered_keys() == list(ev.keys)
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(days=1)).sent == 0
    assert harness.delivered_keys() == list(ev.keys)

    harness.break_it()
    [ev2] = process_alerts(cfg, store, outcome(payload("k001", [action("refit")]), run_id=2), now=T0)
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.failed == 1 and rep.pending == 1 and rep.errors[0].key == ev2.keys[0]
    with store.connect() as conn:
        row = conn.execute(sa.select(outbox_t).where(outbox_t.c.idempotency_key == ev2.keys[0])).one()
    assert row.status == "pending" and row.attempts == 1 and row.last_error
    harness.repair()
    later = T0 + dt.timedelta(hours=1)
    assert deliver_pending(cfg, store, now=later).sent == 1
    assert deliver_pending(cfg, store, now=later + dt.timedelta(hours=1)).sent == 0
    assert harness.delivered_keys() == [*ev.keys, *ev2.keys]


def _only_channel(store: Any) -> str:
    with store.connect() as conn:
        [name] = {r.channel for r in conn.execute(sa.select(outbox_t.c.channel))}
    return str(name)
