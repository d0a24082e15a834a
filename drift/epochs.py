"""Monitoring epochs: since when a model is monitored as what.

A model's first epoch is its config as written (``reference``, driver lags, drivers). After a verdict the
team decides (``drift accept``): refit on recent data, move a driver to another lag, or drop a driver. That
starts a new epoch, recorded in the store's ``model_epochs`` table with who decided, when and why; the
YAML is not edited. From the epoch's ``effective`` day on (the check date the decision was made at), a
check of that model uses the epoch's settings on top of the YAML:

- ``reference``: the period the model is (re)fitted on, replacing ``reference:`` of the YAML;
- ``lags``: driver series -> lag, replacing those drivers' ``lag``;
- ``dropped``: driver series left out of the model.

Each epoch's settings are complete (a relag after a refit keeps the refit's reference), so the epoch in
force at a date says everything about how the model was monitored then. A check as of an earlier date
uses the epoch that was in force at that date, so old verdicts can be replayed as they were; verdicts and
alerts of an old epoch stay in the store, readable.

A driver the YAML no longer lists is ignored by the epoch's settings (the YAML stays the base).
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from typing import Any

import sqlalchemy as sa

from drift.config import ModelConfig, ReferenceConfig
from drift.exceptions import DecisionError
from drift.store import Store, model_epochs, utcnow
from drift.verdicts import label

#: the decisions that start a new epoch
ACTIONS = ("refit", "relag", "drop-driver")
#: the action name of a model's first epoch (its config as written)
CONFIGURED = "configured"


@dataclass(frozen=True)
class Epoch:
    """One monitoring epoch of a model.

    Attributes
    ----------
    model : the model's name.
    number : 1 for the config as written, then 2, 3, ...
    action : ``configured`` (epoch 1), ``refit``, ``relag`` or ``drop-driver``.
    effective : the first check date (``--as-of``) the epoch applies to; None for epoch 1.
    decided_by, recorded_at, note : who decided, when it was recorded (UTC), and why (None for epoch 1).
    reference : (start, end) of the period the model is fitted on in this epoch.
    lags : driver series -> lag, for the drivers whose lag differs from the YAML's.
    dropped : driver series left out in this epoch.
    proposal : what ``drift accept`` fitted when it started the epoch (coefficients, accuracy); {} for 1.
    """

    model: str
    number: int
    action: str
    effective: date | None
    decided_by: str | None
    recorded_at: datetime | None
    note: str | None
    reference: tuple[date, date]
    lags: Mapping[str, int] = field(default_factory=dict)
    dropped: tuple[str, ...] = ()
    proposal: Mapping[str, Any] = field(default_factory=dict)

    def as_json(self, model: ModelConfig | None = None) -> dict[str, Any]:
        """The ``epoch`` key of a check's per-model JSON (and of ``drift status --json``).

        With ``model`` (the YAML's model), ``drivers`` lists the drivers monitored in this epoch with their
        lags."""
        out: dict[str, Any] = {
            "number": self.number, "action": self.action,
            "since": self.effective.isoformat() if self.effective else None,
            "decided_by": self.decided_by,
            "decided_at": self.recorded_at.isoformat() if self.recorded_at else None,
            "note": self.note,
            "reference": {"start": self.reference[0].isoformat(), "end": self.reference[1].isoformat()},
            "lags": dict(self.lags), "dropped": list(self.dropped),
        }
        if model is not None:
            out["drivers"] = [{"series": d.series, "lag": d.lag} for d in apply_epoch(model, self).drivers]
        return out

    def describe(self) -> str:
        """One line for people: ``epoch 2 (refit, since 2024-12-31 by alice): reference 2024-04-01 to ...``."""
        ref = f"reference {self.reference[0].isoformat()} to {self.reference[1].isoformat()}"
        if self.number == 1:
            return f"epoch 1 (as configured): {ref}"
        parts = [ref]
        if self.lags:
            parts.append(", ".join(f"{s} at lag {v}" for s, v in sorted(self.lags.items())))
        if self.dropped:
            parts.append("without " + ", ".join(self.dropped))
        when = self.effective.isoformat() if self.effective else "?"
        return f"epoch {self.number} ({self.action}, since {when} by {self.decided_by}): " + "; ".join(parts)


def configured(model: ModelConfig) -> Epoch:
    """Epoch 1: the model as its YAML says."""
    return Epoch(model=model.name, number=1, action=CONFIGURED, effective=None, decided_by=None,
                 recorded_at=None, note=None, reference=(model.reference.start, model.reference.end))


def _from_row(row: Any) -> Epoch:
    st = json.loads(row.settings) if row.settings else {}
    ref = st.get("reference") or {}
    eff = row.effective if isinstance(row.effective, date) else date.fromisoformat(str(row.effective))
    return Epoch(model=str(row.model), number=int(row.epoch), action=str(row.action), effective=eff,
                 decided_by=str(row.decided_by), recorded_at=row.recorded_at, note=row.note,
                 reference=(date.fromisoformat(ref["start"]), date.fromisoformat(ref["end"])),
                 lags={str(k): int(v) for k, v in (st.get("lags") or {}).items()},
                 dropped=tuple(st.get("dropped") or ()), proposal=st.get("proposal") or {})


def recorded(store: Store, models: Iterable[str]) -> dict[str, list[Epoch]]:
    """The recorded epochs (2, 3, ...) of each named model, oldest first (models without any are absent)."""
    names = list(dict.fromkeys(models))
    out: dict[str, list[Epoch]] = {}
    if not names:
        return out
    with store.connect() as conn:
        for i in range(0, len(names), 500):
            q = (sa.select(model_epochs).where(model_epochs.c.model.in_(names[i:i + 500]))
                 .order_by(model_epochs.c.model, model_epochs.c.epoch))
            for row in conn.execute(q):
                out.setdefault(str(row.model), []).append(_from_row(row))
    return out


def in_force(model: ModelConfig, epochs: Sequence[Epoch], day: date) -> Epoch:
    """The epoch in force for a check as of ``day``: the newest whose ``effective`` is not after it."""
    cur = configured(model)
    for e in epochs:
        if e.effective is not None and e.effective <= day:
            cur = e
    return cur


def current(store: Store, models: Sequence[ModelConfig], day: date) -> dict[str, Epoch]:
    """Model name -> the epoch in force at ``day`` (one query for all models)."""
    rec = recorded(store, [m.name for m in models])
    return {m.name: in_force(m, rec.get(m.name, []), day) for m in models}


def history(store: Store, model: ModelConfig) -> list[Epoch]:
    """Every epoch of the model, epoch 1 (the config as written) first."""
    return [configured(model), *recorded(store, [model.name]).get(model.name, [])]


def apply_epoch(model: ModelConfig, epoch: Epoch) -> ModelConfig:
    """The model as the check sees it in ``epoch``: the YAML with the epoch's reference, lags and drivers."""
    if model.deployed is not None and model.deployed.epoch != epoch.number:
        # production coefficients belong to one epoch: after a decision they describe the old model
        model = model.model_copy(update={"deployed": None})
    if epoch.number == 1:
        return model
    drivers = [d.model_copy(update={"lag": int(epoch.lags[d.series])}) if d.series in epoch.lags else d
               for d in model.drivers if d.series not in epoch.dropped]
    ref = ReferenceConfig(start=epoch.reference[0], end=epoch.reference[1])
    return model.model_copy(update={"reference": ref, "drivers": drivers})


def start_epoch(store: Store, model: ModelConfig, *, action: str, effective: date, reference: tuple[date, date],
                lags: Mapping[str, int], dropped: Sequence[str], decided_by: str, note: str | None,
                proposal: Mapping[str, Any], now: datetime | None = None) -> tuple[Epoch, list[int]]:
    """Record a new epoch and close the model's open alerts as acted on, in one transaction.

    Returns the new epoch and the ids of the alerts closed.

    Raises
    ------
    ValueError : an unknown action.
    DecisionError : ``effective`` is before the start of the epoch in force (decisions are recorded in
        the order of the check dates they were made at).
    """
    if action not in ACTIONS:
        raise ValueError(f"action must be one of {ACTIONS}, got {action!r}")
    from drift.delivery.alerts import close_acted_on

    now = now or utcnow()
    settings = {"reference": {"start": reference[0].isoformat(), "end": reference[1].isoformat()},
                "lags": {str(k): int(v) for k, v in lags.items()}, "dropped": list(dropped),
                "proposal": proposal}
    with store.begin() as conn:
        last = conn.execute(sa.select(model_epochs.c.epoch, model_epochs.c.effective)
                            .where(model_epochs.c.model == model.name)
                            .order_by(model_epochs.c.epoch.desc()).limit(1)).first()
        number = 2 if last is None else int(last.epoch) + 1
        if last is not None:
            prev = last.effective if isinstance(last.effective, date) else date.fromisoformat(str(last.effective))
            if effective < prev:
                raise DecisionError(
                    f"model '{model.name}': epoch {number - 1} took effect on {prev.isoformat()}; a new epoch "
                    f"cannot start before it (asked for {effective.isoformat()}): give --as-of "
                    f"{prev.isoformat()} or later")
        conn.execute(model_epochs.insert().values(
            model=model.name, epoch=number, action=action, effective=effective, decided_by=decided_by,
            recorded_at=now, note=note, settings=json.dumps(settings, default=str, allow_nan=False)))
        closed = close_acted_on(conn, model.name, {"epoch": number, "action": action, "by": decided_by,
                                                   "note": note, "effective": effective.isoformat()}, now=now)
    epoch = Epoch(model=model.name, number=number, action=action, effective=effective, decided_by=decided_by,
                  recorded_at=now, note=note, reference=reference, lags=dict(settings["lags"]),
                  dropped=tuple(dropped), proposal=proposal)
    return epoch, closed


def model_history(cfg: Any, store: Store, name: str) -> dict[str, Any]:
    """Every epoch of a model with the verdicts recorded in it and the alerts raised in it (``drift history``).

    A verdict belongs to the epoch its payload names (older payloads without ``epoch``: epoch 1); an alert
    closed by a decision belongs to the epoch that decision ended, any other to the epoch in force at the
    check date it was last seen at, among the decisions recorded by the time it was last seen.
    """
    from drift.store import alerts, verdicts

    model = cfg.model(name)
    eps = history(store, model)
    out = [{**e.as_json(model), "describe": e.describe(), "verdicts": [], "alerts": []} for e in eps]
    index = {e.number: i for i, e in enumerate(eps)}
    with store.connect() as conn:
        vrows = conn.execute(sa.select(verdicts.c.as_of, verdicts.c.verdict, verdicts.c.payload)
                             .where(verdicts.c.model == name).order_by(verdicts.c.as_of, verdicts.c.id)).fetchall()
        arows = conn.execute(sa.select(alerts).where(alerts.c.model == name).order_by(alerts.c.id)).fetchall()
    for r in vrows:
        try:
            ep = json.loads(r.payload).get("epoch") or {}
        except (ValueError, AttributeError):
            ep = {}
        number = ep.get("number") if isinstance(ep, dict) else None
        i = index.get(number if isinstance(number, int) else 1, 0)
        out[i]["verdicts"].append({"as_of": _iso(r.as_of), "verdict": r.verdict})
    for r in arows:
        try:
            state = json.loads(r.payload) or {}
        except ValueError:
            state = {}
        acted = state.get("acted_on") if isinstance(state, dict) else None
        if isinstance(acted, dict) and isinstance(acted.get("epoch"), int):
            number = acted["epoch"] - 1
        else:
            # the epoch in force at the check date it was last seen at, among the decisions recorded by then:
            # a check run before a decision was recorded ran in the epoch before it, even at the same date
            day = r.as_of if isinstance(r.as_of, date) else None
            seen = r.last_seen  # the store's UTCDateTime: aware UTC, as recorded_at
            known = [e for e in eps[1:] if seen is None or e.recorded_at is None or e.recorded_at <= seen]
            number = in_force(model, known, day).number if day else 1
        out[index.get(number, 0)]["alerts"].append({
            "id": int(r.id), "condition": r.condition, "status": r.status, "as_of": _iso(r.as_of),
            "first_seen": r.first_seen.isoformat() if r.first_seen else None,
            "closed_at": r.cleared_at.isoformat() if r.cleared_at else None,
            "acted_on": acted if isinstance(acted, dict) else None})
    return {"model": name, "epochs": out}


def _iso(d: Any) -> str | None:
    return d.isoformat() if isinstance(d, (date, datetime)) else (str(d) if d is not None else None)


def format_history(h: Mapping[str, Any]) -> str:
    """Plain-text rendering of :func:`model_history`."""
    lines = [f"model {h['model']}"]
    for e in h["epochs"]:
        lines.append("")
        lines.append(e["describe"] + (f" — {e['note']}" if e.get("note") else ""))
        vs = e["verdicts"]
        if vs:
            counts: dict[str, int] = {}
            for v in vs:
                counts[v["verdict"]] = counts.get(v["verdict"], 0) + 1
            lines.append(f"  {len(vs)} check(s) from {vs[0]['as_of']} to {vs[-1]['as_of']}: "
                         + ", ".join(f"{label(k)} {n}" for k, n in counts.items()) + f"; last: {label(vs[-1]['verdict'])}")
        else:
            lines.append("  no checks recorded")
        for a in e["alerts"]:
            how = a["status"] + (f" (epoch {a['acted_on']['epoch']}, {a['acted_on']['action']} by "
                                 f"{a['acted_on']['by']})" if a.get("acted_on") else "")
            lines.append(f"  alert #{a['id']} {a['condition']}: {how}, last seen as of {a['as_of']}")
    return "\n".join(lines)
