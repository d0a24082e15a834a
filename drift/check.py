"""The check: store -> as-of designs -> batched engine -> evidence -> verdicts -> payloads.

:func:`analyse` is the statistical core of one chunk of models (no I/O apart from what it is given): it
runs the stages of :mod:`drift.checking` in order — designs (prepared and validated per model), screening
(batched over models with the same number of regressors; a batch that fails is split until the failing
model is alone), the production model's evidence, freshness, evidence per driver, payload — and turns any
model's failure into that model's error entry. :func:`run_check` adds the store, the runs table, the alert
state and delivery. The per-model payload is the JSON contract of ``drift check --json`` plus a ``charts``
block for the digest. Every name this module offered before the stages moved out is still importable
from here (the stage functions are looked up here by :func:`analyse`, so patching ``drift.check._screen``
and the like still takes effect).
"""

from __future__ import annotations

import difflib
import logging
from collections.abc import Sequence
from dataclasses import MISSING, dataclass, field, fields
from datetime import date, datetime, time, timedelta, timezone
from typing import Any

import pandas as pd

from drift.checking.accuracy import _accuracy, _accuracy_block, _mase_scale, _seasonal_naive  # noqa: F401
from drift.checking.actions import (  # noqa: F401
    _date_break,
    _horizon_words,
    _refit_action,
    _relag_explains_break,
    _relationship_actions,
    _sentence_start,
    _test_words,
)
from drift.checking.context import _Ctx, _failure, _list, _num  # noqa: F401
from drift.checking.designs import (  # noqa: F401
    COLLINEAR_RTOL,
    MIN_SCALE,
    SeriesFrames,
    _check_scale,
    _horizon_limit,
    _horizon_periods,
    _prepare,
    _prewhiten,
    _validate,
    prepare_model,
)
from drift.checking.drivers import (  # noqa: F401
    _drivers_and_worth,
    _lag_drift,
    _lag_profiles_batched,
    _min_lag,
    _one_step_errors,
    _rolling_forecast_errors,
    _worth_batched,
    _worth_fits,
)
from drift.checking.freshness import _forward_feed, _freshness, _periods_between  # noqa: F401
from drift.checking.payload import _payload, error_entry
from drift.checking.production import (  # noqa: F401
    MIN_LEVEL,
    _deployed_replay,
    _horizon_ratio,
    _logged_batch,
    _logged_evidence,
    _logged_forecasts,
)
from drift.checking.screening import MIN_DOF, _monitor, _screen  # noqa: F401
from drift.config import (
    Config,
    ModelConfig,
    next_period,
    period_start,
)
from drift.executor import run_chunks
from drift.gcpause import fewer_collections
from drift.panel import shift_periods, week_anchor
from drift.progress import Progress
from drift.verdicts import ERROR

log = logging.getLogger(__name__)


def as_of_moment(day: date) -> datetime:
    """``--as-of DATE`` means the end of that day (UTC)."""
    return datetime.combine(day + timedelta(days=1), time(0), tzinfo=timezone.utc)


@dataclass
class CheckOutcome:
    """What one check run produced.

    ``models`` holds the payloads of the models that were checked; ``errors`` maps each model that could
    not be checked to its reason, and ``failed`` holds their entries in the JSON contract (verdict
    ``error``, see :func:`error_entry`). ``order`` is the order of the models asked for. A payload's
    ``charts`` block is kept as its JSON text (:class:`drift.jsontext.JSONText`: a read-only mapping,
    decoded on first read; encode it with ``drift.jsontext.json_default`` or copy its ``decoded()``).
    """

    run_id: int | None
    as_of: date
    models: list[dict[str, Any]] = field(default_factory=list)
    errors: dict[str, str] = field(default_factory=dict)
    failed: list[dict[str, Any]] = field(default_factory=list)
    order: list[str] = field(default_factory=list)

    def entries(self) -> list[dict[str, Any]]:
        """Every model asked for, checked or not, in the order asked for (charts included)."""
        failed = {e["name"]: e for e in self.failed}
        failed.update({n: error_entry(None, r, self.as_of, name=n) for n, r in self.errors.items()
                       if n not in failed})
        rank = {n: i for i, n in enumerate(self.order)}
        last = len(rank)
        items = [*self.models, *failed.values()]
        # stable: entries of names not in ``order`` keep their place after those that are
        return sorted(items, key=lambda m: rank.get(m["name"], last))

    def as_json(self) -> dict[str, Any]:
        """The JSON contract: charts left out; a model that could not be checked has verdict ``error``
        and its ``reason``; ``checked`` and ``failed`` count them."""
        entries = self.entries()
        n_failed = sum(1 for m in entries if m["verdict"] == ERROR)
        return {"as_of": self.as_of.isoformat(),
                "models": [{k: v for k, v in m.items() if k != "charts"} for m in entries],
                "checked": len(entries) - n_failed, "failed": n_failed}


