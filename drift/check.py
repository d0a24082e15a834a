"""The check: store -> as-of designs -> batched engine -> evidence -> verdicts -> payloads.

:func:`analyse` is the statistical core of one chunk of models (no I/O apart from what it is given);
:func:`run_check` adds the store, the runs table, the alert state and delivery. The per-model payload is
the JSON contract of ``drift check --json`` plus a ``charts`` block for the digest.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import MISSING, dataclass, field, fields
from datetime import date, datetime, time, timedelta, timezone
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from drift import engine
from drift.checking.accuracy import _accuracy, _accuracy_block, _mase_scale, _seasonal_naive  # noqa: F401
from drift.checking.actions import (  # noqa: F401
    _date_break,
    _horizon_words,
    _refit_action,
    _relationship_actions,
    _sentence_start,
    _test_words,
)
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
from drift.checking.freshness import _forward_feed, _freshness, _periods_between  # noqa: F401
from drift.checking.production import (  # noqa: F401
    MIN_LEVEL,
    _deployed_replay,
    _horizon_ratio,
    _logged_batch,
    _logged_evidence,
    _logged_forecasts,
)
from drift.checking.screening import MIN_DOF, _monitor, _monitor_chart, _screen  # noqa: F401
from drift.config import (
    MAX_LAG_BY_FREQ,
    Config,
    ModelConfig,
    next_period,
    period_length,
    period_start,
)
from drift.exceptions import DriftError, InsufficientDataError
from drift.executor import run_chunks
from drift.panel import build_design, latest_values, shift_periods, week_anchor
from drift.progress import Progress
from drift.verdicts import ERROR, Action, fmt_num, fmt_p, overall, sort_actions, window_words

log = logging.getLogger(__name__)


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
