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
        assert "re-lag: k000_promo to lag 3" in page and "data late: k001_temp" in page
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


def _insert_row(store: Any, notice: dict[str, Any], key: str = "k" * 64, channel: str = "files") -> None:
    with store.begin() as conn:
        conn.execute(outbox_t.insert().values(alert=None, channel=channel, idempotency_key=key, subject="s",
                                              payload=json.dumps({"key": key, **notice}), status="pending",
                                              attempts=0, next_attempt_at=T0, created_at=T0))


def _tree(root: Path) -> set[str]:
    return {str(p.relative_to(root)) for p in root.rglob("*")}


@pytest.mark.parametrize("as_of, run_id", [("../../x", "../../../y"), ("/tmp/abs", "/etc/passwd"),
                                           ("..", ".."), ("a/../../b", "c\\..\\d")])
def test_names_from_notices_cannot_leave_the_folder(cfg: Any, store: Any, tmp_path: Path, as_of: str,
                                                    run_id: str) -> None:
    # common practice, no source: path traversal through values that become file names
    outside = tmp_path / "outside"
    outside.mkdir()
    before = _tree(tmp_path)
    _insert_row(store, {"model": "../../m", "as_of": as_of, "run_id": run_id, "event": "opened"})
    assert deliver_pending(cfg, store, now=T0).sent == 1
    new = _tree(tmp_path) - before
    assert new and all(p.startswith("alerts-out") for p in new), new
    folder = tmp_path / "alerts-out"
    assert all(p.parent == folder for p in folder.iterdir())
    assert not any((outside).iterdir()) and not Path("/tmp/abs").exists()


def test_symlinks_in_the_folder_are_not_followed(cfg: Any, store: Any, tmp_path: Path) -> None:
    folder = tmp_path / "alerts-out"
    folder.mkdir()
    victim = tmp_path / "victim.txt"
    victim.write_text("precious\n")
    (folder / "alerts.jsonl").symlink_to(victim)
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    rep = deliver_pending(cfg, store, now=T0)
    assert rep.failed == 1 and "symbolic link" in rep.errors[0].error
    assert victim.read_text() == "precious\n"
    with store.connect() as conn:
        assert [r.status for r in conn.execute(sa.select(outbox_t.c.status))] == ["pending"]
    # the lock file planted as a link is refused too (it would be created or truncated through the link)
    (folder / "alerts.jsonl").unlink()
    (folder / "alerts.jsonl.lock").unlink()
    (folder / "alerts.jsonl.lock").symlink_to(victim)
    rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=1))
    assert rep.failed == 1 and victim.read_text() == "precious\n"
    # a page planted as a link is replaced by a file, the link's target untouched
    (folder / "alerts.jsonl.lock").unlink()
    (folder / "run-2025-12-29-1.html").symlink_to(victim)
    assert deliver_pending(cfg, store, now=T0 + dt.timedelta(hours=3)).sent == 1
    page = folder / "run-2025-12-29-1.html"
    assert not page.is_symlink() and "k000" in page.read_text() and victim.read_text() == "precious\n"


def test_files_are_owner_only(cfg: Any, store: Any, tmp_path: Path) -> None:
    import os
    import stat

    old = os.umask(0o022)
    try:
        process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
        assert deliver_pending(cfg, store, now=T0).sent == 1
    finally:
        os.umask(old)
    folder = tmp_path / "alerts-out"
    assert stat.S_IMODE(folder.stat().st_mode) == 0o700
    files = list(folder.iterdir())
    assert {p.name for p in files} >= {"alerts.jsonl", "alerts.jsonl.lock", "run-2025-12-29-1.md",
                                       "run-2025-12-29-1.html"}
    assert {p.name: stat.S_IMODE(p.stat().st_mode) for p in files} == {p.name: 0o600 for p in files}
