"""The digest, built from a temporary SQLite store with hand-inserted (invented) verdicts.
(Common practice, no source: these check behaviour, not statistics.)"""

from __future__ import annotations

import base64
import copy
import json
import re
from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import pytest
import sqlalchemy as sa

from drift.config import Config
from drift.delivery import digest as dg
from drift.store import alerts, open_store, outbox, runs
from tests.delivery.digest_payloads import make_payload

MON1 = datetime(2025, 12, 22, 8, 0, tzinfo=timezone.utc)
MON2 = datetime(2025, 12, 29, 8, 0, tzinfo=timezone.utc)
EMAIL = {"kind": "email", "host": "127.0.0.1", "sender": "drift@example.org", "to": "team@example.org"}
FOLDER = {"kind": "folder", "path": "notices"}


def _cfg(tmp_path: Path, channels: list | None = None) -> Config:
    return Config(base_dir=tmp_path, alerts={"digest_path": "digests", "channels": channels or []})


def _light(p: dict) -> dict:
    """Same payload without the heavy cusum/coefficient arrays (faster rendering)."""
    p = copy.deepcopy(p)
    for k in ("cusum", "coefficients"):
        p["charts"].pop(k, None)
    return p


def _check(store, as_of: date, items: list[dict]) -> None:
    rid = store.start_run("check", as_of=as_of)
    store.save_verdicts(rid, as_of, items)
    store.finish_run(rid, "ok")


@pytest.fixture()
def store(tmp_path: Path):
    st = open_store(f"sqlite:///{tmp_path / 'drift.db'}")
    yield st
    st.dispose()


def test_two_digests_the_second_reports_what_changed(tmp_path: Path, store) -> None:
    cfg = _cfg(tmp_path)
    _check(store, date(2025, 12, 22), [_light(make_payload("k000", "keep")),
                                       _light(make_payload("k001", "refit", seed=3)),
                                       _light(make_payload("<b>x</b>", "watch", seed=4)),
                                       _light(make_payload("k003", "data-late", seed=5))])
    first = dg.run_digest(cfg, store, now=MON1)
    assert first.compared_with.startswith("nothing")
    assert {(c.model, c.kind) for c in first.changed} == {("k001", "new"), ("<b>x</b>", "new"), ("k003", "new")}
    assert first.path == tmp_path / "digests" / "digest-2025-12-22.html"
    assert first.path.read_text(encoding="utf-8") == first.html
    assert first.text_path.read_text(encoding="utf-8") == first.text

    _check(store, date(2025, 12, 29), [_light(make_payload("k000", "refit")),
                                       _light(make_payload("k001", "keep", seed=3)),
                                       _light(make_payload("<b>x</b>", "data-late", seed=4)),
                                       _light(make_payload("k003", "relag", seed=5))])
    second = dg.run_digest(cfg, store, now=MON2)
    assert second.compared_with == "the digest of 2025-12-22"
    kinds = {c.model: (c.kind, c.before, c.after) for c in second.changed}
    assert kinds == {"k000": ("new", "keep", "refit"), "<b>x</b>": ("worse", "watch", "data-late"),
                     "k003": ("worse", "data-late", "relag"), "k001": ("cleared", "refit", "keep")}
    # the second digest's run row records its verdicts for the next one
    with store.connect() as conn:
        rows = conn.execute(sa.select(runs).where(runs.c.kind == "digest").order_by(runs.c.id)).fetchall()
    assert [r.status for r in rows] == ["ok", "ok"]
    assert json.loads(rows[-1].detail)["verdicts"] == {"k000": "refit", "k001": "keep", "<b>x</b>": "data-late",
                                                       "k003": "relag"}
    assert second.run_id == rows[-1].id
    # a third digest with nothing new reports no change
    third = dg.build_digest(cfg, store, now=MON2 + timedelta(days=1))
    assert third.changed == ()


def test_content_escaping_and_embedded_images(tmp_path: Path, store) -> None:
    _check(store, date(2025, 12, 29), [make_payload("<b>x</b>", "refit"), make_payload("k001", "keep", seed=3)])
    d = dg.build_digest(_cfg(tmp_path), store, now=MON2)
    html = d.html
    assert "<b>x</b>" not in html  # user data never becomes markup
    assert "&lt;b&gt;x&lt;/b&gt;" in html
    assert "<b>1</b>needs action" in html  # the headline tile
    assert "2 models checked; 1 needs action." in html
    assert "statistical evidence, not certainty" in html and "statistical evidence, not certainty" in d.text
    srcs = re.findall(r'<img src="([^"]+)"', html)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    for s in srcs:
        assert base64.b64decode(s.split(",", 1)[1]).startswith(b"\x89PNG")
    assert "http://" not in html and "https://" not in html  # self-contained
    assert [m.name for m in d.models] == ["<b>x</b>", "k001"]  # most pressing first
    assert d.models[0].state == "act" and d.models[1].state == "steady"
    assert "The forecast errors have drifted upward" in html
    assert d.subject == "drift digest 2025-12-29: 1 of 2 models need action"


