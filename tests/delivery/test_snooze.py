"""Snoozed and acted-on alerts: a snoozed alert is not sent again before its day unless it gets worse, comes
back once (a reminder) when the snooze ends; a decision closes open alerts as acted on, and a replayed check
of an earlier epoch leaves the alerts alone. Common practice, no source: the rules of drift.delivery.alerts."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.config import ModelConfig
from drift.delivery.alerts import acted_on_alerts, open_alerts, process_alerts, snooze
from drift.epochs import start_epoch
from drift.exceptions import DecisionError
from drift.store import alert_snoozes
from drift.store import outbox as outbox_t
from tests.delivery.conftest import T0, action, make_cfg, outcome, payload

WEEK = dt.timedelta(days=7)


@pytest.fixture
def cfg(tmp_path: Path) -> Any:
    return make_cfg(tmp_path, [{"kind": "folder", "path": "out"}])


def sent(store: Any) -> list[dict[str, Any]]:
    with store.connect() as conn:
        rows = conn.execute(sa.select(outbox_t).order_by(outbox_t.c.id)).fetchall()
    return [json.loads(r.payload) for r in rows]


def check(cfg: Any, store: Any, actions: list[dict[str, Any]], as_of: str, run: int, **kw: Any) -> list[Any]:
    p = payload("k000", actions, as_of=as_of)
    p.update(kw)
    return process_alerts(cfg, store, outcome(p, run_id=run, as_of=as_of), now=T0 + run * WEEK)


def test_a_snoozed_alert_that_flaps_is_not_sent_again_until_its_day(cfg: Any, store: Any) -> None:
    refit = action("refit", since="2024-11-04")
    check(cfg, store, [refit], "2025-12-29", 1)
    assert len(sent(store)) == 1
    [a] = snooze(store, "k000", until=dt.date(2026, 2, 1), decided_by="alice", note="waiting for Q1 data")
    assert (a.condition, a.snoozed_until, a.snoozed_by) == ("refit", dt.date(2026, 2, 1), "alice")
    check(cfg, store, [], "2026-01-05", 2)                 # cleared ...
    ev = check(cfg, store, [refit], "2026-01-12", 3)       # ... and back, no worse: recorded, not sent
    assert [(e.event, e.notified) for e in ev] == [("opened", False)]
    assert len(sent(store)) == 1
    [a] = open_alerts(store)
    assert a.snoozed_until == dt.date(2026, 2, 1)
    check(cfg, store, [refit], "2026-01-19", 4)            # unchanged: nothing
    assert len(sent(store)) == 1
    ev = check(cfg, store, [refit], "2026-02-02", 5)       # the snooze is over and it is still open: reminder
    assert [(e.event, e.notified) for e in ev] == [("opened", True)]
    docs = sent(store)
    assert len(docs) == 2 and docs[1]["reminder"] is True and docs[1]["event"] == "opened"
    assert open_alerts(store)[0].snoozed_until is None
    check(cfg, store, [refit], "2026-02-09", 6)            # and then as usual: not re-sent while unchanged
    assert len(sent(store)) == 2


def test_a_snoozed_alert_comes_back_at_once_when_it_gets_worse(cfg: Any, store: Any) -> None:
    check(cfg, store, [action("refit", since="2025-03-02")], "2025-12-29", 1)
    snooze(store, "k000", until=dt.date(2026, 6, 1), action="refit", decided_by="bob")
    check(cfg, store, [action("refit", since="2025-03-02")], "2026-01-05", 2)
    assert len(sent(store)) == 1
    ev = check(cfg, store, [action("refit", since="2024-11-04")], "2026-01-12", 3)   # dated earlier: worse
    assert [(e.event, e.notified) for e in ev] == [("worse", True)]
    assert len(sent(store)) == 2
    with store.connect() as conn:
        (row,) = conn.execute(sa.select(alert_snoozes)).fetchall()
    assert row.ended_reason == "worse"


def test_worse_than_when_snoozed_is_sent_even_after_the_alert_cleared_and_reopened(cfg: Any, store: Any) -> None:
    check(cfg, store, [action("watch", "watch")], "2025-12-29", 1)
    cfg_watch = make_cfg(Path(cfg.base_dir), [{"kind": "folder", "path": "out"}], min_action="watch")
    snooze(store, "k000", until=dt.date(2026, 6, 1), decided_by="bob")
    check(cfg_watch, store, [], "2026-01-05", 2)
    ev = check(cfg_watch, store, [action("watch", "act")], "2026-01-12", 3)   # back at a higher severity
    assert [(e.event, e.notified) for e in ev] == [("opened", True)]


def test_snooze_needs_an_open_alert_and_a_later_day(cfg: Any, store: Any) -> None:
    with pytest.raises(DecisionError, match="no open alert"):
        snooze(store, "k000", until=dt.date(2026, 6, 1), decided_by="bob")
    check(cfg, store, [action("refit", since="2025-03-02")], "2025-12-29", 1)
    with pytest.raises(DecisionError, match="no open alert for 'relag'; its open alerts: refit"):
        snooze(store, "k000", until=dt.date(2026, 6, 1), action="relag", decided_by="bob")
    with pytest.raises(DecisionError, match="is not after 2025-12-29"):
        snooze(store, "k000", until=dt.date(2025, 12, 29), decided_by="bob")


def _model() -> ModelConfig:
    return ModelConfig.model_validate({"name": "k000", "target": "k000_units", "frequency": "W",
                                       "drivers": [{"series": "k000_promo"}],
                                       "reference": {"start": "2021-01-04", "end": "2023-12-25"}})


def test_a_decision_closes_open_alerts_as_acted_on_and_old_epochs_leave_them_alone(cfg: Any, store: Any) -> None:
    check(cfg, store, [action("refit", since="2024-11-04"), action("drop-driver", driver="k000_temp")],
          "2025-12-29", 1, epoch={"number": 1})
    snooze(store, "k000", until=dt.date(2026, 3, 1), action="drop-driver", decided_by="bob")
    epoch, closed = start_epoch(store, _model(), action="refit", effective=dt.date(2025, 12, 29),
                                reference=(dt.date(2024, 11, 4), dt.date(2025, 12, 22)), lags={}, dropped=[],
                                decided_by="alice", note="effect fell", proposal={}, now=T0 + WEEK)
    assert epoch.number == 2 and len(closed) == 2
    assert open_alerts(store) == []
    acted = acted_on_alerts(store, "k000")
    assert {a.status for a in acted} == {"acted"}
    assert {a.detail["acted_on"]["by"] for a in acted} == {"alice"}
    with store.connect() as conn:
        assert {r.ended_reason for r in conn.execute(sa.select(alert_snoozes))} == {"acted"}
    # a check replayed as of an earlier date (epoch 1) records its verdict but reopens nothing
    assert check(cfg, store, [action("refit", since="2024-11-04")], "2025-12-22", 2, epoch={"number": 1}) == []
    assert open_alerts(store) == [] and len(sent(store)) == 2
    # the new epoch's checks are processed as usual
    ev = check(cfg, store, [action("watch", "watch")], "2026-01-05", 3, epoch={"number": 2})
    assert [e.event for e in ev] == ["opened"]
    with pytest.raises(DecisionError, match="cannot start before it"):
        start_epoch(store, _model(), action="refit", effective=dt.date(2025, 12, 1),
                    reference=(dt.date(2024, 11, 4), dt.date(2025, 11, 24)), lags={}, dropped=[],
                    decided_by="alice", note=None, proposal={})
