"""End to end: `drift check` on the demo scenario delivers to a real local SMTP server (aiosmtpd on
127.0.0.1) and to the folder; an SMTP outage during the run loses no alert and sends none twice.
Invented scenario (drift.demo)."""

from __future__ import annotations

import email
import json
from pathlib import Path
from typing import Any

import pytest

from drift.config import load_config
from drift.demo import AS_OF, generate
from drift.pipeline import run_check, run_deliver, run_ingest
from drift.store import open_store, outbox

pytestmark = pytest.mark.network


def _demo_with_email(tmp_path: Path, port: int) -> Any:
    cfg_path = generate(tmp_path)
    text = cfg_path.read_text(encoding="utf-8").replace(
        "  channels:\n",
        "  channels:\n    - kind: email\n      host: 127.0.0.1\n      port: %d\n      security: none\n"
        "      sender: drift@example.org\n      to: [planning@example.org]\n" % port, 1)
    cfg_path.write_text(text, encoding="utf-8")
    return load_config(cfg_path)


def _subjects(server: Any) -> list[str]:
    return sorted(email.message_from_bytes(m.content)["Subject"] for m in server.messages)


def test_check_alerts_reach_smtp_and_folder_once(tmp_path: Path, smtp_server: Any) -> None:
    cfg = _demo_with_email(tmp_path, smtp_server.port)
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store, progress=False)
        run_check(cfg, store, as_of=AS_OF)
        subjects = _subjects(smtp_server)
        assert any("east" in s and "refit" in s for s in subjects), subjects
        assert any("west" in s and "late" in s for s in subjects), subjects
        assert not any("north" in s for s in subjects)
        lines = (tmp_path / "alerts" / "alerts.jsonl").read_text(encoding="utf-8").splitlines()
        assert len(lines) == len(subjects)
        assert {json.loads(x)["model"] for x in lines} == {"east", "west"}
        # same data, same verdict: a second check sends nothing new
        n = len(smtp_server.messages)
        run_check(cfg, store, as_of=AS_OF)
        assert len(smtp_server.messages) == n
    finally:
        store.dispose()


def test_smtp_outage_loses_nothing_and_sends_once(tmp_path: Path, smtp_server: Any) -> None:
    cfg = _demo_with_email(tmp_path, smtp_server.port)
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store, progress=False)
        smtp_server.stop()  # the outage
        run_check(cfg, store, as_of=AS_OF)
        assert smtp_server.messages == []
        with store.connect() as conn:
            rows = conn.execute(outbox.select().where(outbox.c.channel.like("%email%"))).fetchall()
        assert rows and all(r.status == "pending" for r in rows), [(r.status, r.last_error) for r in rows]
        assert all(r.last_error for r in rows if r.attempts), [(r.status, r.last_error) for r in rows]
        smtp_server.start()
        # the retry waits for its backoff: deliver as if the backoff had passed
        import datetime as dt

        from drift.delivery.outbox import deliver_pending

        later = dt.datetime.now(dt.timezone.utc) + dt.timedelta(days=1)
        deliver_pending(cfg, store, now=later)
        first = _subjects(smtp_server)
        assert len(first) == len(rows)
        deliver_pending(cfg, store, now=later + dt.timedelta(days=1))
        run_deliver(cfg, store)
        assert _subjects(smtp_server) == first  # none twice
    finally:
        store.dispose()


def test_digest_by_email_carries_its_charts_as_inline_parts(tmp_path: Path, smtp_server: Any) -> None:
    from drift.pipeline import run_digest

    cfg = _demo_with_email(tmp_path, smtp_server.port)
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store, progress=False)
        run_check(cfg, store, as_of=AS_OF)
        n = len(smtp_server.messages)
        run_digest(cfg, store, send=True)
        run_deliver(cfg, store)
        assert len(smtp_server.messages) == n + 1
        msg = email.message_from_bytes(smtp_server.messages[-1].content)
        html = next(p for p in msg.walk() if p.get_content_type() == "text/html").get_payload(decode=True)
        images = [p for p in msg.walk() if p.get_content_type() == "image/png"]
        assert b"data:image" not in html and b'src="cid:' in html
        assert images and all(f"<{p['Content-ID'].strip('<>')}>" for p in images)
        cids = {p["Content-ID"].strip("<>") for p in images}
        assert all(c.encode() in html for c in cids)
    finally:
        store.dispose()