def test_since_overrides_the_previous_digest(tmp_path: Path, store) -> None:
    cfg = _cfg(tmp_path)
    _check(store, date(2025, 12, 22), [_light(make_payload("k000", "keep"))])
    dg.run_digest(cfg, store, now=MON1)
    _check(store, date(2025, 12, 29), [_light(make_payload("k000", "refit"))])
    # a 'since' in the far past: nothing existed, so the refit is new
    old = dg.build_digest(cfg, store, since=date(2000, 1, 1), now=MON2)
    assert [(c.model, c.kind, c.before) for c in old.changed] == [("k000", "new", None)]
    assert old.compared_with == "the verdicts as of 2000-01-01"
    # a 'since' after every verdict: the latest verdicts are the earlier state too
    later = dg.build_digest(cfg, store, since=datetime.now(timezone.utc) + timedelta(days=1), now=MON2)
    assert later.changed == ()
    with pytest.raises(ValueError, match="since"):
        dg.build_digest(cfg, store, since="last tuesday", now=MON2)


def test_open_alerts_with_reasons(tmp_path: Path, store) -> None:
    _check(store, date(2025, 12, 29), [_light(make_payload("k000", "refit"))])
    with store.begin() as conn:
        for model, cond, sev, status, reason in [
                ("k000", "refit", 2, "open", "The <i>errors</i> drifted."),
                ("k000", "watch", 1, "open", "Something is slowly moving."),
                ("k009", "refit", 2, "cleared", "old news")]:
            conn.execute(alerts.insert().values(
                model=model, condition=cond, action=cond.split(":")[0], severity=sev, status=status,
                first_seen=MON1, last_seen=MON2, as_of=date(2025, 12, 29),
                payload=json.dumps({"version": 1, "latest": {"action": cond, "reason": reason}})))
    d = dg.build_digest(_cfg(tmp_path), store, now=MON2)
    assert [(a.model, a.condition, a.severity) for a in d.open_alerts] == [("k000", "refit", "act"),
                                                                          ("k000", "watch", "watch")]
    assert d.open_alerts[0].reason == "The <i>errors</i> drifted."
    assert "The &lt;i&gt;errors&lt;/i&gt; drifted." in d.html
    assert "old news" not in d.html
    assert "[act] k000 refit: The <i>errors</i> drifted." in d.text


def test_send_queues_one_row_per_email_channel_once(tmp_path: Path, store) -> None:
    cfg = _cfg(tmp_path, [EMAIL, {**EMAIL, "name": "ops-mail"}, FOLDER])
    _check(store, date(2025, 12, 29), [_light(make_payload("k000", "refit"))])
    d = dg.run_digest(cfg, store, send=True, now=MON2)
    assert d.queued == ("digest:2025-12-29:email", "digest:2025-12-29:ops-mail")
    again = dg.run_digest(cfg, store, send=True, now=MON2 + timedelta(hours=2))
    assert again.queued == ()
    with store.connect() as conn:
        rows = conn.execute(sa.select(outbox).order_by(outbox.c.id)).fetchall()
    assert [(r.channel, r.status, r.alert) for r in rows] == [("email", "pending", None), ("ops-mail", "pending", None)]
    notice = json.loads(rows[0].payload)
    assert notice["event"] == "digest" and notice["html"] == d.html and notice["text"] == d.text
    assert rows[0].subject == d.subject
    # without send nothing is queued
    assert dg.run_digest(cfg, store, now=MON2 + timedelta(days=7)).queued == ()


def test_empty_store(tmp_path: Path, store) -> None:
    d = dg.run_digest(_cfg(tmp_path), store, now=MON2)
    assert d.models == () and d.changed == () and d.open_alerts == ()
    assert "No model has been checked yet." in d.html
    assert d.path.exists()


def test_large_fleet_shows_sections_only_for_action_or_change(tmp_path: Path, store) -> None:
    keep = make_payload("m", "keep")
    keep["charts"] = {}
    items = []
    for i in range(dg.ALL_SECTIONS_MAX + 5):
        p = copy.deepcopy(keep)
        p["name"] = f"m{i:03d}"
        items.append(p)
    items[3] = _light(make_payload("m003", "refit"))
    items[3]["charts"] = {"forecast": items[3]["charts"]["forecast"], "periods": items[3]["charts"]["periods"]}
    _check(store, date(2025, 12, 22), items)
    d = dg.run_digest(_cfg(tmp_path), store, now=MON1)
    assert d.html.count('<section class="model') == 1
    assert 'id="model-0"' in d.html and "m003" in d.html
    # a model without charts still gets a table row and no crash
    assert d.html.count("<tr>") >= len(items)


def test_thin_payloads_do_not_break_the_digest(tmp_path: Path, store) -> None:
    _check(store, date(2025, 12, 29), [{"name": "bare", "verdict": "refit"},
                                       {"name": "odd", "verdict": "mystery", "actions": None, "tests": [None],
                                        "drivers": [None, {"series": None}], "accuracy": "n/a"}])
    d = dg.build_digest(_cfg(tmp_path), store, now=MON2)
    assert {m.name for m in d.models} == {"bare", "odd"}
    assert "no monitoring path in this check" in d.html


def test_bad_arguments(tmp_path: Path, store) -> None:
    with pytest.raises(ValueError, match="tz-aware"):
        dg.build_digest(_cfg(tmp_path), store, now=datetime(2025, 12, 29))
    with pytest.raises(TypeError, match="since"):
        dg.build_digest(_cfg(tmp_path), store, since=3.5, now=MON2)  # type: ignore[arg-type]


def test_failed_write_records_a_failed_run(tmp_path: Path, store) -> None:
    blocker = tmp_path / "digests"
    blocker.write_text("a file where the folder should be")
    with pytest.raises(OSError):
        dg.run_digest(_cfg(tmp_path), store, now=MON2)
    with store.connect() as conn:
        row = conn.execute(sa.select(runs).where(runs.c.kind == "digest")).one()
    assert row.status == "failed" and row.error
