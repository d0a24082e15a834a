"""A simulated day of schedule through SMTP outages: the daemon (controlled clock, no sleeps) checks every
hour and retries the outbox every ten minutes while the mail server goes down, refuses at each step with
4xx and 5xx replies, drops connections and stays silent beyond the client's timeout. Each alert arrives
exactly once when the server is back; the exceptions are the notices whose connection failed after the
whole message was written, which are marked uncertain, never re-sent, and the notices the server refused for
good (5xx to RCPT or to the data: RFC 5321 section 4.2.1), which are given up (dead); both are counted by
``drift status``. None is lost.
Invented payloads (tests/delivery/conftest.py); common practice, no source.
"""

from __future__ import annotations

import json
from collections import Counter
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.config import Config
from drift.delivery.alerts import process_alerts
from drift.delivery.email import EmailSender
from drift.delivery.outbox import configured_channels, deliver_pending, make_channels
from drift.scheduler import Daemon
from drift.status import collect_status, format_status
from drift.store import Store
from drift.store import outbox as outbox_t
from tests.delivery.conftest import action, fake_renderer, outcome, payload
from tests.faults.smtp import ScriptedSmtp

pytestmark = pytest.mark.network

DAY = datetime(2026, 3, 2, tzinfo=timezone.utc)
TIMEOUT = 0.5
#: the server through the day, by UTC hour (unlisted hours: behaving)
PLAN: dict[int, Any] = {
    2: "down", 3: "down",
    4: ("greeting", "421 4.3.2 closing"), 5: ("ehlo", "554 5.7.1 go away"), 6: ("mail", "451 4.3.0 later"),
    7: ("rcpt", "550 5.1.1 no such user"), 8: ("data", "451 4.3.0 later"), 9: ("eod", "554 5.6.0 rejected"),
    10: ("mail", "stall"), 11: ("eod", "stall"), 12: ("rcpt", "drop"), 13: ("eod", "drop"),
    15: ("eod", "452 4.3.1 full"), 16: ("greeting", "stall"),
}


class Clock:
    def __init__(self, now: datetime) -> None:
        self.now = now

    def __call__(self) -> datetime:
        return self.now


def _cfg(tmp_path: Path, store: Store, port: int) -> Config:
    return Config.model_validate({
        "store": store.url, "base_dir": tmp_path,
        "alerts": {"retry_backoff": "5m", "retry_max_backoff": "1h",
                   "channels": [{"kind": "email", "name": "mail", "host": "127.0.0.1", "port": port,
                                 "sender": "drift@example.test", "to": ["owner@example.test"], "timeout": TIMEOUT},
                                {"kind": "folder", "name": "files", "path": "alerts"}]},
        "schedule": {"timezone": "UTC", "check": "0 * * * *", "retry": "every 10m", "job_timeout": "5m"}})


def test_a_day_of_smtp_outages(tmp_path: Path, sqlite_store: Store) -> None:
    store = sqlite_store
    clock = Clock(DAY - timedelta(minutes=1))
    smtp = ScriptedSmtp(stall=2 * TIMEOUT)
    cfg = _cfg(tmp_path, store, smtp.port)

    def channels() -> dict[str, Any]:
        chans = make_channels(cfg)
        chans.update({n: EmailSender(cfg, s, n, chart_renderer=fake_renderer) for n, s in configured_channels(cfg)
                      if s.kind == "email"})
        return chans

    def check(cfg: Config, store: Store) -> Any:
        # each hourly check finds one new condition (a new model needing a refit)
        now = clock()
        process_alerts(cfg, store, outcome(payload(f"m{now.hour:02d}", [action("refit")]), run_id=now.hour + 1,
                                           as_of=now.date().isoformat()), now=now)
        return deliver_pending(cfg, store, now=now, channels=channels()).describe()

    def retry(cfg: Config, store: Store) -> Any:
        return deliver_pending(cfg, store, now=clock(), channels=channels()).describe()

    daemon = Daemon(cfg, store, jobs={"check": check, "retry": retry}, clock=clock, stop_grace=5.0)
    daemon.start(paused=True)
    outcomes = []
    try:
        for _ in range(24 * 12):  # five-minute steps through the day
            clock.now += timedelta(minutes=5)
            plan = PLAN.get(clock.now.hour)
            if plan == "down":
                smtp.stop()
            else:
                smtp.start()
                smtp.fault = plan
            outcomes += daemon.run_pending()
    finally:
        daemon.stop()
        smtp.stop()
    assert outcomes and {o.status for o in outcomes} == {"ok"}, [o for o in outcomes if o.status != "ok"][:3]
    runs = Counter(o.name for o in outcomes)
    assert runs["check"] == 24 and runs["retry"] >= 24 * 6
    with store.connect() as conn:
        rows = conn.execute(sa.select(outbox_t.c.id, outbox_t.c.channel, outbox_t.c.idempotency_key,
                                      outbox_t.c.status)).fetchall()
    mail = {r.idempotency_key: r.status for r in rows if r.channel == "mail"}
    assert len(mail) == 24
    # every alert reached the mail server exactly once (uncertain ones included, since this server took each
    # message before it went silent), unless the server refused it for good (5xx to RCPT or to the data):
    # then it is given up, never received, and shown; none lost, none twice
    got = Counter(smtp.keys())
    uncertain = sorted(k for k, st in mail.items() if st == "uncertain")
    dead = sorted(k for k, st in mail.items() if st == "dead")
    assert set(mail.values()) <= {"sent", "uncertain", "dead"}
    assert got == Counter(k for k, st in mail.items() if st != "dead")
    lost = [k for k, st in mail.items() if got[k] == 0 and st != "dead"]
    assert lost == [] and dead, mail
    files = [json.loads(x)["key"] for x in (tmp_path / "alerts" / "alerts.jsonl").read_text().splitlines()]
    assert sorted(files) == sorted(r.idempotency_key for r in rows if r.channel == "files")
    st = collect_status(cfg, store, now=clock())
    assert len(st["outbox"]["uncertain"]) == len(uncertain) and st["outbox"]["pending"] == 0
    assert len(st["outbox"]["dead"]) == len(dead)
    text = format_status(st)
    assert f"{len(uncertain)} uncertain" in text and f"{len(dead)} given up" in text
    print(f"\nsimulated day: {runs['check']} checks, {runs['retry']} retries, {len(mail)} e-mail alerts: "
          f"{sum(got.values()) - len(uncertain)} received exactly once, {len(uncertain)} uncertain (silence after "
          f"the data; received), {len(dead)} given up (refused for good), 0 lost; all shown by drift status")
