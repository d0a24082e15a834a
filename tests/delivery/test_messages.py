"""Message rendering: user names escaped in HTML, every message states action, reason, numbers, as-of
and the footer; thin notices render without errors. Common practice, no source."""

from __future__ import annotations

from typing import Any

import pytest

from drift.delivery.alerts import _notice
from drift.delivery.messages import FOOTER, facts, fmt, render, render_page, subject_for
from tests.delivery.conftest import action, payload


def notice_for(p: dict[str, Any], a: dict[str, Any], event: str = "opened", previous: Any = None) -> dict[str, Any]:
    from drift.delivery.alerts import condition_key, severity_of

    return _notice(p, event=event, alert_id=1, condition=condition_key(a), action=a, severity=severity_of(a),
                   as_of=None, run_id=1, previous=previous) | {"as_of": p["as_of"]}


def test_script_in_model_name_is_escaped() -> None:
    evil = "<script>alert('x')</script>"
    p = payload(evil, [action("relag", driver="<b>drv</b>", lag=3)])
    r = render(notice_for(p, p["actions"][0]))
    assert "<script>" not in r.html and "&lt;script&gt;" in r.html
    assert "<b>drv</b>" not in r.html and "&lt;b&gt;drv&lt;/b&gt;" in r.html
    assert evil in r.text  # plain text is not markup
    page = render_page([notice_for(p, p["actions"][0])], as_of="2025-12-29", run_id=1, fmt_="html")
    assert "<script>" not in page


@pytest.mark.parametrize("a, numbers", [
    (action("refit", since="2024-11-04"), ["2024-11-04", "1.9", "1.7", "0.948"]),
    (action("drop-driver", driver="k000_temp"), ["k000_temp", "0.5", "0.02", "-0.3 to 0.34"]),
    (action("relag", driver="k000_promo", lag=3), ["Lag that fits best now: 3", "Lag in the deployed model: 1"]),
    (action("data-late", driver="k000_temp", last_period="2025-11-24"), ["2025-11-24", "2025-12-01T00:00:00+00:00"]),
    (action("watch", "watch"), ["over 52 periods: MAE 4.1", "seasonal-naive forecast on the same periods: MAE 4.5",
                                "MASE 0.8 vs 0.9 for the seasonal-naive forecast"]),
])
def test_every_message_states_action_reason_numbers_as_of_footer(a: dict[str, Any], numbers: list[str]) -> None:
    p = payload("k000", [a])
    r = render(notice_for(p, a))
    for body in (r.text, r.html.replace("&#39;", "'")):
        assert a["reason"] in body
        assert "As of" in body and "2025-12-29" in body
        assert FOOTER in body
    for n in numbers:
        assert n in r.text
    assert r.subject.startswith("drift: k000 — ")


def test_subjects() -> None:
    base = {"model": "k000", "severity": "act"}
    assert subject_for({**base, "action": "refit"}) == "drift: k000 — refit"
    assert subject_for({**base, "action": "relag", "detail": {"driver": "p", "lag": 2}}) == \
        "drift: k000 — re-lag: p to lag 2"
    assert subject_for({**base, "action": "data-late", "detail": {"driver": "t"}}) == "drift: k000 — data late: t"
    assert subject_for({**base, "action": "refit", "severity": "watch"}) == "drift: k000 — refit (watch)"
    assert subject_for({**base, "action": "refit", "event": "worse"}).endswith("(worse than before)")
    assert subject_for({**base, "action": "refit", "event": "cleared"}) == "drift: k000 — cleared: refit"


def test_worse_message_says_what_it_was() -> None:
    p = payload("k000", [action("relag", driver="k000_promo", lag=3)])
    r = render(notice_for(p, p["actions"][0], event="worse", previous=action("relag", driver="k000_promo", lag=2)))
    assert "got worse" in r.text and "Previously: relag (act), driver k000_promo, lag 2" in r.text


@pytest.mark.parametrize("n", [{}, {"model": None, "detail": None, "context": None},
                               {"model": "m", "action": "refit", "context": {"tests": [None, {"test": "x"}],
                                                                             "alarms": "junk", "drivers": [1]}}])
def test_thin_notices_render(n: dict[str, Any]) -> None:
    r = render(n)
    assert FOOTER in r.text and "no reason was recorded" in r.text
    for kind in ("md", "html"):
        assert FOOTER.split(":")[0] in render_page([n], as_of="2025-12-29", run_id=None, fmt_=kind)


def test_fmt() -> None:
    assert fmt(None) == "n/a" and fmt(float("nan")) == "n/a" and fmt(1.23456) == "1.23" and fmt(3) == "3"
    assert fmt([0.8, 1.6]) == "[0.8, 1.6]"


def test_facts_order_is_fixed() -> None:
    p = payload("k000", [action("refit", since="2024-11-04")])
    labels = [k for k, _ in facts(notice_for(p, p["actions"][0]))]
    assert labels[:4] == ["As of", "Target", "Severity", "Relationship looks different since"]


def test_render_page_rejects_unknown_format() -> None:
    with pytest.raises(ValueError, match="fmt_"):
        render_page([], as_of="x", run_id=1, fmt_="pdf")