# ------------------------------------------------------------------------------------------------ analysis
def analyse(cfg: Config, models: Sequence[ModelConfig], obs: pd.DataFrame, as_of: datetime
            ) -> tuple[list[dict[str, Any]], dict[str, str]]:
    """Payloads for a chunk of models, from the observations known at ``as_of`` (:func:`_analyse`), with
    the garbage collector's passes made rare meanwhile (:mod:`drift.gcpause`; in process-pool and Dask
    workers too)."""
    with fewer_collections():
        return _analyse(cfg, models, obs, as_of)


def _analyse(cfg: Config, models: Sequence[ModelConfig], obs: pd.DataFrame, as_of: datetime
             ) -> tuple[list[dict[str, Any]], dict[str, str]]:
    """Payloads for a chunk of models, from the observations known at ``as_of``.

    Returns (payloads, errors): a model whose data cannot support the check gets an error entry
    (its reason) instead of a payload; the others are unaffected. One model never fails another: data
    problems are found per model before the batched screening (:func:`_validate`), a batch that still
    fails is split until the model that fails it is alone (:func:`_screen_isolated`), and every later stage
    runs per model. An unexpected exception (a bug, not a data problem) fails only its model: the reason
    says so, the traceback goes to the log at debug level.
    """
    ctxs: list[_Ctx] = []
    errors: dict[str, str] = {}
    # split the observations by series once (and convert them once for the as-of selection): every later
    # per-model filter then works on a small frame
    by_series = SeriesFrames(obs, models)
    day = (as_of - timedelta(microseconds=1)).date()
    for m in models:
        try:
            ctxs.append(_prepare(cfg, m, by_series, as_of, day))
        except Exception as exc:  # noqa: BLE001 - a failure is the model's own entry
            errors[m.name] = _failure(m.name, "preparing its data", exc)
    # batch by number of regressors, and apart the models with nothing to monitor yet (their reference
    # period runs to the newest data): a batch mixing them with monitored models cannot be monitored
    groups: dict[tuple[int, bool], list[_Ctx]] = {}
    for c in ctxs:
        groups.setdefault((c.design.k, c.design.n > c.design.n_ref), []).append(c)
    for group in groups.values():
        _screen_isolated(group, errors)
    _logged_forecasts([c for c in ctxs if c.model.name not in errors and c.model.forecast_series], errors)
    # the nested fits and worth tests of the whole chunk in a few batched engine calls (each model's own
    # stage below reads them, and computes for itself whatever the batch could not)
    _worth_batched([c for c in ctxs if c.model.name not in errors])
    for c in ctxs:
        if c.model.name in errors:
            continue
        try:
            _deployed_replay(c)
            _freshness(c)
            _drivers_and_worth(c)
        except Exception as exc:  # noqa: BLE001 - a failure is the model's own entry
            errors[c.model.name] = _failure(c.model.name, "analysing it", exc)
    # the lag profiles of the whole chunk in a few batched engine calls (each model's own stage below uses
    # them, and computes for itself whatever the batch could not)
    _lag_profiles_batched([c for c in ctxs if c.model.name not in errors])
    out = []
    for c in ctxs:
        if c.model.name in errors:
            continue
        try:
            _lag_drift(c)
            _relag_explains_break(c)  # a refit whose break the moved lag explains becomes that relag
            out.append(_payload(c))
        except Exception as exc:  # noqa: BLE001 - a failure is the model's own entry
            errors[c.model.name] = _failure(c.model.name, "analysing it", exc)
    return out, errors


def _reset(c: _Ctx) -> None:
    """Forget what a failed screening pass left in the context (every accumulating field back to empty)."""
    for f in fields(c):
        if f.default_factory is not MISSING:  # type: ignore[misc]
            setattr(c, f.name, f.default_factory())  # type: ignore[misc]


def _screen_isolated(group: list[_Ctx], errors: dict[str, str]) -> None:
    """:func:`_screen` on a batch; when the batch fails, split it in halves and retry, down to batches of
    one, so only the model(s) that fail alone get an error entry (a one-model failure costs about
    2·log2(batch) extra passes, not one per model)."""
    try:
        _screen(group)
        return
    except Exception as exc:  # noqa: BLE001 - isolated below
        if len(group) == 1:
            errors[group[0].model.name] = _failure(group[0].model.name, "screening it", exc)
            return
        log.info("screening a batch of %d models failed (%s: %s); splitting it to isolate the model",
                 len(group), type(exc).__name__, exc)
    half = len(group) // 2
    for part in (group[:half], group[half:]):
        for c in part:
            _reset(c)
        _screen_isolated(part, errors)


