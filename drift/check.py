"""The check: store -> as-of designs -> batched engine -> evidence -> verdicts -> payloads.

:func:`analyse` is the statistical core of one chunk of models (no I/O apart from what it is given);
:func:`run_check` adds the store, the runs table, the alert state and delivery. The per-model payload is
the JSON contract of ``drift check --json`` plus a ``charts`` block for the digest.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Sequence
from dataclasses import MISSING, dataclass, field, fields
from datetime import date, datetime, time, timedelta, timezone
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from drift import engine

# the stages (drift.checking); every name drift.check offered before the split is still importable here
from drift.checking.accuracy import _accuracy, _accuracy_block, _mase_scale, _seasonal_naive  # noqa: F401
from drift.checking.context import _Ctx, _failure, _list, _num
from drift.checking.designs import (  # noqa: F401
    COLLINEAR_RTOL,
    MIN_SCALE,
    _check_scale,
    _horizon_limit,
    _horizon_periods,
    _prepare,
    _prewhiten,
    _validate,
    prepare_model,
)
from drift.config import (
    MAX_LAG_BY_FREQ,
    Config,
    ModelConfig,
    next_period,
    period_length,
    period_start,
)
from drift.engine.split import split_coefficients
from drift.engine.tables import monitoring as _mon_table
from drift.exceptions import DriftError, InsufficientDataError
from drift.executor import run_chunks
from drift.panel import as_ns, build_design, latest_values, next_due, shift_periods, week_anchor
from drift.progress import Progress
from drift.replay import h_step_errors
from drift.verdicts import ERROR, Action, change_words, fmt_num, fmt_p, overall, sort_actions, window_words

log = logging.getLogger(__name__)

#: smallest per-monitor level the simulated monitoring tables cover (drift.engine.tables.monitoring)
MIN_LEVEL = min(_mon_table.TAIL_PROBS)
#: smallest scale degrees of freedom the tables cover
MIN_DOF = float(_mon_table.DOF[0])


def as_of_moment(day: date) -> datetime:
    """``--as-of DATE`` means the end of that day (UTC)."""
    return datetime.combine(day + timedelta(days=1), time(0), tzinfo=timezone.utc)


@dataclass
class CheckOutcome:
    """What one check run produced.

    ``models`` holds the payloads of the models that were checked; ``errors`` maps each model that could
    not be checked to its reason, and ``failed`` holds their entries in the JSON contract (verdict
    ``error``, see :func:`error_entry`). ``order`` is the order of the models asked for.
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


