"""collect_status / format_status on a store with runs, outbox rows, alerts, verdicts and a lock."""

from __future__ import annotations

import json
import os
import socket
from datetime import date, datetime, timedelta, timezone

from drift.config import Config, ScheduleConfig
from drift.lock import StoreLock
from drift.status import collect_status, format_status
from drift.store import Store, alerts, outbox


def _utc(*a: int) -> datetime:
    return datetime(*a, tzinfo=timezone.utc)  # type: ignore[misc]


def _fill(store: Store) -> None:
    rid = store.start_run("check", job_id="drift:check", scheduled_for=_utc(2026, 3, 2, 1, 30))
    store.finish_run(rid, "failed", error="ValueError: bad panel")
    store.record_run("ingest", "missed", job_id="drift:ingest", scheduled_for=_utc(2026, 3, 2, 0, 0))
    t0 = _utc(2026, 3, 1)
    with store.begin() as conn:
        a1 = conn.execute(alerts.insert().values(
            model="sales_north", condition="refit", action="refit", severity=3, status="open",
            first_seen=t0, last_seen=t0, payload="{}")).inserted_primary_key[0]
        conn.execute(alerts.insert().values(
            model="sales_south", condition="relag", action="relag", severity=2, status="cleared",
            first_seen=t0, last_seen=t0, payload="{}"))
        rows = [("pending", t0, "SMTP 451 try later"), ("pending", t0 + timedelta(hours=1), None),
                ("uncertain", t0, "timeout after DATA"), ("dead", t0, "550 no such user"), ("sent", t0, None),
                ("delivering", t0, None)]
        for i, (st, created, err) in enumerate(rows):
            conn.execute(outbox.insert().values(
                alert=a1, channel="ops-mail", idempotency_key=f"k{i}", subject=f"alert {i}", payload="{}",
                status=st, attempts=1, next_attempt_at=created, last_error=err, created_at=created))
    store.save_verdicts(rid, date(2026, 3, 2), [{
        "name": "sales_north", "verdict": "data-late",
        "drivers": [{"series": "temp", "late": True, "last_period": "2026-02-16"},
                    {"series": "price", "late": False}]}])


def test_collect_status_fields(store: Store) -> None:
    _fill(store)
    cfg = Config(store=store.url, schedule=ScheduleConfig(timezone="Europe/Lisbon", check="30 1 * * *",
                                                          ingest="every 1h", retry=None))
    now = _utc(2026, 3, 2, 12, 0)
    with StoreLock(store):
        st = collect_status(cfg, store, now=now)
    jobs = st["jobs"]
    assert list(jobs) == ["ingest", "check", "digest", "retry"]
    assert jobs["check"]["outcome"] == "failed" and jobs["check"]["error"] == "ValueError: bad panel"
    assert jobs["check"]["duration"] is not None and jobs["check"]["duration"] >= 0
    assert jobs["check"]["next_run"] == _utc(2026, 3, 3, 1, 30)
    assert str(jobs["check"]["next_run"].tzinfo) == "Europe/Lisbon"
    assert jobs["ingest"]["outcome"] == "missed" and jobs["ingest"]["next_run"] == _utc(2026, 3, 2, 12, 0)
    assert jobs["digest"] == {"schedule": None, "last_run": None, "finished_at": None, "outcome": None,
                              "duration": None, "error": None, "next_run": None, "pid": None, "host": None,
                              "heartbeat_at": None}
    ob = st["outbox"]
    assert ob["pending"] == 2 and ob["oldest_pending"] == _utc(2026, 3, 1)
    assert ob["last_error"] == "SMTP 451 try later"
    assert [r["subject"] for r in ob["uncertain"]] == ["alert 2"] and len(ob["dead"]) == 1
    assert st["stale_feeds"] == [{"series": "temp", "late": True, "last_period": "2026-02-16",
                                  "model": "sales_north", "driver": "temp"}]
    assert list(st["open_alerts"]) == ["sales_north"]
    assert st["open_alerts"]["sales_north"][0]["action"] == "refit"
    assert st["lock"]["pid"] == os.getpid() and st["lock"]["host"] == socket.gethostname()
    assert st["lock"]["stale"] is None
    text = format_status(st)
    for needle in ("pid", "check", "failed", "2 pending", "1 uncertain, 1 sent, 1 being sent, 1 given up",
                   "uncertain: #", "drift deliver --resend ID", "dead: #", "sales_north: temp", "sales_north: refit"):
        assert needle in text, needle
    json.dumps(st, default=str)  # everything renders


def test_status_of_an_empty_store(store: Store) -> None:
    st = collect_status(Config(store=store.url), store, now=_utc(2026, 3, 2))
    assert st["lock"] is None and st["open_alerts"] == {} and st["stale_feeds"] == []
    assert st["outbox"]["pending"] == 0 and st["jobs"]["retry"]["schedule"] == "every 10m"
    assert "not running" in format_status(st)


def test_status_never_reads_the_verdict_charts(store: Store) -> None:
    """Status needs each newest verdict's drivers only: the charts column is never selected (at 10,000 models
    it is most of the verdict bytes)."""
    import sqlalchemy as sa

    from drift.jsontext import as_json_text

    _fill(store)
    rid = store.start_run("check", as_of=date(2026, 3, 9))
    store.save_verdicts(rid, date(2026, 3, 9), [{
        "name": "sales_south", "verdict": "keep", "drivers": [{"series": "price", "late": True}],
        "charts": as_json_text({"periods": ["2026-03-02"], "cusum": {"path": [0.5]}})}])
    seen: list[str] = []

    def record(conn, cursor, statement, parameters, context, executemany):
        seen.append(statement)

    sa.event.listen(store.engine, "before_cursor_execute", record)
    try:
        st = collect_status(Config(store=store.url), store, now=_utc(2026, 3, 10))
    finally:
        sa.event.remove(store.engine, "before_cursor_execute", record)
    verdict_reads = [s for s in seen if "FROM verdicts" in s]
    assert verdict_reads and not any("charts" in s for s in verdict_reads), verdict_reads
    assert [f["model"] for f in st["stale_feeds"]] == ["sales_north", "sales_south"]


def test_status_lists_a_late_target_feed_as_the_digest_does(store: Store) -> None:
    """The target is no driver: its late feed comes from its data-late action, beside the late drivers (the
    digest's late feeds read the same actions)."""
    rid = store.start_run("check", as_of=date(2026, 3, 9))
    store.save_verdicts(rid, date(2026, 3, 9), [{
        "name": "sales_east", "verdict": "data-late",
        "drivers": [{"series": "temp", "late": True, "last_period": "2026-02-16"}],
        "actions": [
            {"action": "data-late", "driver": "sales_east_units", "role": "target", "last_period": "2026-02-23",
             "next_due": "2026-03-09T00:00:00+00:00", "missing_periods": 1, "reason": "The target feed ..."},
            {"action": "data-late", "driver": "temp", "role": "driver", "last_period": "2026-02-16",
             "next_due": "2026-03-02T00:00:00+00:00", "missing_periods": 2, "reason": "The driver feed ..."}]}])
    st = collect_status(Config(store=store.url), store, now=_utc(2026, 3, 10))
    assert [(f["model"], f["driver"], f.get("role")) for f in st["stale_feeds"]] == [
        ("sales_east", "temp", None), ("sales_east", "sales_east_units", "target")]
    text = format_status(st)
    assert "late feeds: 2" in text
    assert ("sales_east: sales_east_units (target): last period 2026-02-23, next value was due 2026-03-09 00:00 UTC"
            in text)
