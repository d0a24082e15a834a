"""Alert state: opened once, not re-sent while unchanged, re-sent when worse, cleared when gone, and a
partial (``--model``) outcome leaves other models alone. Common practice, no source: rules of this module."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

from drift.delivery.alerts import cleared_alerts, condition_key, is_worse, open_alerts, process_alerts
from drift.store import alerts as alerts_t
from drift.store import outbox as outbox_t
from tests.delivery.conftest import T0, action, make_cfg, outcome, payload


@pytest.fixture
def cfg(tmp_path: Path) -> Any:
    return make_cfg(tmp_path, [{"kind": "folder", "path": "out"}, {"kind": "folder", "name": "archive",
                                                                   "path": "arch"}])


def outbox_rows(store: Any) -> list[Any]:
    with store.connect() as conn:
        return conn.execute(sa.select(outbox_t).order_by(outbox_t.c.id)).fetchall()


def test_condition_keys() -> None:
    assert condition_key(action("refit")) == "refit"
    assert condition_key(action("drop-driver", driver="k000_temp")) == "drop-driver:k000_temp"
    assert condition_key(action("relag", driver="k000_promo", lag=3)) == "relag:k000_promo"
    assert condition_key(action("data-late", driver="k000_temp")) == "data-late:k000_temp"
    assert condition_key(action("watch", "watch")) == "watch"


def test_new_condition_opens_and_enqueues_one_row_per_channel(cfg: Any, store: Any) -> None:
    ev = process_alerts(cfg, store, outcome(payload("k000", [action("refit", since="2024-11-04")])), now=T0)
    assert [(e.condition, e.event, e.notified) for e in ev] == [("refit", "opened", True)]
    rows = outbox_rows(store)
    assert sorted(r.channel for r in rows) == ["archive", "folder"]
    assert all(r.status == "pending" and r.attempts == 0 and r.alert == ev[0].alert_id for r in rows)
    assert len({r.idempotency_key for r in rows}) == 2
    assert rows[0].subject == "drift: k000 — refit"
    doc = json.loads(rows[0].payload)
    assert doc["charts"] is None  # chart data only travels on e-mail rows
    assert doc["detail"]["since"] == "2024-11-04"
    [a] = open_alerts(store)
    assert (a.model, a.condition, a.severity, a.as_of) == ("k000", "refit", "act", dt.date(2025, 12, 29))


def test_unchanged_is_not_resent_but_stays_open(cfg: Any, store: Any) -> None:
    o = outcome(payload("k000", [action("refit", since="2024-11-04")]))
    process_alerts(cfg, store, o, now=T0)
    later = T0 + dt.timedelta(days=7)
    ev = process_alerts(cfg, store, outcome(payload("k000", [action("refit", since="2024-11-04")],
                                                    as_of="2026-01-05"), run_id=2), now=later)
    assert [e.event for e in ev] == ["unchanged"]
    assert len(outbox_rows(store)) == 2
    [a] = open_alerts(store)
    assert a.last_seen == later and a.first_seen == T0 and a.as_of == dt.date(2026, 1, 5)


@pytest.mark.parametrize("before, after", [
    (action("watch", "watch"), action("watch", "act")),                        # severity up
    (action("relag", driver="x", lag=2), action("relag", driver="x", lag=3)),  # another lag
    (action("refit", since="2025-03-02"), action("refit", since="2024-11-04")),  # dated earlier
    (action("drop-driver", "watch", driver="x"), action("drop-driver", "act", driver="x")),
])
def test_worse_is_resent(tmp_path: Path, store: Any, before: dict[str, Any], after: dict[str, Any]) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "out"}], min_action="watch")
    process_alerts(cfg, store, outcome(payload("k000", [before])), now=T0)
    ev = process_alerts(cfg, store, outcome(payload("k000", [after]), run_id=2), now=T0 + dt.timedelta(days=7))
    assert [e.event for e in ev] == ["worse"] and ev[0].notified
    rows = outbox_rows(store)
    assert len(rows) == 2 and rows[0].idempotency_key != rows[1].idempotency_key
    doc = json.loads(rows[1].payload)
    assert doc["event"] == "worse" and doc["previous"]["action"] == before["action"]
    assert "worse" in rows[1].subject


@pytest.mark.parametrize("before, after", [
    (action("refit"), action("refit", "watch")),                                   # severity down
    (action("refit", since="2024-11-04"), action("refit", since="2025-03-02")),  # dated later
    (action("relag", driver="x", lag=3), action("relag", "watch", driver="x", lag=2)),  # lower, other lag
    (action("data-late", driver="x", last_period="2025-11-24"),
     action("data-late", driver="x", last_period="2025-12-01")),
])
def test_not_worse_is_not_resent(tmp_path: Path, store: Any, before: dict[str, Any],
                                 after: dict[str, Any]) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "out"}], min_action="watch")
    process_alerts(cfg, store, outcome(payload("k000", [before])), now=T0)
    ev = process_alerts(cfg, store, outcome(payload("k000", [after]), run_id=2), now=T0 + dt.timedelta(days=7))
    assert [e.event for e in ev] == ["unchanged"]
    assert len(outbox_rows(store)) == 1
    [a] = open_alerts(store)
    assert a.severity == before["severity"]  # stored state is the last notified one
    assert a.detail == after  # but the latest numbers are shown


def test_is_worse_rule_directly() -> None:
    assert is_worse({"action": "relag", "lag": 2}, 2, {"action": "relag", "lag": 2}, 2) is False
    assert is_worse({"action": "refit"}, 2, {"action": "refit", "since": "2024-01-01"}, 2) is False
    assert is_worse({"action": "watch"}, 1, {"action": "watch"}, 2) is True


def test_cleared_when_gone_without_message_by_default(cfg: Any, store: Any) -> None:
    process_alerts(cfg, store, outcome(payload("k000", [action("refit"), action("data-late", driver="k000_temp")])),
                   now=T0)
    t1 = T0 + dt.timedelta(days=7)
    ev = process_alerts(cfg, store, outcome(payload("k000", [action("refit")]), run_id=2), now=t1)
    assert sorted((e.condition, e.event) for e in ev) == [("data-late:k000_temp", "cleared"), ("refit", "unchanged")]
    assert [a.condition for a in open_alerts(store)] == ["refit"]
    [c] = cleared_alerts(store, since=T0)
    assert c.condition == "data-late:k000_temp" and c.cleared_at == t1
    assert len(outbox_rows(store)) == 4  # only the two openings x two channels
    # the same condition coming back is a new alert with a new message
    ev = process_alerts(cfg, store, outcome(payload("k000", [action("refit"), action("data-late", driver="k000_temp")]),
                                            run_id=3), now=t1 + dt.timedelta(days=7))
    assert sorted(e.event for e in ev) == ["opened", "unchanged"]
    assert len(outbox_rows(store)) == 6


def test_keep_clears_everything(cfg: Any, store: Any) -> None:
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    process_alerts(cfg, store, outcome(payload("k000", []), run_id=2), now=T0 + dt.timedelta(days=1))
    assert open_alerts(store) == []


def test_cleared_notice_when_configured(tmp_path: Path, store: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "out"}], notify_cleared=True)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    ev = process_alerts(cfg, store, outcome(payload("k000", []), run_id=2), now=T0 + dt.timedelta(days=1))
    assert [(e.event, e.notified) for e in ev] == [("cleared", True)]
    rows = outbox_rows(store)
    assert len(rows) == 2 and rows[1].subject == "drift: k000 — cleared: refit"


def test_partial_outcome_leaves_other_models_alone(cfg: Any, store: Any) -> None:
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")]), payload("k001", [action("refit")])),
                   now=T0)
    ev = process_alerts(cfg, store, outcome(payload("k001", []), run_id=2), now=T0 + dt.timedelta(days=1))
    assert [(e.model, e.event) for e in ev] == [("k001", "cleared")]
    assert [(a.model, a.condition) for a in open_alerts(store)] == [("k000", "refit")]


def test_payload_without_actions_is_untouched(cfg: Any, store: Any) -> None:
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    broken = payload("k000", None)
    assert process_alerts(cfg, store, outcome(broken, run_id=2), now=T0 + dt.timedelta(days=1)) == []
    assert len(open_alerts(store)) == 1


def test_min_action_act_opens_watch_silently_then_sends_when_it_becomes_act(cfg: Any, store: Any) -> None:
    assert cfg.alerts.min_action == "act"
    ev = process_alerts(cfg, store, outcome(payload("k000", [action("drop-driver", "watch", driver="k000_temp")])),
                        now=T0)
    assert [(e.event, e.notified) for e in ev] == [("opened", False)]
    assert outbox_rows(store) == [] and len(open_alerts(store)) == 1
    ev = process_alerts(cfg, store, outcome(payload("k000", [action("drop-driver", driver="k000_temp")]), run_id=2),
                        now=T0 + dt.timedelta(days=7))
    assert [(e.event, e.notified) for e in ev] == [("worse", True)]
    rows = outbox_rows(store)
    assert len(rows) == 2
    # nothing was sent before, so the message reads as a first notice, not "worse"
    assert json.loads(rows[0].payload)["event"] == "opened" and "worse" not in rows[0].subject


def test_min_action_watch_sends_watch(tmp_path: Path, store: Any) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "out"}], min_action="watch")
    ev = process_alerts(cfg, store, outcome(payload("k000", [action("watch", "watch")])), now=T0)
    assert ev[0].notified and outbox_rows(store)[0].subject == "drift: k000 — watch"


def test_deterministic(tmp_path: Path) -> None:
    from drift.store import open_store

    def run(sub: str) -> list[tuple[Any, ...]]:
        (tmp_path / sub).mkdir()
        st = open_store("sqlite:///" + str(tmp_path / sub / "d.db"))
        cfg = make_cfg(tmp_path / sub, [{"kind": "folder", "path": "out"}], min_action="watch")
        acts = [action("watch", "watch"), action("relag", driver="k000_promo", lag=3),
                action("drop-driver", driver="k000_temp"), action("refit", since="2024-11-04")]
        o = outcome(payload("k001", acts[::-1]), payload("k000", acts))
        process_alerts(cfg, st, o, now=T0)
        with st.connect() as conn:
            out = [tuple(r) for r in conn.execute(sa.select(outbox_t.c.channel, outbox_t.c.idempotency_key,
                                                            outbox_t.c.subject).order_by(outbox_t.c.id))]
            out += [tuple(r) for r in conn.execute(sa.select(alerts_t.c.model, alerts_t.c.condition)
                                                   .order_by(alerts_t.c.id))]
        st.dispose()
        return out

    assert run("a") == run("b")


def test_alert_and_outbox_rows_commit_together(cfg: Any, store: Any, monkeypatch: pytest.MonkeyPatch) -> None:
    import drift.delivery.outbox as ob

    def boom(*a: Any, **k: Any) -> Any:
        raise RuntimeError("store went away")

    monkeypatch.setattr(ob, "enqueue", boom)
    with pytest.raises(RuntimeError):
        process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    assert open_alerts(store) == [] and outbox_rows(store) == []


def test_naive_now_rejected(cfg: Any, store: Any) -> None:
    with pytest.raises(ValueError, match="now"):
        process_alerts(cfg, store, outcome(payload("k000", [])), now=dt.datetime(2025, 1, 1))


def test_transactions_of_a_few_models_give_the_same_events_as_one(tmp_path: Path, monkeypatch: Any) -> None:
    """process_alerts updates models in batches of ALERT_BATCH per transaction: the events, open alerts and
    outbox rows are the same whatever the batch size (here 1, 3 and all), across opening, worse, unchanged
    and cleared. Common practice, no source."""
    import drift.delivery.alerts as al
    from drift.store import open_store

    def run(size: int) -> tuple[list[Any], list[Any], list[Any]]:
        monkeypatch.setattr(al, "ALERT_BATCH", size)
        folder = tmp_path / f"b{size}"
        folder.mkdir()
        cfg = make_cfg(folder, [{"kind": "folder", "path": "out"}], min_action="watch")
        st = open_store("sqlite:///" + str(folder / "drift.db"))
        first = [payload(f"k{i:03d}", [action("refit", since="2024-11-04")] if i % 2 else
                         [action("watch", "watch")] if i % 3 else []) for i in range(7)]
        second = [payload(f"k{i:03d}", [] if i % 2 else [action("watch", "act")] if i % 3 else
                          [action("drop-driver", driver="x")], as_of="2026-01-05") for i in range(7)]
        ev = process_alerts(cfg, st, outcome(*first), now=T0)
        ev += process_alerts(cfg, st, outcome(*second, run_id=2), now=T0 + dt.timedelta(days=7))
        events = [(e.model, e.condition, e.event, e.notified) for e in ev]
        opened = [(a.model, a.condition, a.severity) for a in open_alerts(st)]
        rows = [(r.channel, r.subject) for r in outbox_rows(st)]
        st.dispose()
        return events, opened, rows

    whole = run(1000)
    assert whole[0] and whole[1] and whole[2]
    assert run(1) == whole
    assert run(3) == whole
