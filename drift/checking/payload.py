"""Payload: a model's context → its JSON entry (the contract of ``drift check --json``).

Takes the context after every stage; gives the model's entry: verdict (the most urgent of its actions,
:func:`drift.verdicts.overall`), actions sorted by priority, alarms, tests, drivers, accuracy, the
``deployed`` block when there is one, and the charts for the digest (keys starting with ``_`` are the
stages' working figures and are left out), kept as their JSON text (:class:`drift.jsontext.JSONText`, a
read-only mapping that decodes on first read: a third of the memory of the float lists, shipped from a
worker process and written to the verdict row as that text). :func:`error_entry` is the entry of a model that could not be
checked: the same keys, verdict ``error`` and its reason.
"""

from __future__ import annotations

from datetime import date, timedelta
from typing import Any

from drift.checking.context import _Ctx
from drift.config import ModelConfig
from drift.jsontext import as_json_text
from drift.verdicts import ERROR, overall, sort_actions


def _payload(c: _Ctx) -> dict[str, Any]:
    d, m = c.design, c.model
    charts = {k: v for k, v in c.charts.items() if not k.startswith("_")}
    if "break_index" in charts:
        charts["break_date"] = d.periods[charts.pop("break_index")].date().isoformat()
    actions = sort_actions(c.actions)
    # a feed that is late makes its relationship evidence stale: say so, but keep it
    return {
        "name": m.name, "verdict": overall(actions),
        "as_of": (c.as_of - timedelta(seconds=1)).date().isoformat(),
        "target": m.target, "unit": m.unit, "frequency": m.frequency,
        "reference": {"start": m.reference.start.isoformat(), "end": m.reference.end.isoformat()},
        "monitor_start": d.periods[d.n_ref].date().isoformat() if d.n > d.n_ref else None,
        "last_period": d.periods[-1].date().isoformat(),
        "error_model": c.error_model,
        "actions": [a.as_dict() for a in actions],
        "alarms": c.alarms,
        "tests": c.tests,
        "drivers": c.drivers,
        "accuracy": c.accuracy,
        **({"deployed": c.deployed} if c.deployed else {}),
        "charts": as_json_text(charts),
    }


def error_entry(model: ModelConfig | None, reason: str, as_of: date, *, name: str | None = None) -> dict[str, Any]:
    """The JSON entry of a model that could not be checked: the payload's keys, verdict ``error``, its
    ``reason``, and no evidence (empty actions, alarms, tests, drivers and accuracy)."""
    ref = model.reference if model is not None else None
    return {
        "name": model.name if model is not None else name, "verdict": ERROR, "as_of": as_of.isoformat(),
        "target": model.target if model is not None else None,
        "unit": model.unit if model is not None else None,
        "frequency": model.frequency if model is not None else None,
        "reference": {"start": ref.start.isoformat(), "end": ref.end.isoformat()} if ref is not None else None,
        "monitor_start": None, "last_period": None, "error_model": None,
        "actions": [], "alarms": [], "tests": [], "drivers": [], "accuracy": {},
        "reason": reason,
    }
