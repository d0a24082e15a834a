"""Text and HTML bodies of an alert notice (Jinja2, autoescaped: model and series names are user data).

A *notice* is the JSON document an outbox row carries (built by :mod:`drift.delivery.alerts`)::

    {"version": 1, "event": "opened" | "worse" | "cleared", "alert_id": 7, "model": "k000",
     "condition": "relag:k000_promo", "action": "relag", "severity": "act", "as_of": "2025-12-29",
     "run_id": 3, "channel": "mail", "key": "<sha256 hex>", "subject": "...",
     "detail": {<the action dict from the check payload>}, "previous": {<action dict last notified>} | null,
     "context": {"target", "unit", "frequency", "verdict", "reference", "monitor_start",
                 "alarms", "tests", "drivers", "accuracy"},
     "charts": {...}}   # only on e-mail rows, the payload's chart data

Every key may be missing or null; rendering never fails on a thin notice, it just says less.
Each message states the action, the plain reason, the numbers behind it, the as-of date, and a short
footer saying that this is statistical evidence and the decision stays with the model's owner.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import jinja2

from drift.verdicts import accuracy_sentence, as_map, fmt_num, fmt_p, label

#: the footer of every message (plain words; also used by the folder pages)
FOOTER = ("This is statistical evidence, not certainty: whether to refit, re-lag or drop anything "
          "is the model owner's decision.")

#: which chart kinds illustrate which action (the renderer leaves out kinds it has no data for)
CHART_KINDS: dict[str, tuple[str, ...]] = {
    "refit": ("cusum", "forecast"),
    "drop-driver": ("coefficients", "forecast"),
    "relag": ("lag_profile", "coefficients"),
    "data-late": ("feeds",),
    "watch": ("cusum", "forecast"),
}

#: at most this many test results are listed per message (the payload may carry many)
_MAX_TESTS = 8

_TEMPLATES = Path(__file__).resolve().parent.parent / "templates"

_env = jinja2.Environment(
    loader=jinja2.FileSystemLoader(str(_TEMPLATES)),
    # HTML and Markdown are escaped (Markdown viewers render HTML entities); plain text is not HTML
    autoescape=jinja2.select_autoescape(enabled_extensions=("html", "md"), disabled_extensions=("txt",),
                                        default_for_string=True, default=True),
    undefined=jinja2.ChainableUndefined,
    trim_blocks=True,
    lstrip_blocks=True,
    keep_trailing_newline=True,
)


@dataclass(frozen=True)
class RenderedMessage:
    """A rendered notice: one subject line and two bodies."""

    subject: str
    text: str
    html: str


def fmt(value: Any) -> str:
    """A number or date for people: ``None``/NaN -> ``n/a``, floats as in the reasons (:func:`fmt_num`)."""
    if value is None:
        return "n/a"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if not math.isfinite(value):
            return "n/a"
        return fmt_num(value)  # the reasons' own format: a figure reads the same in both
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(fmt(v) for v in value) + "]"
    return str(value)


def headline(notice: Mapping[str, Any]) -> str:
    """What the alert says, in the vocabulary's words (:data:`drift.verdicts.LABEL`; no model name):
    ``refit``, ``data late: x1``, ``drop a driver: x1``, ``re-lag: x1 to lag 3``, ``watch``."""
    action = str(notice.get("action") or "watch")
    detail = notice.get("detail") or {}
    driver = detail.get("driver")
    text = label(action)
    if action == "relag" and driver:
        lag = detail.get("lag")
        text += f": {driver}" + (f" to lag {lag}" if lag is not None else "")
    elif driver:
        text += f": {driver}"
    if action != "watch" and notice.get("severity") == "watch":
        text += " (watch)"
    return text


def subject_for(notice: Mapping[str, Any]) -> str:
    """The subject line, e.g. ``drift: k000 — refit``."""
    event = notice.get("event")
    model = str(notice.get("model") or "?")
    head = headline(notice)
    if event == "cleared":
        return f"drift: {model} — cleared: {head}"
    if event == "worse":
        return f"drift: {model} — {head} (worse than before)"
    return f"drift: {model} — {head}"


def _driver_entry(notice: Mapping[str, Any]) -> Mapping[str, Any]:
    detail = notice.get("detail") or {}
    driver = detail.get("driver")
    for d in (notice.get("context") or {}).get("drivers") or []:
        if isinstance(d, Mapping) and driver is not None and d.get("series") == driver:
            return d
    return {}


def facts(notice: Mapping[str, Any]) -> list[tuple[str, str]]:
    """The numbers behind an alert as (label, value) rows, in a fixed order."""
    detail = notice.get("detail") or {}
    ctx = notice.get("context") or {}
    action = notice.get("action")
    out: list[tuple[str, str]] = [("As of", fmt(notice.get("as_of")))]
    if ctx.get("target"):
        unit = f" ({ctx['unit']})" if ctx.get("unit") else ""
        out.append(("Target", f"{ctx['target']}{unit}"))
    out.append(("Severity", "act" if notice.get("severity") == "act" else "watch"))
    if detail.get("since") is not None:
        out.append(("Relationship looks different since", fmt(detail["since"])))
    if detail.get("driver") is not None:
        out.append(("Driver", fmt(detail["driver"])))
    drv = _driver_entry(notice)
    if drv.get("lag") is not None:
        out.append(("Lag in the deployed model", fmt(drv["lag"])))
    if action == "relag" and detail.get("lag") is not None:
        out.append(("Lag that fits best now", fmt(detail["lag"])))
    if drv.get("coef_reference") is not None or drv.get("coef_recent") is not None:
        ref = as_map(ctx.get("reference"))
        span = f" ({ref['start']} to {ref['end']})" if ref.get("start") and ref.get("end") else ""
        out.append((f"Coefficient, reference period{span}", fmt(drv.get("coef_reference"))))
        recent = fmt(drv.get("coef_recent"))
        ci = drv.get("ci_recent")
        if isinstance(ci, (list, tuple)) and len(ci) == 2:
            recent += f" (interval {fmt(ci[0])} to {fmt(ci[1])})"
        rw = as_map(drv.get("recent_window"))
        which = (f"last {rw['n']} periods ({rw.get('start')} to {rw.get('end')})" if rw.get("n")
                 else "recent window")
        out.append((f"Coefficient, {which}", recent))
    for e in detail.get("effects") or [] if action == "refit" else []:
        if not isinstance(e, Mapping) or e.get("driver") != detail.get("moved"):
            continue
        bw = e.get("before_window") or {}
        aw = e.get("after_window") or {}
        out.append((f"Effect of {fmt(e['driver'])} before the break ({bw.get('start')} to {bw.get('end')})",
                    fmt(e.get("before"))))
        out.append((f"Effect of {fmt(e['driver'])} since the break ({aw.get('start')} to {aw.get('end')})",
                    fmt(e.get("after"))))
    if detail.get("last_period") is not None or (action == "data-late" and drv.get("last_period")):
        out.append(("Last period received", fmt(detail.get("last_period") or drv.get("last_period"))))
    if action == "data-late" and drv.get("next_due") is not None:
        out.append(("Next value was due", fmt(drv["next_due"])))
    # the statistics behind a relationship verdict; a feed or driver-worth notice has its own numbers
    evidence = action in ("refit", "watch")
    for a in (ctx.get("alarms") or []) if evidence else []:
        if not isinstance(a, Mapping):
            continue
        lvl = f" (level {fmt(a.get('level'))})" if a.get("level") is not None else ""
        out.append((f"Alarm: {_test_label(a)} on {fmt(a.get('date'))}",
                     f"statistic {fmt(a.get('statistic'))} crossed {fmt(a.get('threshold'))}{lvl}"))
    for t in ((ctx.get("tests") or []) if evidence else [])[:_MAX_TESTS]:
        if not isinstance(t, Mapping):
            continue
        parts = [f"statistic {fmt(t.get('statistic'))}"]
        if t.get("pvalue") is not None:
            parts.append(f"p-value {fmt_p(t.get('pvalue'), t.get('test'))}")
        if t.get("threshold") is not None:
            lvl = f" at level {fmt(t.get('level'))}" if t.get("level") is not None else ""
            parts.append(f"threshold {fmt(t.get('threshold'))}{lvl}")
        if t.get("date"):
            parts.append(f"dated {fmt(t.get('date'))}")
        out.append((f"Test: {_test_label(t)}", ", ".join(parts)))
    acc = ctx.get("accuracy") or {}
    if isinstance(acc, Mapping) and (acc.get("model") or {}).get("mae") is not None:
        out.append(("Accuracy", accuracy_sentence(acc, ctx.get("unit"))))
    prev = notice.get("previous")
    if notice.get("event") == "worse" and isinstance(prev, Mapping):
        out.append(("Previously", _describe(prev)))
    return out


def _describe(action: Mapping[str, Any]) -> str:
    bits = [f"{action.get('action', '?')} ({action.get('severity', '?')})"]
    for k in ("driver", "lag", "since", "last_period"):
        if action.get(k) is not None:
            bits.append(f"{k.replace('_', ' ')} {fmt(action[k])}")
    return ", ".join(bits)


def _context(notice: Mapping[str, Any], images: Mapping[str, str], notes: Sequence[str]) -> dict[str, Any]:
    detail = notice.get("detail") or {}
    reason = detail.get("reason") or "no reason was recorded for this action"
    return {
        "n": notice,
        "subject": notice.get("subject") or subject_for(notice),
        "headline": headline(notice),
        "event": notice.get("event") or "opened",
        "model": notice.get("model") or "?",
        "reason": reason,
        "facts": facts(notice),
        "images": dict(images),
        "notes": list(notes),
        "footer": FOOTER,
        "key": notice.get("key") or "",
    }


def render(notice: Mapping[str, Any], *, images: Mapping[str, str] | None = None,
           notes: Sequence[str] = ()) -> RenderedMessage:
    """Render one notice.

    Parameters
    ----------
    notice : the outbox document (see the module docstring).
    images : chart kind -> ``src`` to reference in the HTML (``cid:...`` for e-mail).
    notes : one-line notes shown under the charts (e.g. "no forecast chart: no data").

    Returns
    -------
    RenderedMessage
        subject (``notice["subject"]`` when present), plain text and HTML.
    """
    ctx = _context(notice, images or {}, notes)
    text = _env.get_template("alert.txt").render(ctx)
    html = _env.get_template("alert.html").render(ctx)
    return RenderedMessage(subject=ctx["subject"], text=text, html=html)


def _test_label(t: Mapping[str, Any]) -> str:
    """A test's name, with the driver it watches when it watches one."""
    return fmt(t.get("test")) + (f" ({fmt(t.get('driver'))})" if t.get("driver") else "")


def render_page(notices: Sequence[Mapping[str, Any]], *, as_of: str, run_id: Any,
                fmt_: str) -> str:
    """A page listing one run's alerts (``fmt_``: ``"md"`` or ``"html"``), for the folder sink."""
    if fmt_ not in ("md", "html"):
        raise ValueError(f"fmt_ must be 'md' or 'html', got {fmt_!r}")
    items = [_context(n, {}, ()) for n in notices]
    page = _env.get_template(f"alert_page.{fmt_}").render(
        items=items, as_of=as_of, run_id=run_id, footer=FOOTER)
    if fmt_ == "md":
        # quotes need no escaping in Markdown (< > & stay escaped: the page may be rendered as HTML)
        page = page.replace("&#39;", "'").replace("&#34;", '"')
    return page