# ------------------------------------------------------------------------------------------------ analysis
def analyse(cfg: Config, models: Sequence[ModelConfig], obs: pd.DataFrame, as_of: datetime
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
    # split the observations by series once: every later per-model filter then works on a small frame
    by_series = {str(k): g for k, g in obs.groupby("series", sort=False, observed=True)}
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
    out = []
    for c in ctxs:
        if c.model.name in errors:
            continue
        try:
            _deployed_replay(c)
            _freshness(c)
            _drivers_and_worth(c)
            _lag_drift(c)
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


def _screen(group: list[_Ctx]) -> None:
    """Batched screening pass: recursive fit, monitoring, CUSUM family, rolling coefficients."""
    cfg = group[0].cfg
    chk = cfg.check
    ds = [c.design for c in group]
    Y = np.full((len(group), max(d.n for d in ds)), np.nan)
    Xs = np.full((*Y.shape, ds[0].k), np.nan)
    off = np.zeros(len(group), int)
    for i, c in enumerate(group):
        o = Y.shape[1] - c.design.n
        Y[i, o:], Xs[i, o:], off[i] = c.y, c.X, o
    m = np.array([c.design.n_ref for c in group]) + off
    rf = engine.recursive_fit(Y, Xs, coef_se=False)  # the check reads coefficients, not their errors
    # The monitor family (engine.family_levels): on the recursive residuals the CUSUM monitor (small
    # persistent changes), the abrupt-shift monitor (Page CUSUM with a reference value) and the variance
    # monitor; per driver slot its effect monitor (the driver's score process, also when the change
    # leaves the residual mean alone) and an abrupt-shift monitor of that score. The family signals when
    # any member crosses; the members' levels are calibrated jointly so that a stable model is told to
    # refit within the horizon with probability at most check.level.
    n_ref = np.array([c.design.n_ref for c in group], float)
    h_steps = np.array([c.horizon_n for c in group], float)
    hz = h_steps / m  # ratio whose ceil(hz * m) is the horizon in steps (m counts the batch's front padding)
    n_drv = max(len(c.design.driver_columns) for c in group)
    lv_r, lv_e = engine.family_levels(chk.level, n_drv, h_steps, h_steps / n_ref, chk.monitor_detector)
    wl_r, wl_e = engine.family_levels(chk.warn_level, n_drv, h_steps, h_steps / n_ref, chk.monitor_detector)
    specs: list[tuple[str, str, int | None]] = [
        ("monitor-cusum", "csw", None), ("monitor-shift", "shift", None), ("monitor-variance", "variance", None)]
    specs += [("monitor-effect", chk.monitor_detector, j) for j in range(n_drv)]
    specs += [("monitor-effect-shift", "shift", j) for j in range(n_drv)]
    weights = None
    if n_drv and np.any(m < Y.shape[1]):
        slots = np.full((len(group), n_drv), -1)
        for i, c in enumerate(group):
            slots[i, : len(c.design.driver_columns)] = list(c.design.driver_columns.values())
        weights = engine.score_weights(Xs, m, slots)
    # scale estimated on the reference rows (and the error model's extra uncertainty)
    n_ok = np.array([c.n_ref_ok for c in group], float)
    logvar = 0.5 / np.maximum(n_ok - ds[0].k, 1.0) + np.array([c.scale_logvar for c in group])
    dof = np.maximum(0.5 / logvar, MIN_DOF)
    mons: list[Any] = []
    warns: list[Any] = []
    levels: list[tuple[float, float]] = []
    try:
        ref_fit = engine.reference_fit(Y, Xs, m)
    except InsufficientDataError as exc:
        log.info("monitoring skipped for a batch of %d model(s): %s", Y.shape[0], exc)
        ref_fit = None
    for _name, det, j in specs:
        lvl = (lv_r, wl_r) if j is None else (lv_e, wl_e)
        levels.append(lvl)
        if ref_fit is None or (j is not None and weights is None):
            mons.append(None)
            warns.append(None)
            continue
        wj = None if j is None else weights[:, j]  # type: ignore[index]
        kw = {"horizon": hz, "detector": det, "weights": wj, "scale_dof": dof, "extend": True, "reference": ref_fit}
        mons.append(_monitor(Y, Xs, m, level=lvl[0], **kw))
        warns.append(_monitor(Y, Xs, m, level=lvl[1], **kw))
    # Trigg's tracking signal on the as-deployed one-step errors of the monitored span (reported for the
    # demand planners who read it; it raises nothing: at a fixed time, not over the horizon)
    trigg = None
    fe_all = np.where(np.arange(Y.shape[1])[None, :] >= m[:, None], rf.forecast_error, np.nan)
    ref_err = np.where(np.arange(Y.shape[1])[None, :] < m[:, None], np.abs(rf.forecast_error), np.nan)
    finite_ref = np.isfinite(ref_err)
    mad0 = np.where(finite_ref.any(axis=1), np.sum(np.where(finite_ref, ref_err, 0.0), axis=1)
                    / np.maximum(finite_ref.sum(axis=1), 1), np.nan)
    if np.isfinite(fe_all).sum(axis=1).min() >= 2 and np.all(np.isfinite(mad0) & (mad0 > 0)):
        try:
            trigg = engine.trigg_signal(fe_all, 0.1, level=0.01, mad0=mad0)
        except (DriftError, ValueError) as exc:
            log.info("tracking signal skipped: %s", exc)
    # retrospective CUSUM / CUSUM of squares on the monitored recursive residuals (reported, charted;
    # they raise nothing). Their whole-sample normalisation can put today's first crossing before the
    # data that caused it, so a crossing is dated by replaying the test as of each period (first_signal:
    # the first check of the run of checks up to today that all crossed).
    W = rf.resid.copy()
    cols = np.arange(W.shape[1])[None, :]
    W[cols < m[:, None]] = np.nan
    enough = np.sum(np.isfinite(W), axis=1) >= 3
    cus = cusq = None
    retro_dates: dict[str, np.ndarray] = {}
    if enough.any():
        Wc = np.where(enough[:, None], W, 0.0)  # rows without residuals get a dummy, masked below
        Wc[~enough, :3] = 1.0
        cus = engine.cusum(Wc)
        cusq = engine.cusum_squares(Wc)
        for name, rc, test in (("cusum", cus, "cusum"), ("cusum-squares", cusq, "cusum_squares")):
            crossed = enough & (np.atleast_1d(rc.first_crossing[0.05]) >= 0)
            dates = np.full(len(group), -1, dtype=np.int64)
            if crossed.any():  # replayed on the monitored columns only (the rows before are all NaN)
                lo = int(m[crossed].min())
                found = engine.first_signal(W[crossed][:, lo:], test, 0.05)
                dates[crossed] = np.where(found >= 0, found + lo, -1)
            retro_dates[name] = dates
    window = chk.rolling_window or chk.recent_window
    roll = None
    if window >= ds[0].k + 2 and window <= Y.shape[1]:
        roll = engine.rolling_coefficients(Y, Xs, window)
    for i, c in enumerate(group):
        o, d = off[i], c.design
        sl = slice(o, None)
        c.charts["periods"] = [p.date().isoformat() for p in d.periods]
        c.charts["monitor_start_index"] = int(d.n_ref)
        fe = rf.forecast_error[i, sl]
        # as-deployed one-step forecasts of the target. With AR errors the one-step error of y equals that
        # of the prewhitened y~ (y_t - x_t'b - phi (y_{t-1} - x_{t-1}'b) = y~_t - x~_t'b), so one formula
        fc = d.y - fe
        base = _seasonal_naive(d.y, d.season_length)
        mon_mask = np.arange(d.n) >= d.n_ref
        c.charts["forecast"] = {"actual": _list(d.y), "forecast": _list(np.where(mon_mask, fc, np.nan)),
                                "baseline": _list(np.where(mon_mask, base, np.nan))}
        c.accuracy = _accuracy_block(d, fe, mon_mask, chk.recent_window)
        ref_scale = (c.accuracy["scale"] or {}).get("mae")
        if c.model.horizon > 1:
            eh = h_step_errors(c.cfg, c.model, c.obs, c.as_of, d, np.atleast_3d(rf.coef)[i, sl], c.model.horizon)
            c.accuracy["h_step"] = {"horizon": c.model.horizon,
                                    **_accuracy(np.where(mon_mask, eh, np.nan)[-chk.recent_window:], ref_scale)}
        # monitoring: every date is the period at which a check run then would have signalled (the
        # monitors are sequential: each row's statistic and boundary use rows up to it only)
        alarm_idx = None
        lapsed = False
        drivers_i = list(d.driver_columns)
        for (name, _det, j), r, rw, (lv, wl) in zip(specs, mons, warns, levels):
            if (j is not None and j >= len(drivers_i)) or r is None or rw is None:
                continue
            extra = {} if j is None else {"driver": drivers_i[j]}
            ai = int(np.atleast_1d(r.alarm_index)[i])
            h_end = int(np.atleast_1d(r.horizon_end)[i])
            stat = float(np.atleast_1d(r.statistic)[i])
            pv = _num(np.atleast_1d(r.pvalue)[i])
            date_ = d.periods[ai - o].date().isoformat() if ai >= 0 else None
            c.tests.append({"test": name, **extra, "statistic": _num(stat), "pvalue": pv, "threshold": 1.0,
                            "level": _num(round(lv, 6)), "date": date_})
            beyond = {"beyond_horizon": True} if ai >= h_end else {}
            if ai >= 0:
                c.alarms.append({"test": name, **extra, "date": date_, "statistic": _num(round(stat, 4)),
                                 "threshold": 1.0, "level": _num(round(lv, 6)), **beyond})
                if alarm_idx is None or ai - o < alarm_idx:
                    alarm_idx, lapsed = ai - o, bool(beyond)
            wi = int(np.atleast_1d(rw.alarm_index)[i])
            if ai < 0 and wi >= 0:
                c.alarms.append({"test": name, **extra, "date": d.periods[wi - o].date().isoformat(),
                                 "statistic": _num(round(float(np.atleast_1d(rw.statistic)[i]), 4)),
                                 "threshold": 1.0, "level": _num(round(wl, 6)), "warning": True,
                                 **({"beyond_horizon": True} if wi >= h_end else {})})
        _monitor_chart(c, i, o, specs, mons, levels)
        if trigg is not None:
            sig = np.atleast_2d(trigg.signal)[i, sl]
            last_i = np.flatnonzero(np.isfinite(sig))
            fs = int(np.atleast_1d(trigg.first_signal)[i]) - o
            if last_i.size:
                c.tests.append({"test": "tracking-trigg", "statistic": _num(round(float(sig[last_i[-1]]), 4)),
                                "pvalue": None, "threshold": _num(trigg.limit), "level": 0.01,
                                "date": d.periods[fs].date().isoformat() if fs >= 0 else None})
        # retrospective CUSUM family: reported in ``tests`` and charted, not alarms: re-run on every check
        # at 5%, their crossings pile up on stable models (their sequential versions are the family's CUSUM
        # and variance monitors). Their date is the first check of the standing crossing (first_signal).
        if cus is not None and cusq is not None and enough[i]:
            for name, rc in (("cusum", cus), ("cusum-squares", cusq)):
                fc_idx = int(retro_dates[name][i])
                rstat = _num(np.atleast_1d(rc.statistic)[i])
                cv = rc.critical_values.get(0.05)
                crit = None if cv is None else _num(np.atleast_1d(cv)[i] if np.ndim(cv) else cv)
                date_ = d.periods[fc_idx - o].date().isoformat() if fc_idx >= 0 else None
                c.tests.append({"test": name, "statistic": rstat, "pvalue": _num(np.atleast_1d(rc.pvalue)[i]),
                                "threshold": crit, "level": 0.05, "date": date_})
            # the retrospective CUSUM (kept for the chart when no monitor ran): its own crossing date only
            c.charts["cusum"] = {
                "path": _list(np.atleast_2d(cus.path)[i, sl]),
                "bounds": {f"{lvl:.2f}": _list(np.atleast_2d(cus.bounds[lvl])[i, sl]) for lvl in (0.05, 0.01)},
                "alarm_date": next((t["date"] for t in c.tests if t["test"] == "cusum"), None)}
        # rolling coefficients
        if roll is not None:
            coef_roll = np.atleast_3d(roll.coef)[i, sl]
            se_roll = np.atleast_3d(roll.se)[i, sl]
            c.charts["_roll_coef"] = coef_roll  # the full model's rolling fit, reused for its forecasts
            c.charts["coefficients"] = {}
            ref_coef = np.atleast_3d(rf.coef)[i, o + d.n_ref - 1]
            for s, j in d.driver_columns.items():
                c.charts["coefficients"][s] = {
                    "coef": _list(coef_roll[:, j]), "lower": _list(coef_roll[:, j] - 1.96 * se_roll[:, j]),
                    "upper": _list(coef_roll[:, j] + 1.96 * se_roll[:, j]),
                    "reference": _num(ref_coef[j]), "window": int(window)}
        c.charts["_ref_coef"] = np.atleast_3d(rf.coef)[i, o + d.n_ref - 1]
        c.charts["_fe"] = fe
        # verdict on the relationship
        span = d.n - d.n_ref
        if alarm_idx is None and span > c.horizon_n:
            end = d.periods[d.n_ref + c.horizon_n - 1].date().isoformat()
            c.actions.append(Action("watch", severity="watch", reason=(
                f"The monitoring horizon ended on {end} ({_horizon_words(c)}): the monitors keep watching "
                f"the newest data, but their false-alarm guarantee covered only the horizon. Refit on recent "
                f"data and move the reference period forward (or lengthen check.horizon).")))
        if alarm_idx is not None:
            _refit_action(c, alarm_idx, lapsed)
        else:
            warn = sorted((a for a in c.alarms if a.get("warning")), key=lambda a: a["date"])
            if warn:
                what = (f"{_test_words(warn[0]['test'], warn[0].get('driver'))} passed its warning boundary "
                        f"on {warn[0]['date']}")
                c.actions.append(Action("watch", severity="watch", reason=(
                    f"Early sign of change: {what}; the monitoring detectors have not confirmed it at the "
                    f"{chk.level:.0%} level. Keep the model, look again next week.")))


def _monitor_chart(c: _Ctx, i: int, o: int, specs: list[tuple[str, str, int | None]], mons: list[Any],
                   levels: list[tuple[float, float]]) -> None:
    """The chart of the monitor that raised the alarm (the first to cross), else of the one nearest its
    boundary: its path and its own boundary as the monitor computed them (read from its result, never
    recomputed), and the period where that path crossed that boundary."""
    drivers_i = list(c.design.driver_columns)
    best: tuple[tuple[int, float], str, int | None, Any, float] | None = None
    for (name, _det, j), r, (lv, _wl) in zip(specs, mons, levels):
        if r is None or (j is not None and j >= len(drivers_i)) or getattr(r, "path", None) is None:
            continue
        ai = int(np.atleast_1d(r.alarm_index)[i])
        stat = float(np.atleast_1d(r.statistic)[i])
        key = (0, float(ai)) if ai >= 0 else (1, -stat if math.isfinite(stat) else math.inf)
        if best is None or key < best[0]:
            best = (key, name, j, r, lv)
    if best is None:
        return
    (_key, name, j, r, lv) = best
    path = np.atleast_2d(np.asarray(r.path, float))[i]
    bound = np.atleast_2d(np.asarray(r.boundary, float))[i]
    n = c.design.n
    if path.size != o + n or bound.size != o + n:
        c.charts["monitor_note"] = f"the {name} path does not line up with the periods; not drawn"
        return
    ai = int(np.atleast_1d(r.alarm_index)[i])
    c.charts["monitor"] = {
        "test": name, **({"driver": drivers_i[j]} if j is not None else {}),
        "title": _sentence_start(_test_words(name, drivers_i[j] if j is not None else None)),
        "path": _list(path[o:]), "boundary": _list(bound[o:]), "level": _num(round(float(lv), 6)),
        "alarm_date": c.design.periods[ai - o].date().isoformat() if ai >= o else None}


def _horizon_words(c: _Ctx) -> str:
    """How check.horizon reads for this model, e.g. "2 years = 104 periods"."""
    h = c.cfg.check.horizon
    asked = c.cfg.check.horizon_periods(c.model.frequency, c.design.n_ref)
    if asked > c.horizon_n:
        return (f"{c.horizon_n} periods: check.horizon ({h}) is {asked}, more than the monitors are calibrated "
                f"for with a {c.design.n_ref}-period reference")
    if isinstance(h, float):
        return f"{h:g} times the {c.design.n_ref}-period reference = {c.horizon_n} periods"
    return f"{h} = {c.horizon_n} periods" if not h.endswith("periods") else h


def _monitor(Y: np.ndarray, X: np.ndarray, m: np.ndarray, **kw: Any) -> Any:
    """engine.monitor, or None when no model of the batch can be monitored yet (e.g. no data after the
    reference period): the batch then simply has no monitoring evidence."""
    try:
        return engine.monitor(Y, X, m, **kw)
    except InsufficientDataError as exc:
        log.info("monitoring skipped for a batch of %d model(s): %s", Y.shape[0], exc)
        return None


def _refit_action(c: _Ctx, alarm_idx: int, lapsed: bool = False) -> None:
    """Date the break the monitors found, name the monitor that crossed and, separately, the driver whose
    effect moved most (the smallest p-value of the change in the before/after regression).

    ``lapsed``: the first alarm came after the monitoring horizon (the reason says the guarantee had lapsed).

    The figures quoted are those put in the action (``monitor``, ``effects``, ``moved``) and in each
    driver's ``break`` entry: one computation for the reason, the JSON and the tables.
    """
    d, m = c.design, c.model
    since = _date_break(c, alarm_idx)
    c.charts["break_index"] = since
    since_s = d.periods[since].date().isoformat()
    before_end = d.periods[since - 1].date().isoformat() if since > 0 else since_s
    effects: list[dict[str, Any]] = []
    try:
        cols = list(d.driver_columns.values())
        if cols:
            sp = split_coefficients(c.y, c.X, since, cols)
            for k, s in enumerate(d.driver_columns):
                effects.append({"driver": s, "before": _num(round(float(sp.before[k]), 6)),
                                "after": _num(round(float(sp.after[k]), 6)),
                                "se_before": _num(round(float(sp.se_before[k]), 6)),
                                "se_after": _num(round(float(sp.se_after[k]), 6)),
                                "pvalue_change": _num(sp.pvalue_diff[k]),
                                "before_window": {"start": d.periods[0].date().isoformat(), "end": before_end,
                                                  "n": int(sp.nobs_before)},
                                "after_window": {"start": since_s, "end": d.periods[-1].date().isoformat(),
                                                 "n": int(sp.nobs_after)}})
            c.charts["_split"] = sp
    except InsufficientDataError:
        pass
    c.charts["_effects"] = {e["driver"]: e for e in effects}
    for e in effects:  # the coefficient chart draws the same before/after estimates beside the rolling one
        if e["driver"] in c.charts.get("coefficients", {}) and e["before"] is not None and e["after"] is not None:
            c.charts["coefficients"][e["driver"]]["split"] = {
                "break": since_s, "before": e["before"], "after": e["after"],
                "se_before": e["se_before"], "se_after": e["se_after"]}
    alarm = min((a for a in c.alarms if not a.get("warning") and a["test"].startswith("monitor-")),
                key=lambda a: a["date"] or "9999")
    monitor = {k: alarm[k] for k in ("test", "driver", "date", "statistic", "level", "beyond_horizon")
               if alarm.get(k) is not None}
    monitor["horizon"] = _horizon_words(c)
    ranked = [e for e in effects if e["pvalue_change"] is not None and e["before"] is not None
              and e["after"] is not None]
    moved = min(ranked, key=lambda e: e["pvalue_change"]) if ranked else None
    level = c.cfg.check.level
    text = (f"The relationship changed around {since_s}. "
            f"{_sentence_start(_test_words(alarm['test'], alarm.get('driver')))} crossed its boundary on "
            f"{alarm['date']} "
            + (f"(after the monitoring horizon, {_horizon_words(c)}, had ended: without the false-alarm "
               f"guarantee, which covered only the horizon)." if lapsed else
               f"(false-alarm rate of the monitors together held at {level:.0%} over the monitoring horizon, "
               f"{_horizon_words(c)})."))
    if moved is not None:
        unit = next((dr.unit for dr in m.drivers if dr.series == moved["driver"] and dr.unit), None)
        per = f" {m.unit} per {unit}" if unit else ""
        figures = (f"{fmt_num(moved['before'])} before {since_s} → {fmt_num(moved['after'])}{per} since "
                   f"({change_words(moved['before'], moved['after'])}; p = {fmt_p(moved['pvalue_change'])} "
                   f"for no change)")
        if moved["pvalue_change"] < level:
            text += f" The driver effect that moved most: {moved['driver']}, {figures}."
        else:
            text += (f" No single driver's effect moved significantly (the most: {moved['driver']}, {figures}): "
                     f"the level or several coefficients shifted together.")
    text += f" Refit on data since {since_s}."
    c.actions.append(Action("refit", reason=text, extra={
        "since": since_s, "monitor": monitor, "moved": moved["driver"] if moved is not None else None,
        "effects": effects}))


def _sentence_start(text: str) -> str:
    """``text`` with its first letter capitalised and the rest left alone (``str.capitalize`` would turn
    "recursive-CUSUM" into "recursive-cusum")."""
    return text[:1].upper() + text[1:]


def _test_words(name: str, driver: str | None = None) -> str:
    if name == "monitor-effect":
        return f"the monitor of the {driver} effect"
    if name == "monitor-effect-shift":
        return f"the abrupt-shift monitor of the {driver} effect"
    return {"monitor-cusum": "the recursive-CUSUM monitor", "monitor-page": "the Page-CUSUM monitor",
            "monitor-shift": "the abrupt-shift monitor", "monitor-variance": "the error-variance monitor",
            "monitor-mosum": "the moving-sum monitor", "cusum": "the recursive CUSUM",
            "cusum-squares": "the CUSUM of squares"}.get(name, name)


def _date_break(c: _Ctx, alarm_idx: int) -> int:
    """Row of the first observation of the new regime: change-point search on the monitored recursive
    residuals (mean shift, l2 cost, BIC penalty); the latest change point at or before the alarm row, or
    the row before the alarm if none is found.

    The search runs over every monitored residual known at the check, not only those up to the alarm: a
    monitor often fires one or two periods after a large break, and a search that stopped at the alarm
    could not place a change point there (each segment needs ``min_size`` rows), so it dated the break
    early. Change points after the alarm (the recursive errors decay as the fit adapts) are ignored.
    """
    d = c.design
    fe = c.charts["_fe"]
    lo = d.n_ref
    w = fe[lo:]
    ok = np.isfinite(w)
    n_upto = int(ok[: max(0, alarm_idx + 1 - lo)].sum())
    if n_upto >= 4 and ok.sum() >= 8:
        try:
            ww = w[ok]
            sig2 = float(np.var(np.diff(ww)) / 2) or None
            cp = engine.change_points(ww, cost="l2", min_size=max(3, int(0.1 * n_upto)), sigma2=sig2)
            bks = np.atleast_1d(cp.break_indices[0] if isinstance(cp.break_indices, list) else cp.break_indices)
            rows = np.flatnonzero(ok) + lo
            cands = [int(rows[int(b)]) for b in np.ravel(bks) if 0 < int(b) < len(rows)]
            before = [r for r in cands if r <= alarm_idx]
            if before:
                return max(before)
        except (DriftError, ValueError) as exc:
            log.debug("change-point dating failed for %s: %s", d.model, exc)
    return int(max(lo, alarm_idx - 1))


# ------------------------------------------------------------------------------------------------ deployed
def _deployed_replay(c: _Ctx) -> None:
    """With production coefficients in the config (``deployed:``, :mod:`drift.deployed`): the as-deployed
    errors become those of the production model replayed with its coefficients (accuracy, forecast chart,
    Trigg's tracking signal), its coefficients become the reference of the driver figures and charts, and
    the payload's ``deployed`` block gives the gap to drift's reference-period re-estimate. The monitors
    are left as they are (they test the relationship on drift's own recursive fit)."""
    m, d, chk = c.model, c.design, c.cfg.check
    if m.deployed is None:
        return
    from drift.deployed import as_deployed_errors, coefficient_vector

    b = coefficient_vector(m, m.deployed.epoch, d)
    logged = c.charts.pop("_logged", None)
    if b is None and logged is None:
        return
    mon = np.arange(d.n) >= d.n_ref
    if logged is not None:  # the production system's own forecasts: their errors are the as-deployed ones
        e = logged["errors"]
        _logged_evidence(c, logged)
        if logged["baseline"] is not None:
            mon = np.arange(d.n) >= logged["baseline"][1]
    else:
        e = as_deployed_errors(m, d.y, d.X, b)
    if "forecast" in c.charts:
        c.charts["forecast"]["forecast"] = _list(np.where(mon, d.y - e, np.nan))
    h_step = c.accuracy.get("h_step")
    c.accuracy = _accuracy_block(d, e, mon, chk.recent_window)
    if h_step is not None:
        c.accuracy["h_step"] = h_step
    ref_scale = (c.accuracy["scale"] or {}).get("mae")
    if m.horizon > 1 and b is not None and logged is None:
        eh = h_step_errors(c.cfg, m, c.obs, c.as_of, d, np.tile(b, (d.n, 1)), m.horizon)
        c.accuracy["h_step"] = {"horizon": m.horizon,
                                **_accuracy(np.where(mon, eh, np.nan)[-chk.recent_window:], ref_scale)}
    if b is None:
        return
    # Trigg's tracking signal of the production model's errors (replacing that of the re-estimate)
    ref_abs = np.abs(e[: d.n_ref])
    ref_abs = ref_abs[np.isfinite(ref_abs)]
    fe_mon = np.where(mon, e, np.nan)
    if logged is None:
        c.tests = [t for t in c.tests if t.get("test") != "tracking-trigg"]
    if logged is None and ref_abs.size and ref_abs.mean() > 0 and np.isfinite(fe_mon).sum() >= 2:
        try:
            tr = engine.trigg_signal(fe_mon[None], 0.1, level=0.01, mad0=np.array([ref_abs.mean()]))
            sig = np.atleast_2d(tr.signal)[0]
            last_i = np.flatnonzero(np.isfinite(sig))
            fs = int(np.atleast_1d(tr.first_signal)[0])
            if last_i.size:
                c.tests.append({"test": "tracking-trigg", "statistic": _num(round(float(sig[last_i[-1]]), 4)),
                                "pvalue": None, "threshold": _num(tr.limit), "level": 0.01,
                                "date": d.periods[fs].date().isoformat() if fs >= 0 else None})
        except (DriftError, ValueError) as exc:
            log.info("model %s: tracking signal of the deployed errors skipped: %s", m.name, exc)
    # the gap between the production coefficients and drift's reference-period re-estimate
    ref_coef = np.asarray(c.charts.get("_ref_coef"), float)
    ok = np.isfinite(c.y[: d.n_ref]) & np.isfinite(c.X[: d.n_ref]).all(axis=1)
    Xr = c.X[: d.n_ref][ok]
    resid = c.y[: d.n_ref][ok] - Xr @ ref_coef
    dof = max(int(ok.sum()) - d.k, 1)
    se = np.sqrt(np.maximum(np.diag(float(resid @ resid) / dof * np.linalg.pinv(Xr.T @ Xr)), 0.0))
    by_col = {j: s for s, j in d.driver_columns.items()}
    rows = []
    for j, col in enumerate(d.columns):
        gap = float(b[j] - ref_coef[j])
        rows.append({"term": by_col.get(j, col), "column": col, "deployed": _num(round(float(b[j]), 6)),
                     "reestimated": _num(round(float(ref_coef[j]), 6)), "se": _num(round(float(se[j]), 6)),
                     "gap": _num(round(gap, 6)), "z": _num(round(gap / se[j], 3)) if se[j] > 0 else None})
    errs = m.deployed.errors
    c.deployed.update({"epoch": m.deployed.epoch, "coefficients": rows,
                       "errors": {"ar": list(errs.ar), "ma": list(errs.ma)} if errs is not None else None,
                       "reestimated_on": {"start": d.periods[0].date().isoformat(),
                                          "end": d.periods[d.n_ref - 1].date().isoformat()}})
    c.charts["_ref_coef"] = b
    for s, j in d.driver_columns.items():
        if s in c.charts.get("coefficients", {}):
            c.charts["coefficients"][s]["reference"] = _num(b[j])


def _logged_forecasts(ctxs: list[_Ctx], errors: dict[str, str]) -> None:
    """The production system's logged forecasts (``deployed.forecasts``): their errors and the batched
    monitors of :mod:`drift.deployed` (one batch per forecast horizon); results in ``charts['_logged']``.
    A batch that fails is run model by model, so a failure stays the failing model's."""
    from drift.deployed import baseline_rows, forecast_horizon, logged_forecast_errors

    groups: dict[int, list[tuple[_Ctx, np.ndarray, tuple[int, int] | None]]] = {}
    for c in ctxs:
        try:
            f, e = logged_forecast_errors(c.model, c.design.periods, c.obs)  # type: ignore[misc]
            h = forecast_horizon(c.model)
            base = baseline_rows(e, c.design.n_ref, c.cfg.check.recent_window, h)
            c.charts["_logged"] = {"forecast": f, "errors": e, "baseline": base, "horizon": h, "stats": None}
            if base is not None:
                groups.setdefault(h, []).append((c, e, base))
        except Exception as exc:  # noqa: BLE001 - a failure is the model's own entry
            errors[c.model.name] = _failure(c.model.name, "reading its logged forecasts", exc)
    for h, items in groups.items():
        _logged_batch(h, items, errors)


def _horizon_ratio(items: list[tuple[_Ctx, np.ndarray, tuple[int, int]]]) -> float:
    """check.horizon as a multiple of the reference length for a batch (the largest of its models, within
    the simulated tables' 6)."""
    return min(max(c.horizon_n / c.design.n_ref for c, _e, _b in items), float(_mon_table.HORIZONS[-1]))


def _logged_batch(h: int, items: list[tuple[_Ctx, np.ndarray, tuple[int, int]]], errors: dict[str, str]) -> None:
    from drift.deployed import monitor_forecast_errors

    chk = items[0][0].cfg.check
    T = max(len(e) for _, e, _ in items)
    E = np.full((len(items), T), np.nan)
    first = np.zeros(len(items), int)
    m = np.zeros(len(items), int)
    off = np.zeros(len(items), int)
    for i, (_c, e, (f0, m0)) in enumerate(items):
        off[i] = T - len(e)
        E[i, off[i]:] = e
        first[i], m[i] = f0 + off[i], m0 + off[i]
    try:
        stats_ = monitor_forecast_errors(E, first, m, h, level=max(chk.level / 2, MIN_LEVEL), horizon=_horizon_ratio(items),
                                         detector=chk.monitor_detector, recent_window=chk.recent_window, grid=off)
    except Exception as exc:  # noqa: BLE001 - isolated below
        if len(items) == 1:
            errors[items[0][0].model.name] = _failure(items[0][0].model.name, "monitoring its logged forecasts", exc)
            return
        for it in items:
            _logged_batch(h, [it], errors)
        return
    for i, (c, _e, _b) in enumerate(items):
        st = stats_[i]
        st["offset"] = int(off[i])
        c.charts["_logged"]["stats"] = st


def _logged_evidence(c: _Ctx, logged: dict[str, Any]) -> None:
    """The logged forecasts' statistics into the payload: the ``deployed.forecasts`` block, their tests,
    and ``watch`` when a monitor of their mean or scale crossed its boundary."""
    from drift.deployed import MIN_BASELINE

    d, m, chk = c.design, c.model, c.cfg.check
    st = logged.get("stats")
    c.deployed["epoch"] = m.deployed.epoch  # type: ignore[union-attr]
    fcfg = m.deployed.forecasts  # type: ignore[union-attr]
    e = logged["errors"]
    block: dict[str, Any] = {"series": fcfg.series, "horizon": logged["horizon"],  # type: ignore[union-attr]
                             "logged": int(np.isfinite(e).sum())}
    base = logged["baseline"]
    if base is None or st is None:
        block["note"] = (f"too few logged forecasts of '{fcfg.series}' for a baseline (at least "  # type: ignore[union-attr]
                         f"{MIN_BASELINE} non-overlapping ones, every {logged['horizon']} periods, in the "
                         "reference period or in the first periods logged, and a period after them); no "
                         "monitoring yet")
        c.deployed["forecasts"] = block
        return
    o = st["offset"]

    def day(row: int) -> str | None:
        return d.periods[row - o].date().isoformat() if row >= 0 else None

    block["baseline"] = {"start": d.periods[base[0]].date().isoformat(),
                         "end": d.periods[base[1] - 1].date().isoformat()}
    block["monitor_start"] = d.periods[base[1]].date().isoformat() if base[1] < d.n else None
    block["monitored"] = st["used"]
    block["baseline_mean"] = _num(round(st["baseline_mean"], 6))
    bias = st["bias"]
    block["bias"] = {"mean": _num(None if bias["mean"] is None else round(bias["mean"], 6)),
                     "t": _num(None if bias["t"] is None else round(bias["t"], 4)),
                     "pvalue": _num(bias["pvalue"]), "n": bias["n"], "lags": bias["lags"]}
    tests = []
    for r in st.get("monitors", []):
        entry = {"test": r["test"], "statistic": _num(round(r["statistic"], 4)), "pvalue": _num(r["pvalue"]),
                 "threshold": 1.0, "level": r["level"], "date": day(r["alarm_row"])}
        tests.append(entry)
        c.tests.append(dict(entry))
        if r["alarm_row"] >= 0:
            c.alarms.append({"test": r["test"], "date": entry["date"], "statistic": _num(round(r["statistic"], 4)),
                             "threshold": 1.0, "level": r["level"]})
    block["monitors"] = tests
    tr = st.get("tracking")
    c.tests = [t for t in c.tests if t.get("test") != "tracking-trigg"]
    if tr is not None and tr["statistic"] is not None:
        c.tests.append({"test": "tracking-trigg", "statistic": _num(round(tr["statistic"], 4)), "pvalue": None,
                        "threshold": _num(tr["limit"]), "level": tr["level"], "date": day(tr["first_row"])})
    c.deployed["forecasts"] = block
    crossed = [t for t in tests if t["date"]]
    if crossed:
        first = min(crossed, key=lambda t: t["date"])
        what = "mean" if first["test"] == "forecast-mean" else "spread"
        b = block["bias"]
        bias_txt = (f"; over the last {b['n']} periods their mean error is {fmt_num(b['mean'])} {m.unit} "
                    f"(t = {fmt_num(b['t'])}, allowing for the {logged['horizon'] - 1}-period overlap of "
                    f"{logged['horizon']}-step errors)") if b["mean"] is not None and b["t"] is not None else ""
        c.actions.append(Action("watch", severity="watch", extra={"source": "deployed-forecasts"}, reason=(
            f"The production forecasts ('{fcfg.series}') went off: the monitor of their error {what} crossed its "  # type: ignore[union-attr]
            f"boundary on {first['date']} (false-alarm rate {first['level']:.1%} over the monitoring horizon)"
            f"{bias_txt}. The relationship monitors say whether and why to refit.")))


# ------------------------------------------------------------------------------------------------ freshness
def _freshness(c: _Ctx) -> None:
    m, d, known = c.model, c.design, c.obs  # c.obs holds only this model's series
    # numpy views per series: period and available_at as int64 ns (first vintage of each period shown)
    ser = known["series"].to_numpy()
    per_ns = as_ns(known["period"])
    at_ns = as_ns(known["available_at"])
    start_ns = int(as_ns(d.periods[max(0, d.n - 26):][:1])[0])
    feeds: dict[str, Any] = {}
    limit = c.cfg.check.feed_limit
    for s in m.series:
        dr = next((x for x in m.drivers if x.series == s), None)
        if dr is not None and dr.form != "lagged":
            _forward_feed(c, dr, ser, per_ns, feeds)
            continue
        delay = c.cfg.driver_delay(m, dr) if dr else timedelta(0)
        rows = np.flatnonzero(ser == s)
        if rows.size == 0:
            continue
        lp = pd.Timestamp(int(per_ns[rows].max()))
        due = next_due(lp, m.frequency, delay)
        late = pd.Timestamp(c.as_of) > due
        recent = rows[per_ns[rows] >= start_ns]
        recent = recent[np.lexsort((at_ns[recent], per_ns[recent]))]
        first = recent[np.r_[True, per_ns[recent][1:] != per_ns[recent][:-1]]] if recent.size else recent
        feeds[s] = {"periods": np.datetime_as_string(per_ns[first].astype("datetime64[ns]"), unit="D").tolist(),
                    "available_at": [t + "+00:00" for t in np.datetime_as_string(
                        at_ns[first].astype("datetime64[ns]"), unit="s").tolist()],
                    "next_due": due.isoformat(), "late": bool(late), "last_period": lp.date().isoformat()}
        if late:
            c.late.add(s)
            missing = _periods_between(pd.Timestamp(lp), pd.Timestamp(c.as_of), m.frequency, delay)
            role = "target" if s == m.target else "driver"
            reason = (f"The {role} feed '{s}' is late: its last value is for the period starting "
                      f"{lp.date().isoformat()}, and the next was due by {due.strftime('%Y-%m-%d %H:%M')} UTC "
                      f"({missing} period{'s' if missing != 1 else ''} missing).")
            if missing > limit and role == "driver":
                reason += f" It has been missing for more than {limit} periods."
            c.actions.append(Action("data-late", reason=reason,
                                    extra={"driver": s, "last_period": lp.date().isoformat(),
                                           "missing_periods": int(missing),
                                           **({"feed_limit": limit} if missing > limit else {})}))
    c.charts["feeds"] = feeds


def _forward_feed(c: _Ctx, dr: Any, ser: np.ndarray, per_ns: np.ndarray, feeds: dict[str, Any]) -> None:
    """A forecast or planned driver is late when the forecast of the current period had to be made
    without it: no forecast (or plan) of the period it needs was stored by the check's moment."""
    m = c.model
    moment = pd.Timestamp(c.as_of) - pd.Timedelta(microseconds=1)
    cur = period_start(moment.tz_convert("UTC").tz_localize(None), m.frequency, week_anchor=week_anchor(m))
    need = shift_periods(pd.DatetimeIndex([cur]), m.frequency, dr.lag)[0]
    rows = np.flatnonzero(ser == dr.series)
    have = per_ns[rows]
    last = pd.Timestamp(int(have.max())) if have.size else None
    late = not bool(np.any(have == int(as_ns(pd.DatetimeIndex([need]))[0])))
    kind = "forecast" if dr.form == "forecast" else "plan"
    # the timeline of the chart: the periods of the last half year and when their first plan (forecast)
    # was stored, as for a lagged feed
    at_ns = as_ns(c.obs["available_at"])
    start_ns = int(as_ns(shift_periods(pd.DatetimeIndex([cur]), m.frequency, 26))[0])
    recent = rows[per_ns[rows] >= start_ns]
    recent = recent[np.lexsort((at_ns[recent], per_ns[recent]))]
    first = recent[np.r_[True, per_ns[recent][1:] != per_ns[recent][:-1]]] if recent.size else recent
    feeds[dr.series] = {"periods": np.datetime_as_string(per_ns[first].astype("datetime64[ns]"), unit="D").tolist(),
                        "available_at": [t + "+00:00" for t in np.datetime_as_string(
                            at_ns[first].astype("datetime64[ns]"), unit="s").tolist()],
                        "next_due": cur.tz_localize("UTC").isoformat(),
                        "late": late, "last_period": last.date().isoformat() if last is not None else None,
                        "form": dr.form}
    if late:
        c.late.add(dr.series)
        covers = f"its latest {kind} covers the period starting {last.date().isoformat()}" if last is not None \
            else f"no {kind} of it is stored at all"
        c.actions.append(Action("data-late", extra={
            "driver": dr.series, "last_period": last.date().isoformat() if last is not None else None,
            "missing_periods": 1}, reason=(
                f"The {kind} feed '{dr.series}' is late: the forecast for the period starting "
                f"{cur.date().isoformat()} needed its {kind} for the period starting {need.date().isoformat()}, "
                f"and none had arrived; {covers}.")))


def _periods_between(last: pd.Timestamp, as_of: pd.Timestamp, freq: str, delay: timedelta) -> int:
    """How many periods after ``last`` should have arrived by ``as_of``."""
    n = 0
    p = last
    while True:
        p = next_period(p, freq)
        due = (next_period(p, freq) + pd.Timedelta(delay)).tz_localize("UTC")
        if due >= as_of or n > 10000:
            return n
        n += 1


# ------------------------------------------------------------------------------------------------ drivers
def _drivers_and_worth(c: _Ctx) -> None:
    """Per driver: reference vs recent coefficient, Clark–West test of the model with vs without it."""
    d, chk = c.design, c.cfg.check
    ref_coef = c.charts.pop("_ref_coef")
    n = d.n
    recent = np.arange(n) >= max(d.n_ref, n - chk.recent_window)
    # Worth keeping: one-step forecasts of the model with and without each driver, both re-estimated on a
    # rolling window (the recent-coefficient window). An expanding (recursive) fit would carry the reference
    # period's effect into the recent forecasts: after a driver's effect vanishes the full model keeps
    # forecasting with a stale coefficient and the Clark-West adjustment term (y1 - y2)^2 then reads that
    # stale, harmful difference as a gain. Clark & West (2007) cover the rolling scheme.
    names = list(d.driver_columns)
    window = chk.rolling_window or chk.recent_window
    nested_fe: dict[str, np.ndarray] = {}
    roll_coef = c.charts.pop("_roll_coef", None)
    if roll_coef is not None and window < n:  # the screening pass already fitted this rolling window
        fe_full = _one_step_errors(c.y[None], c.X[None], roll_coef[None])[0]
    else:
        fe_full = _rolling_forecast_errors(c.y[None], c.X[None], window)[0]
    if names:
        Xn = np.stack([np.delete(c.X, d.driver_columns[s], axis=1) for s in names])
        Yn = np.broadcast_to(c.y, (len(names), n))
        fe_n = _rolling_forecast_errors(Yn, Xn, window)
        for i, s in enumerate(names):
            nested_fe[s] = fe_n[i]
    c.charts["_fe_roll"], c.charts["_fe_roll_without"] = fe_full, nested_fe  # reused by _lag_drift
    last = {s: f.get("last_period") for s, f in c.charts.get("feeds", {}).items()}
    for dr in c.model.drivers:
        s = dr.series
        if s not in d.driver_columns:
            continue
        j = d.driver_columns[s]
        info: dict[str, Any] = {"series": s, "lag": d.lags.get(s, dr.lag), "form": dr.form,
                                "coef_reference": _num(round(float(ref_coef[j]), 6))}
        coefs = c.charts.get("coefficients", {}).get(s)
        if coefs:
            lastc = next((k for k in range(len(coefs["coef"]) - 1, -1, -1) if coefs["coef"][k] is not None), None)
            if lastc is not None:
                info["coef_recent"] = coefs["coef"][lastc]
                info["ci_recent"] = [coefs["lower"][lastc], coefs["upper"][lastc]]
                w = int(coefs.get("window") or window)
                info["recent_window"] = {"start": d.periods[max(0, lastc - w + 1)].date().isoformat(),
                                         "end": d.periods[lastc].date().isoformat(), "n": w}
        if s in c.charts.get("_effects", {}):
            info["break"] = c.charts["_effects"][s]  # the refit's before/after figures (same object)
        feed = c.charts.get("feeds", {}).get(s, {})
        info["last_period"] = last.get(s)
        info["next_due"] = feed.get("next_due")
        info["late"] = bool(feed.get("late", False))
        # worth keeping: forecasts y - e over the recent window
        e1 = np.where(recent, nested_fe[s], np.nan)  # without the driver (restricted)
        e2 = np.where(recent, fe_full, np.nan)  # with it
        both = np.isfinite(e1) & np.isfinite(e2)
        if both.sum() >= 10:
            y = c.y
            cw = engine.clark_west(y[both], (y - e1)[both], (y - e2)[both])
            mae_with = float(np.mean(np.abs(e2[both])))
            mae_without = float(np.mean(np.abs(e1[both])))
            info["worth"] = {"test": "clark-west", "statistic": _num(cw.statistic), "pvalue": _num(cw.pvalue),
                             "mae_with": round(mae_with, 4), "mae_without": round(mae_without, 4),
                             "n": int(both.sum())}
            ci = info.get("ci_recent")
            covers_zero = ci is not None and ci[0] is not None and ci[0] <= 0 <= ci[1]
            helps = _num(cw.pvalue) is not None and cw.pvalue < chk.level
            late_action = next((a for a in c.actions if a.action == "data-late" and a.extra.get("driver") == s),
                               None)
            if late_action is not None and late_action.extra.get("missing_periods", 0) > chk.feed_limit:
                # a feed gone for long is a data problem, not a verdict on the driver: say what running
                # without it would cost (the same figures as the driver's worth entry)
                cost = (f"without it the one-step MAE would go from {fmt_num(mae_with)} to {fmt_num(mae_without)} "
                        f"{c.model.unit} over {window_words(int(both.sum()), chk.recent_window)} "
                        f"(Clark–West p = {fmt_p(cw.pvalue)})")
                late_action.reason += (
                    f" It still helps the forecasts, so restore the feed: {cost}." if helps else
                    f" It no longer helps the forecasts much: {cost}. Restore the feed or run without it.")
                late_action.extra["without"] = {"mae_with": info["worth"]["mae_with"],
                                                "mae_without": info["worth"]["mae_without"],
                                                "n": int(both.sum()), "pvalue": _num(cw.pvalue)}
            # a driver that still helps the forecasts is never proposed for dropping
            if not helps and covers_zero:
                reason = (f"Driver '{s}' is not earning its place: over "
                          f"{window_words(int(both.sum()), chk.recent_window)} it no "
                          f"longer improves the forecasts (Clark–West p = {fmt_p(cw.pvalue)}) and its recent "
                          f"coefficient interval [{fmt_num((ci or [None])[0])}, {fmt_num((ci or [None, None])[1])}] "
                          f"covers zero; MAE would go from {fmt_num(mae_with)} to {fmt_num(mae_without)} "
                          f"{c.model.unit} without it.")
                c.actions.append(Action("drop-driver", reason=reason, extra={"driver": s}))
        c.drivers.append(info)


def _rolling_forecast_errors(Y: np.ndarray, X: np.ndarray, window: int) -> np.ndarray:
    """(M, n) one-step errors ``y_t - x_t' b_{t-1}``, ``b_{t-1}`` the OLS fit on rows ``t - window .. t - 1``;
    NaN where that window cannot be fitted (too short, a missing row, rank deficient)."""
    M, n, k = X.shape
    out = np.full((M, n), np.nan)
    if window < k + 2 or window >= n:
        return out
    try:
        roll = engine.rolling_coefficients(Y, X, window)
    except InsufficientDataError:
        return out
    return _one_step_errors(Y, X, np.asarray(roll.coef).reshape(M, n, k))


def _one_step_errors(Y: np.ndarray, X: np.ndarray, coef: np.ndarray) -> np.ndarray:
    """``y_t - x_t' b_{t-1}`` from coefficient paths ``coef`` (M, n, k) (row t fitted on data up to t)."""
    out = np.full(Y.shape, np.nan)
    with np.errstate(invalid="ignore"):
        out[:, 1:] = Y[:, 1:] - np.einsum("mtk,mtk->mt", X[:, 1:], coef[:, :-1])
    return out


# ------------------------------------------------------------------------------------------------ lag drift
def _lag_drift(c: _Ctx) -> None:
    """Cross-correlation profile, reference vs recent window, of target and driver after removing the
    deterministic terms; ``relag`` when the peak moved, is significant and the new lag forecasts better."""
    d, chk, m = c.design, c.cfg.check, c.model
    max_lag = chk.max_lag or MAX_LAG_BY_FREQ[m.frequency]
    ref = slice(0, d.n_ref)
    det = d.X[:, d.deterministic]
    ok = np.isfinite(d.y[ref])
    skipped: dict[str, str] = {}
    c.charts["lag_profile_skipped"] = skipped  # why a driver has no profile (said beside the chart)
    lagged = [dr.series for dr in m.drivers if dr.form == "lagged" and dr.series in d.driver_columns]
    if ok.sum() <= det.shape[1] + max_lag + 5:
        skipped.update({s: f"too few reference periods for {max_lag} lags" for s in lagged})
        return
    # deterministic part estimated on the reference period only (no look-ahead into the monitoring span)
    def _resid(v: np.ndarray) -> np.ndarray:
        good = np.isfinite(v[ref])
        b, *_ = np.linalg.lstsq(det[ref][good], v[ref][good], rcond=None)
        return v - det @ b

    # partial residual of the target: remove deterministic terms and the *other* drivers' reference effects
    okx = np.isfinite(d.y[ref]) & np.isfinite(d.X[ref]).all(axis=1)
    b_ref, *_ = np.linalg.lstsq(d.X[ref][okx], d.y[ref][okx], rcond=None)
    fitted = d.X @ b_ref
    recent_n = min(chk.recent_window, d.n - d.n_ref)
    if recent_n < max(20, max_lag + 10):
        skipped.update({s: f"{recent_n} periods monitored, {max(20, max_lag + 10)} needed" for s in lagged})
        return
    profiles: dict[str, Any] = {}
    obs = c.obs
    for dr in m.drivers:
        s = dr.series
        if dr.form != "lagged" or s not in d.driver_columns:
            continue
        if s in c.late:
            skipped[s] = "its feed is late"
            continue
        vint = obs[obs["series"] == s]
        # the driver's own values by period (latest vintage), on the target's period grid
        xv = latest_values(vint, d.periods)
        if np.isfinite(xv[ref]).sum() <= det.shape[1] + 5:
            skipped[s] = "too few reference values"
            continue
        rx = _resid(xv)
        j = d.driver_columns[s]
        ry = d.y - fitted + d.X[:, j] * b_ref[j]
        try:
            with np.errstate(invalid="ignore", divide="ignore"):
                lp_ref = engine.lag_profile(ry[: d.n_ref], rx[: d.n_ref], max_lag)
                lp_rec = engine.lag_profile(ry[d.n - recent_n:], rx[d.n - recent_n:], max_lag)
        except (DriftError, np.linalg.LinAlgError) as exc:
            log.info("model %s: no lag profile for %s: %s", m.name, s, exc)
            skipped[s] = f"cannot be computed ({exc})"
            continue
        if not (np.isfinite(lp_ref.ccf).any() and np.isfinite(lp_rec.ccf).any()):
            skipped[s] = "constant: no cross-correlation"
            continue
        cur = d.lags.get(s, dr.lag)
        profiles[s] = {"lags": list(range(max_lag + 1)), "reference": _list(lp_ref.ccf),
                       "recent": _list(lp_rec.ccf), "band_reference": _num(lp_ref.band),
                       "band_recent": _num(lp_rec.band), "current_lag": cur}
        new = int(lp_rec.peak_lag)
        # the peak must clear a band corrected for scanning max_lag + 1 lags (Bonferroni)
        z = stats.norm.ppf(1 - chk.level / (2 * (max_lag + 1))) / np.sqrt(float(lp_rec.nobs))
        r_new = float(np.asarray(lp_rec.ccf)[new])
        if new == cur or abs(r_new) <= z or new < _min_lag(c, dr):
            continue
        # does the model at the new lag beat the current one out of sample (recent window)?
        try:
            alt = build_design(c.cfg, m, obs, pd.Timestamp(c.as_of),
                               lags={s: new})
        except DriftError:
            continue
        # Both models re-estimated on the same rolling window as the worth test: with expanding fits the
        # current-lag model carries the reference period's effect, so *any* other lag (where the reference
        # fit found little) would look better once the effect at the current lag has gone.
        y_alt, X_alt, _, _ = _prewhiten(m, alt)
        window = chk.rolling_window or chk.recent_window
        e_new = _rolling_forecast_errors(y_alt[None], X_alt[None], window)[0][d.n - recent_n:]
        e_cur = c.charts["_fe_roll"][d.n - recent_n:]
        e_without = c.charts["_fe_roll_without"][s][d.n - recent_n:]
        both = np.isfinite(e_new) & np.isfinite(e_cur) & np.isfinite(e_without)
        if both.sum() < 10:
            continue
        mae_new = float(np.mean(np.abs(e_new[both])))
        mae_cur = float(np.mean(np.abs(e_cur[both])))
        # better than the current lag (DM, one-sided at level) ...
        dm = engine.diebold_mariano(e_cur[both], e_new[both], alternative="greater")
        # ... and the driver at the new lag earns its place (Clark-West against the model without it)
        yb = c.y[d.n - recent_n:][both]
        cw = engine.clark_west(yb, (yb - e_without[both]), (yb - e_new[both]))
        if (mae_new < mae_cur and _num(dm.pvalue) is not None and dm.pvalue < chk.level
                and _num(cw.pvalue) is not None and cw.pvalue < chk.level):
            # a driver that forecasts better at another lag still earns its place: relag it, do not drop it
            # (at the old lag its effect has gone, which is what a drop-driver test sees)
            dropped = [a for a in c.actions if a.action == "drop-driver" and a.extra.get("driver") == s]
            c.actions = [a for a in c.actions if a not in dropped]
            figs = {"r": _num(round(r_new, 4)), "band": _num(round(float(lp_rec.band), 4)),
                    "mae_new": round(mae_new, 4), "mae_current": round(mae_cur, 4), "n": int(both.sum()),
                    "window": int(recent_n), "dm_pvalue": _num(dm.pvalue), "cw_pvalue": _num(cw.pvalue)}
            c.actions.append(Action("relag", extra={"driver": s, "lag": new, "figures": figs}, reason=(
                f"Driver '{s}' now leads the target by {new} period{'s' if new != 1 else ''} instead of {cur}: "
                f"its cross-correlation peaks at lag {new} over the last {recent_n} periods "
                f"(r = {fmt_num(figs['r'])}, band ±{fmt_num(figs['band'])}), and at lag {new} the one-step MAE "
                f"would be {fmt_num(figs['mae_new'])} instead of {fmt_num(figs['mae_current'])} {m.unit} over "
                f"{window_words(figs['n'], recent_n)} (Diebold–Mariano p = {fmt_p(figs['dm_pvalue'])})."
                + (f" At lag {cur} it no longer helps, but at lag {new} it does: keep it." if dropped else ""))))
    if profiles:
        c.charts["lag_profile"] = profiles


def _min_lag(c: _Ctx, dr: Any) -> int:
    delay = c.cfg.driver_delay(c.model, dr)
    step = period_length(c.model.frequency)
    q, r = divmod(delay, step)
    return 1 + int(q) + (1 if r else 0)


# ------------------------------------------------------------------------------------------------ payload
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
        "charts": charts,
    }


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
            got = store.load_observations(series, moment)
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
    for m in failed:
        notes = [f"'{s}' has {n} value(s) in quarantine, the first in row {row}: {why}"
                 for s, (n, row, why) in ((s, held[s]) for s in dict.fromkeys(m.series) if s in held)]
        if notes:
            errors[m.name] += ". Ingest refused them: " + "; ".join(notes) + " (drift quarantine lists them)"


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
    rows = store.load_observations(sorted({s for s, _ in want}), max(want.values()).to_pydatetime())
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
