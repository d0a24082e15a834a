"""Folder sink: valid JSON lines, no duplicates on re-delivery, a Markdown and an HTML page per run."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import pytest
import sqlalchemy as sa

import drift.delivery.outbox as ob
from drift.delivery.alerts import process_alerts
from drift.delivery.outbox import deliver_pending
from drift.store import outbox as outbox_t
from tests.delivery.conftest import T0, action, make_cfg, outcome, payload


@pytest.fixture
def cfg(tmp_path: Path) -> Any:
    return make_cfg(tmp_path, [{"kind": "folder", "name": "files", "path": "alerts-out"}], min_action="watch")


def lines(path: Path) -> list[dict[str, Any]]:
    return [json.loads(x) for x in path.read_text(encoding="utf-8").splitlines() if x.strip()]


def test_lines_and_pages(cfg: Any, store: Any, tmp_path: Path) -> None:
    acts = [action("refit", since="2024-11-04"), action("relag", driver="k000_promo", lag=3),
            action("watch", "watch")]
    process_alerts(cfg, store, outcome(payload("k000", acts), payload("k001", [action("data-late",
                                                                                        driver="k001_temp")]),
                                       run_id=7), now=T0)
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.sent == 4
    folder = tmp_path / "alerts-out"  # relative to the config file's folder
    docs = lines(folder / "alerts.jsonl")
    assert [(d["model"], d["condition"]) for d in docs] == [
        ("k000", "refit"), ("k000", "relag:k000_promo"), ("k000", "watch"), ("k001", "data-late:k001_temp")]
    with store.connect() as conn:
        keys = {r.idempotency_key for r in conn.execute(sa.select(outbox_t.c.idempotency_key))}
    assert {d["key"] for d in docs} == keys
    assert all(d["as_of"] == "2025-12-29" and d["run_id"] == 7 and d["reason"] for d in docs)
    md = (folder / "run-2025-12-29-7.md").read_text(encoding="utf-8")
    html = (folder / "run-2025-12-29-7.html").read_text(encoding="utf-8")
    for page in (md, html):
        assert "k000_promo fits better at lag 3" in page and "k001_temp data is late" in page
        assert "2024-11-04" in page and "statistical evidence, not certainty" in page
        assert "2.01" in page  # the numbers behind the relag (reference coefficient)


def test_redelivery_writes_no_duplicate(cfg: Any, store: Any, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)

    def crash(*a: Any, **k: Any) -> None:
        raise RuntimeError("killed after append")

    real = ob._mark_sent
    monkeypatch.setattr(ob, "_mark_sent", crash)
    with pytest.raises(RuntimeError):
        deliver_pending(cfg, store, now=T0)
    monkeypatch.setattr(ob, "_mark_sent", real)
    jsonl = tmp_path / "alerts-out" / "alerts.jsonl"
    assert len(lines(jsonl)) == 1
    # the folder sink is idempotent: after the lease, the row is sent again and the sink drops the duplicate
    rep = deliver_pending(cfg, store, now=T0 + ob.DEFAULT_SENDING_LEASE)
    assert (rep.recovered, rep.sent, rep.uncertain) == (1, 1, 0)
    assert len(lines(jsonl)) == 1
    with store.connect() as conn:
        assert [r.status for r in conn.execute(sa.select(outbox_t.c.status))] == ["sent"]


def test_unwritable_folder_keeps_pending_then_recovers(cfg: Any, store: Any, tmp_path: Path) -> None:
    (tmp_path / "alerts-out").write_text("a file where the folder should be")
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.failed == 1 and "cannot append" in rep.errors[0].error
    (tmp_path / "alerts-out").unlink()
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1)).sent == 1
    assert len(lines(tmp_path / "alerts-out" / "alerts.jsonl")) == 1


def test_escaped_names_on_pages(cfg: Any, store: Any, tmp_path: Path) -> None:
    process_alerts(cfg, store, outcome(payload("<script>alert(1)</script>", [action("refit")])), now=T0)
    deliver_pending(cfg, store, now=T0)
    html = (tmp_path / "alerts-out" / "run-2025-12-29-1.html").read_text(encoding="utf-8")
    assert "<script>" not in html and "&lt;script&gt;" in html
    # the JSON line keeps the name as it is (it is data, not markup)
    assert lines(tmp_path / "alerts-out" / "alerts.jsonl")[0]["model"] == "<script>alert(1)</script>"
