"""Outbox mechanics without a network: backoff, registry, unrouted rows, summary, claims."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any, ClassVar

import pytest
import sqlalchemy as sa

import drift.delivery.outbox as ob
from drift.delivery.alerts import process_alerts
from drift.delivery.outbox import (
    Channel,
    DeliveryError,
    OutboxMessage,
    backoff,
    configured_channels,
    deliver_pending,
    idempotency_key,
    outbox_summary,
    register_channel,
)
from drift.store import outbox as outbox_t
from tests.delivery.conftest import T0, action, folder_outbox, make_cfg, outcome, payload


def test_backoff_doubles_and_caps(tmp_path: Path) -> None:
    cfg = make_cfg(tmp_path, [], retry_backoff="5m", retry_max_backoff="1h")
    got = [backoff(cfg, n) for n in range(1, 8)]
    assert got == [dt.timedelta(minutes=m) for m in (5, 10, 20, 40, 60, 60, 60)]
    assert backoff(cfg, 10_000) == dt.timedelta(hours=1)


def test_idempotency_key_is_stable_and_distinct() -> None:
    k = idempotency_key(1, "refit", "act", "2025-12-29", 1, "mail")
    assert k == idempotency_key(1, "refit", "act", "2025-12-29", 1, "mail") and len(k) == 64
    assert k != idempotency_key(1, "refit", "act", "2025-12-29", 1, "mail2")
    assert k != idempotency_key(1, "refit", "act", "2025-12-29", 2, "mail")


def test_key_is_unique_in_the_table(tmp_path: Path, store: Any) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "o"}])
    [ev] = process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    with pytest.raises(sa.exc.IntegrityError), store.begin() as conn:
        ob.enqueue(conn, configured_channels(cfg), {"model": "k000"}, alert_id=ev.alert_id, condition="refit",
                   severity="act", as_of="2025-12-29", seq=1, now=T0)


def test_default_channel_names(tmp_path: Path) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "a"}, {"kind": "folder", "path": "b"},
                              {"kind": "folder", "path": "c", "name": "named"}])
    assert [n for n, _ in configured_channels(cfg)] == ["folder", "folder-2", "named"]
    clash = make_cfg(tmp_path, [{"kind": "folder", "path": "a"}, {"kind": "folder", "path": "b", "name": "folder"}])
    with pytest.raises(ValueError, match="unique"):
        configured_channels(clash)


class Flaky(Channel):
    kind = "test-flaky"
    sent: ClassVar[list[str]] = []

    def __init__(self, cfg: Any, spec: Any, name: str, fail: int = 0, explode: bool = False) -> None:
        super().__init__(cfg, spec, name)
        self.fail, self.explode = fail, explode

    def send(self, msg: OutboxMessage) -> None:
        if self.explode:
            raise KeyError("a bug in a channel")
        if self.fail > 0:
            self.fail -= 1
            raise DeliveryError("temporarily broken")
        Flaky.sent.append(msg.key)


def test_register_custom_kind() -> None:
    register_channel(Flaky)
    assert ob.channel_class("test-flaky") is Flaky
    with pytest.raises(ValueError, match="unknown channel kind"):
        ob.channel_class("pigeon")


def test_attempts_and_backoff_recorded(tmp_path: Path, store: Any) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "o", "name": "x"}])
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    Flaky.sent = []
    ch = Flaky(cfg, None, "x", fail=2)
    t = T0
    deliver_pending(cfg, store, now=t, channels={"x": ch})
    deliver_pending(cfg, store, now=t + dt.timedelta(minutes=4), channels={"x": ch})  # not due yet
    with store.connect() as conn:
        r = conn.execute(sa.select(outbox_t)).one()
    assert (r.attempts, r.next_attempt_at) == (1, T0 + dt.timedelta(minutes=5))
    deliver_pending(cfg, store, now=T0 + dt.timedelta(minutes=5), channels={"x": ch})
    with store.connect() as conn:
        r = conn.execute(sa.select(outbox_t)).one()
    assert (r.attempts, r.next_attempt_at, r.status) == (2, T0 + dt.timedelta(minutes=15), "pending")
    assert outbox_summary(store).next_attempt_at == T0 + dt.timedelta(minutes=15)
    rep = deliver_pending(cfg, store, now=T0 + dt.timedelta(minutes=15), channels={"x": ch})
    assert rep.sent == 1 and len(Flaky.sent) == 1
    with store.connect() as conn:
        r = conn.execute(sa.select(outbox_t)).one()
    assert (r.attempts, r.status, r.sent_at) == (3, "sent", T0 + dt.timedelta(minutes=15))


def test_unexpected_channel_error_is_never_resent(tmp_path: Path, store: Any) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "o", "name": "x"}])
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    Flaky.sent = []
    rep = deliver_pending(cfg, store, now=T0, channels={"x": Flaky(cfg, None, "x", explode=True)})
    assert rep.uncertain == 1 and "KeyError" in rep.errors[0].error
    ok = Flaky(cfg, None, "x")
    deliver_pending(cfg, store, now=T0 + dt.timedelta(days=1), channels={"x": ok})
    assert Flaky.sent == [] and outbox_summary(store).counts["uncertain"] == 1


def test_unconfigured_channel_rows_wait(tmp_path: Path, store: Any) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "o", "name": "gone"}])
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    rep = deliver_pending(make_cfg(tmp_path, []), store, now=T0)
    assert (rep.sent, rep.deferred, rep.pending) == (0, 1, 1) and not rep.ok


def test_claim_is_exclusive(tmp_path: Path, store: Any) -> None:
    cfg = make_cfg(tmp_path, [{"kind": "folder", "path": "o"}])
    process_alerts(cfg, store, outcome(payload("k000", [action("refit")])), now=T0)
    with store.connect() as conn:
        rid = conn.execute(sa.select(outbox_t.c.id)).scalar_one()
    assert ob._claim(store, rid, T0, dt.timedelta(minutes=1)) is True
    assert ob._claim(store, rid, T0, dt.timedelta(minutes=1)) is False


def test_naive_now_rejected(tmp_path: Path, store: Any) -> None:
    with pytest.raises(ValueError, match="now"):
        deliver_pending(make_cfg(tmp_path, []), store, now=dt.datetime(2025, 1, 1))


def test_cli_resend_and_accept_uncertain_rows(tmp_path: Path) -> None:
    """`drift deliver --resend ID / --accept ID`: an operator's decision on uncertain rows (other rows refused,
    exit 2, nothing changed)."""
    from click.testing import CliRunner

    from drift.cli import cli

    with folder_outbox(tmp_path, ("k000", "k001"), "uncertain", "may have been delivered") as (st, cfg_file):
        run = CliRunner().invoke
        res = run(cli, ["deliver", "--config", cfg_file, "--resend", "1", "--accept", "7"])
        assert res.exit_code == 2 and "row 7 is no such row" in res.output
        assert outbox_summary(st).counts["uncertain"] == 2  # nothing changed
        res = run(cli, ["deliver", "--config", cfg_file, "--resend", "1", "--accept", "2"])
        assert res.exit_code == 0, res.output
        assert "1 uncertain notice recorded as delivered" in res.output and "1 notice queued again" in res.output
        counts = outbox_summary(st).counts
        assert (counts["uncertain"], counts["sent"]) == (0, 2)
        lines = (tmp_path / "out" / "alerts.jsonl").read_text(encoding="utf-8").splitlines()
        assert len(lines) == 1  # only the resent row was written; the accepted one was not sent again
        res = run(cli, ["deliver", "--config", cfg_file, "--accept", "2"])
        assert res.exit_code == 2 and "row 2 is sent" in res.output


def test_cli_dismiss_given_up_rows(tmp_path: Path) -> None:
    """`drift deliver --dismiss ID`: a given-up (dead) notice handled another way is kept (status dismissed,
    its last error as it was), never sent, and no longer listed by `drift status` or the digest; rows in
    another status are refused (exit 2, nothing changed), and a row given to two decisions too."""
    from click.testing import CliRunner

    from drift.cli import cli
    from drift.config import load_config
    from drift.delivery.digest import _undelivered
    from drift.status import collect_status, format_status

    with folder_outbox(tmp_path, ("k000", "k001"), "dead", "550 no such mailbox") as (st, cfg_file):
        run = CliRunner().invoke
        full = load_config(tmp_path / "drift.yaml")
        assert "2 notices given up" in format_status(collect_status(full, st))
        res = run(cli, ["deliver", "--config", cfg_file, "--dismiss", "1", "--resend", "1"])
        assert res.exit_code == 2 and "give each row to one of" in res.output
        res = run(cli, ["deliver", "--config", cfg_file, "--dismiss", "1", "--dismiss", "9"])
        assert res.exit_code == 2 and "row 9 is no such row" in res.output
        assert outbox_summary(st).counts["dead"] == 2  # nothing changed
        res = run(cli, ["deliver", "--config", cfg_file, "--dismiss", "1"])
        assert res.exit_code == 0, res.output
        assert "1 given-up notice dismissed" in res.output
        counts = outbox_summary(st).counts
        assert (counts["dead"], counts["dismissed"], counts["sent"]) == (1, 1, 0)
        with st.connect() as conn:
            row = conn.execute(sa.select(outbox_t.c.status, outbox_t.c.last_error).where(outbox_t.c.id == 1)).one()
        assert tuple(row) == ("dismissed", "550 no such mailbox")
        assert not (tmp_path / "out" / "alerts.jsonl").exists()  # never sent
        assert [u.id for u in _undelivered(st)] == [2]
        text = format_status(collect_status(full, st))
        assert "#2 via" in text and "#1 via" not in text and "1 notice given up" in text
        res = run(cli, ["deliver", "--config", cfg_file, "--dismiss", "1"])
        assert res.exit_code == 2 and "row 1 is dismissed" in res.output


def test_email_row_carries_the_chart_json(tmp_path: Path, store: Any) -> None:
    """A check payload keeps its charts as JSON text (drift.jsontext.JSONText); its e-mail notice row holds
    them as a JSON object (never the wrapper's str()), the other channels' rows none."""
    import json

    from drift.delivery.email import EmailSender
    from drift.jsontext import JSONText, as_json_text
    from tests.delivery.conftest import PNG_1PX, fake_renderer

    cfg = make_cfg(tmp_path, [{"kind": "email", "name": "mail", "host": "127.0.0.1", "sender": "d@x.test",
                               "to": "o@x.test"}, {"kind": "folder", "path": "o"}])
    p = payload("k000", [action("refit")])
    plain = p["charts"]
    p["charts"] = as_json_text(plain)
    assert isinstance(p["charts"], JSONText)
    process_alerts(cfg, store, outcome(p), now=T0)
    assert not p["charts"].is_decoded  # the notice decoded its own copy; the payload still holds text
    with store.connect() as conn:
        rows = {r.channel: json.loads(r.payload) for r in conn.execute(sa.select(outbox_t))}
    assert rows["mail"]["charts"] == plain and isinstance(rows["mail"]["charts"], dict)
    assert rows["folder"]["charts"] is None
    spec = dict(configured_channels(cfg))["mail"]
    pngs, notes = EmailSender(cfg, spec, "mail", chart_renderer=fake_renderer)._charts(rows["mail"])
    assert pngs == {"cusum": PNG_1PX, "forecast": PNG_1PX} and notes == []
    # a notice handed to enqueue with the block still as text is written as that JSON object too
    with store.begin() as conn:
        ob.enqueue(conn, configured_channels(cfg), {"model": "k000", "charts": p["charts"]}, alert_id=1,
                   condition="refit", severity="act", as_of="2025-12-29", seq=9, now=T0)
    with store.connect() as conn:
        docs = [json.loads(r.payload) for r in conn.execute(sa.select(outbox_t).where(outbox_t.c.channel == "mail"))]
    assert [d["charts"] for d in docs] == [plain, plain]
