"""The figures of a check payload as tables and sentences, shared by the report, the digest and the alerts.

One place turns a payload into what people read, so a coefficient, a window or an accuracy figure reads the
same in every output: the numbers are those of the payload (computed once by the check), printed with
:func:`drift.verdicts.fmt_num`, and every window is named by the periods it covers.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from drift.verdicts import accuracy_sentence, as_map, fmt_num, fmt_p


@dataclass(frozen=True)
class Table:
    """A table for people: a caption (may be ""), column headers and rows of cell strings."""

    caption: str
    headers: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]


def num(x: Any) -> str:
    """A figure as the reasons print it; "—" for none."""
    if x is None or isinstance(x, bool):
        return "—"
    try:
        return fmt_num(float(x))
    except (TypeError, ValueError):
        return "—"


def _span(w: Any) -> str:
    return f"{w.get('start')} to {w.get('end')}" if isinstance(w, Mapping) and w.get("start") else ""


def driver_table(payload: Mapping[str, Any]) -> Table | None:
    """Per driver: lag, form, the reference-fit coefficient, the recent rolling one with its interval, the
    refit's before/after-break estimates when a break was dated, worth (Clark–West p), the feed. Each
    column header names its window."""
    drivers = [d for d in payload.get("drivers") or [] if isinstance(d, Mapping)]
    if not drivers:
        return None
    ref = as_map(payload.get("reference"))
    rw = next((d["recent_window"] for d in drivers if isinstance(d.get("recent_window"), Mapping)), None)
    brk = next((d["break"] for d in drivers if isinstance(d.get("break"), Mapping)), None)
    headers = ["driver", "lag", "form", f"coef., reference fit ({_span(ref)})" if ref else "coef., reference fit",
               (f"coef., last {rw['n']} periods ({_span(rw)}), 95% interval" if rw
                else "coef., recent window, 95% interval")]
    if brk is not None:
        headers += [f"effect before the break ({_span(brk.get('before_window'))})",
                    f"effect since the break ({_span(brk.get('after_window'))})", "p, no change"]
    headers += ["worth (Clark–West p)", "feed"]
    rows = []
    for d in drivers:
        ci = d.get("ci_recent") if isinstance(d.get("ci_recent"), (list, tuple)) else None
        recent = num(d.get("coef_recent")) + (f" [{num(ci[0])}, {num(ci[1])}]" if ci and len(ci) == 2 else "")
        row = [str(d.get("series")), "—" if d.get("lag") is None else str(d.get("lag")), str(d.get("form") or "—"),
               num(d.get("coef_reference")), recent]
        if brk is not None:
            b = as_map(d.get("break"))
            row += [num(b.get("before")), num(b.get("after")),
                    fmt_p(b.get("pvalue_change")) if b.get("pvalue_change") is not None else "—"]
        w = as_map(d.get("worth"))
        row += [fmt_p(w.get("pvalue")) if w.get("pvalue") is not None else "—",
                f"late (last period {d.get('last_period')})" if d.get("late") else "on time"]
        rows.append(tuple(row))
    return Table(caption="", headers=tuple(headers), rows=tuple(rows))


def tests_table(payload: Mapping[str, Any], limit: int = 12) -> Table | None:
    """The tests the check ran: statistic, p-value (a bound where a table clipped it), threshold, date."""
    tests = [t for t in payload.get("tests") or [] if isinstance(t, Mapping)][:limit]
    if not tests:
        return None
    rows = []
    for t in tests:
        name = str(t.get("test")) + (f" ({t['driver']})" if t.get("driver") else "")
        rows.append((name, num(t.get("statistic")),
                     fmt_p(t.get("pvalue"), t.get("test")) if t.get("pvalue") is not None else "—",
                     num(t.get("threshold")),
                     str(t.get("date") or "—") + (" (after the horizon)" if t.get("beyond_horizon") else "")))
    return Table(caption="", headers=("test", "statistic", "p-value", "threshold", "signalled"), rows=tuple(rows))


def accuracy_text(payload: Mapping[str, Any]) -> str:
    """The accuracy paragraph of a payload (:func:`drift.verdicts.accuracy_sentence`)."""
    acc = payload.get("accuracy")
    return accuracy_sentence(acc if isinstance(acc, Mapping) else None, payload.get("unit"))


def context_line(payload: Mapping[str, Any]) -> str:
    """Target, unit, reference period, monitoring start, last period: the frame of a model's figures."""
    ref = as_map(payload.get("reference"))
    bits = []
    if payload.get("target"):
        bits.append(f"Target {payload['target']}" + (f" ({payload['unit']})" if payload.get("unit") else ""))
    if ref.get("start"):
        bits.append(f"reference {ref['start']} to {ref['end']}")
    if payload.get("monitor_start"):
        bits.append(f"monitored since {payload['monitor_start']}")
    if payload.get("last_period"):
        bits.append(f"data up to {payload['last_period']}")
    return ", ".join(bits) + "." if bits else ""


def late_feeds(payload: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The late feeds of a check payload, as ``drift status`` and the digest list them: each driver marked
    ``late`` (its own entry, with ``driver`` its series name), then each other series a ``data-late`` action
    names (the target, whose feed is no driver: ``series``, ``late``, ``last_period``, ``next_due``,
    ``role``, ``driver``)."""
    drivers = payload.get("drivers") or []
    items = ([{"driver": k, **d} for k, d in drivers.items() if isinstance(d, Mapping)]
             if isinstance(drivers, Mapping) else [d for d in drivers if isinstance(d, Mapping)])
    out: list[dict[str, Any]] = []
    for d in items:
        if d.get("late") is True:
            out.append({**d, "driver": d.get("driver") or d.get("series") or d.get("name")})
    seen = {f["driver"] for f in out}
    for a in payload.get("actions") or []:
        if isinstance(a, Mapping) and a.get("action") == "data-late" and a.get("driver") \
                and a["driver"] not in seen:
            seen.add(a["driver"])
            out.append({"series": a["driver"], "late": True, "last_period": a.get("last_period"),
                        "next_due": a.get("next_due"), "role": a.get("role", "target"), "driver": a["driver"]})
    return out


def keep_reason(payload: Mapping[str, Any]) -> str:
    """Why a model with no action is kept: the monitors found nothing, or there was nothing to monitor yet
    (no period after the reference period has data: a new model, or a new epoch fitted up to the check)."""
    start, last = payload.get("monitor_start"), payload.get("last_period")
    if start and (not last or str(start) <= str(last)):
        return "the monitors found no change and every feed is on time."
    end = as_map(payload.get("reference")).get("end")
    return ("nothing is monitored yet: the reference period runs to " + (f"{end}" if end else "the last period")
            + ", and the monitors start with the first period after it that has data. Every feed is on time.")


def cells(rows: Sequence[Sequence[Any]]) -> tuple[tuple[str, ...], ...]:
    return tuple(tuple(str(c) for c in r) for r in rows)