# ------------------------------------------------------------------------------------------------ run
def run_check(cfg: Config, store: Any, *, as_of: date | None = None, models: list[str] | None = None,
              deliver: bool = True, record: bool = True, progress: bool | None = False) -> CheckOutcome:
    """Check the models as of a date (default: today, UTC), save verdicts, process alerts and deliver.

    ``deliver=False`` (``check --no-deliver``) still opens and updates alerts and queues their notices in the
    outbox; only the sending is left to ``drift deliver`` or the daemon.

    A model that cannot be checked does not stop the run: it gets an error entry (``outcome.errors`` and
    ``outcome.failed``). ``progress``: a bar on stderr (None = when stderr is a terminal and the check has
    ``drift.progress.AUTO_MODELS`` models or more; True = always; False = never). The run is recorded ``ok`` when every model was checked, ``partial`` when some
    were not (its detail counts them: ``checked``, ``failed``, ``errors``).

    Raises
    ------
    ConfigError : an unknown model name.

    ``record=False`` (``drift report``) only reads: no run row, no verdicts, no alerts (``run_id`` None).
    """
    with fewer_collections():  # a check's payloads hold no cycles: rare collector passes (drift.gcpause)
        return _run_check(cfg, store, as_of=as_of, models=models, deliver=deliver, record=record,
                          progress=progress)


def _run_check(cfg: Config, store: Any, *, as_of: date | None, models: list[str] | None, deliver: bool,
               record: bool, progress: bool | None) -> CheckOutcome:
    day = as_of or datetime.now(timezone.utc).date()
    moment = as_of_moment(day)
    written = [cfg.model(n) for n in dict.fromkeys(models)] if models else list(cfg.models)
    run_id = store.start_run("check", as_of=day, detail={"models": [m.name for m in written]}) if record else None
    try:
        # each model as its monitoring epoch in force at the check date says (drift.epochs): the YAML, or
        # the reference period, lags and drivers a decision (drift accept) set since
        from drift.epochs import apply_epoch, current

        epochs = current(store, written, day)
        chosen = [apply_epoch(m, epochs[m.name]) for m in written]
        ahead = _plans_loaded_after_the_fact(cfg, chosen, store, moment)

        def load(series: list[str]) -> pd.DataFrame:
            got = store.load_observations(series, moment, ingested=False)  # the check never reads ingested_at
            extra = ahead[ahead["series"].isin(series)] if not ahead.empty else ahead
            return pd.concat([got, extra], ignore_index=True) if len(extra) else got

        # each chunk's observations are read (one as-of query) as the chunk is handed out, so memory is
        # bounded by the chunks in flight, not by the number of models
        with Progress(progress, "checking", len(chosen)) as bar:
            payloads, errors = run_chunks(cfg, chosen, load, moment, func=analyse, on_done=bar.advance)
        _quarantine_hint(store, chosen, moment, errors)
        _late_quarantine_hint(store, payloads)
        failed = [error_entry(m, errors[m.name], day) for m in chosen if m.name in errors]
        by_name = {m.name: m for m in written}
        for entry in (*payloads, *failed):
            entry["epoch"] = epochs[entry["name"]].as_json(by_name[entry["name"]])
        outcome = CheckOutcome(run_id=run_id, as_of=day, models=payloads, errors=errors, failed=failed,
                               order=[m.name for m in chosen])
        # a model that could not be checked gets its error as its newest verdict (the digest and status
        # read the newest verdicts; an earlier check's verdict must not stand in for this one)
        if not record:
            return outcome
        store.save_verdicts(run_id, day, [*payloads, *failed])
        _alerts_and_delivery(cfg, store, outcome, send=deliver)
        detail = {"models": len(chosen), "checked": len(payloads), "failed": len(errors), "errors": errors,
                  "verdicts": {p["name"]: p["verdict"] for p in payloads}}
        if errors:
            names = list(errors)
            shown = ", ".join(names[:5]) + (f" and {len(names) - 5} more" if len(names) > 5 else "")
            store.finish_run(run_id, "partial", detail=detail,
                             error=f"{len(errors)} of {len(chosen)} model(s) could not be checked: {shown}")
        else:
            store.finish_run(run_id, "ok", detail=detail)
        return outcome
    except BaseException as exc:
        if record:
            store.finish_run(run_id, "failed", error=f"{type(exc).__name__}: {exc}")
        raise


def _late_quarantine_hint(store: Any, payloads: Sequence[dict[str, Any]]) -> None:
    """Add to a data-late reason what ingest quarantined of the late series: a feed whose new values are
    all refused (beyond the size drift computes with, not numbers, ...) looks late to the check, and the
    quarantine says why (wide sources: the column is the series)."""
    late = [a for p in payloads for a in p.get("actions", ()) if a.get("action") == "data-late" and a.get("driver")]
    if not late:
        return
    held = store.quarantined_columns(sorted({str(a["driver"]) for a in late}))
    for a in late:
        if a["driver"] in held:
            n, row, why = held[a["driver"]]
            a["reason"] += (f" Ingest quarantined {n} value(s) of '{a['driver']}' (the first in row {row}: {why}): "
                            "the feed may be arriving but refused; drift quarantine lists them.")


def _quarantine_hint(store: Any, models: Sequence[ModelConfig], moment: datetime, errors: dict[str, str]) -> None:
    """Add to the reason of a model that failed for want of a series what ingest quarantined of it: a series
    whose every value was refused (beyond the size drift computes with, not a number, ...) is absent from
    the store, and the quarantine says why (wide sources: the column is the series)."""
    failed = [m for m in models if m.name in errors]
    wanted = sorted({s for m in failed for s in m.series})
    absent = sorted(set(wanted) - set(store.last_periods(wanted, moment))) if wanted else []
    if not absent:
        return
    held = store.quarantined_columns(absent)
    unheld = [s for s in absent if s not in held]
    names = store.series_names() if unheld else []
    stored = set(names)
    for m in failed:
        notes = [f"'{s}' has {n} value(s) in quarantine, the first in row {row}: {why}"
                 for s, (n, row, why) in ((s, held[s]) for s in dict.fromkeys(m.series) if s in held)]
        if notes:
            errors[m.name] += ". Ingest refused them: " + "; ".join(notes) + " (drift quarantine lists them)"
        # a misspelt series name: the store's nearest names (never a name the model already uses)
        near = [(s, [n for n in difflib.get_close_matches(s, names, n=4, cutoff=0.75) if n not in m.series][:2])
                for s in dict.fromkeys(m.series) if s in unheld and s not in stored]
        hints = [f"'{s}' is not in the store; did you mean {' or '.join(repr(n) for n in close)}?"
                 for s, close in near if close]
        if hints:
            errors[m.name] += ". " + " ".join(hints)


def _plans_loaded_after_the_fact(cfg: Config, models: Sequence[ModelConfig], store: Any,
                                 moment: datetime) -> pd.DataFrame:
    """Plans of the period being forecast that the store holds as ordinary history.

    A ``known`` driver at lag 0 needs its plan of the current period. Loaded from a file without an
    available column, each first vintage counts as available at the end of its period plus the delay
    (:mod:`drift.ingest.base`), so a plan of the current period is never "known" at the check's moment
    although the file holds it. A plan is about the future: such a stored value (its availability exactly
    that default) is not late. Returns those rows, to be added to the observations of the check.
    """
    want: dict[tuple[str, pd.Timestamp], pd.Timestamp] = {}
    at = pd.Timestamp(moment) - pd.Timedelta(microseconds=1)
    for m in models:
        for dr in m.drivers:
            if dr.form != "known":
                continue
            cur = period_start(at.tz_convert("UTC").tz_localize(None), m.frequency, week_anchor=week_anchor(m))
            need = shift_periods(pd.DatetimeIndex([cur]), m.frequency, dr.lag)[0]
            default_at = (next_period(need, m.frequency) + pd.Timedelta(cfg.driver_delay(m, dr))).tz_localize("UTC")
            if default_at > pd.Timestamp(moment):
                want[(dr.series, need)] = default_at
    if not want:
        return pd.DataFrame()
    rows = store.load_observations(sorted({s for s, _ in want}), max(want.values()).to_pydatetime(), ingested=False)
    if rows.empty:
        return rows
    w = pd.DataFrame([(s, p, a) for (s, p), a in want.items()], columns=["series", "period", "_default_at"])
    w["period"] = pd.to_datetime(w["period"])
    w["_default_at"] = pd.to_datetime(w["_default_at"], utc=True)
    got = rows.astype({"series": str}).merge(w, on=["series", "period"], how="inner")
    got = got[(got["available_at"] == got["_default_at"]) & (got["available_at"] > pd.Timestamp(moment))]
    return got.drop(columns="_default_at").reset_index(drop=True)


def _alerts_and_delivery(cfg: Config, store: Any, outcome: CheckOutcome, *, send: bool = True) -> None:
    """Open/update the alerts and queue their notices; with ``send``, deliver what is due."""
    try:
        from drift.delivery.alerts import process_alerts
    except ImportError:  # delivery not installed in this build
        return
    process_alerts(cfg, store, outcome)
    if send and cfg.alerts.channels:
        from drift.delivery.outbox import deliver_pending

        deliver_pending(cfg, store)
