"""After a verdict: propose a new fit (``drift refit``) and record the team's decision (``drift accept``).

:func:`propose` changes nothing. It fits the model, as the epoch in force at the check date has it, on the
data since the dated break (or a date given), and puts its coefficients with 95% intervals beside those
of the model being monitored: the production coefficients when the config gives them (``deployed:``),
else the reference-period fit. Then it compares the two out of sample over the recent window: the
monitored model's one-step as-deployed errors (the same errors the check's ``accuracy`` block scores)
against the proposal's one-step errors *replayed as it could have run*: at each origin the proposal is
refitted on the rows from the start date up to the origin (an expanding window), and its forecast is
scored only once it has at least ``regressors + 3`` rows behind it. The difference in squared errors is
tested with Diebold–Mariano and the Harvey–Leybourne–Newbold small-sample correction (one-sided: "the
proposal is more accurate"). The start date itself came from the data of the same window (the break was
dated with them), so the comparison slightly favours the proposal: read the p-value as evidence, not proof.

:func:`accept` records a decision as a new monitoring epoch (:mod:`drift.epochs`) and closes the model's
open alerts as acted on:

- ``refit``: the new reference period runs from the start date (``--since``, by default the date of the
  refit verdict) to the last period with a target value at the check date;
- ``relag``: the driver (``--driver``, by default the one the relag verdict names) moves to ``--lag`` (by
  default the verdict's lag), refitted from ``--since``, by default from the break the relag explains
  (the relag's ``since``) when it carries one, else on the recent window (``check.recent_window`` periods);
- ``drop-driver``: the driver is left out, refitted on the recent window or ``--since``.

The proposal the decision was based on is stored with the epoch.
"""

from __future__ import annotations

import getpass
import json
import logging
from collections.abc import Mapping, Sequence
from datetime import date, datetime, timezone
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from scipy import stats

from drift import engine
from drift.check import as_of_moment, prepare_model
from drift.config import Config, period_length
from drift.deployed import as_deployed_errors, coefficient_vector, forecast_horizon, logged_forecast_errors
from drift.epochs import ACTIONS, Epoch, apply_epoch, current, start_epoch
from drift.exceptions import DecisionError, DriftError
from drift.store import Store, _jsonable, verdicts
from drift.verdicts import fmt_num

log = logging.getLogger(__name__)

#: two-sided coverage of the coefficient intervals shown
COVERAGE = 0.95
#: fewest out-of-sample periods the accuracy comparison needs (as the check's worth and relag tests)
MIN_COMPARED = 10


def decided_by(by: str | None) -> str:
    """Who decides: ``by`` when given, else the operating-system user."""
    if by:
        return by
    try:
        return getpass.getuser()
    except (KeyError, OSError):  # no user name in the environment or password database
        return "unknown"


def _latest_verdict(store: Store, model: str, day: date | None) -> dict[str, Any] | None:
    """The newest recorded verdict of the model (as of ``day`` or earlier when given), payload decoded."""
    v = verdicts
    q = sa.select(v.c.as_of, v.c.payload).where(v.c.model == model)
    if day is not None:
        q = q.where(v.c.as_of <= day)
    with store.connect() as conn:
        row = conn.execute(q.order_by(v.c.as_of.desc(), v.c.id.desc()).limit(1)).first()
    if row is None:
        return None
    try:
        payload = json.loads(row.payload)
    except ValueError:
        return None
    return payload if isinstance(payload, dict) else None


def _check_day(store: Store, model: str, as_of: date | None) -> date:
    """The check date a decision is made at: ``as_of``, else that of the model's newest verdict, else today."""
    if as_of is not None:
        return as_of
    latest = _latest_verdict(store, model, None)
    if latest and latest.get("as_of"):
        return date.fromisoformat(str(latest["as_of"])[:10])
    return datetime.now(timezone.utc).date()


def _verdict_action(verdict: Mapping[str, Any] | None, epoch: Epoch, action: str,
                    driver: str | None = None) -> list[Mapping[str, Any]]:
    """The verdict's actions named ``action`` (of ``driver``), when the verdict belongs to ``epoch``."""
    if not verdict:
        return []
    ep = verdict.get("epoch")
    number = ep.get("number") if isinstance(ep, Mapping) else 1
    if number != epoch.number:
        return []
    return [a for a in verdict.get("actions") or [] if isinstance(a, Mapping) and a.get("action") == action
            and (driver is None or a.get("driver") == driver)]


def _ols(y: np.ndarray, X: np.ndarray) -> tuple[np.ndarray, np.ndarray, float, int]:
    """Coefficients, their standard errors, the residual standard deviation and the degrees of freedom."""
    n, k = X.shape
    b, *_ = np.linalg.lstsq(X, y, rcond=None)
    df = n - k
    resid = y - X @ b
    s2 = float(resid @ resid) / df
    cov = s2 * np.linalg.inv(X.T @ X)
    return b, np.sqrt(np.maximum(np.diag(cov), 0.0)), float(np.sqrt(s2)), df


def _terms(columns: Sequence[str], driver_columns: Mapping[str, int]) -> list[str]:
    """A term name per column: the driver's series for a driver column, else the column's own name."""
    by_col = {j: s for s, j in driver_columns.items()}
    return [by_col.get(j, c) for j, c in enumerate(columns)]


def _score(err: np.ndarray) -> dict[str, Any]:
    e = err[np.isfinite(err)]
    return {"mae": round(float(np.mean(np.abs(e))), 4), "rmse": round(float(np.sqrt(np.mean(e ** 2))), 4),
            "bias": round(float(np.mean(e)), 4), "n": int(e.size)}


def _num(x: Any, digits: int = 6) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return round(v, digits) if np.isfinite(v) else None


def propose(cfg: Config, store: Store, name: str, *, since: date | None = None, as_of: date | None = None,
            action: str = "refit", lags: Mapping[str, int] | None = None, drop: Sequence[str] = ()) -> dict[str, Any]:
    """The proposed new fit of a model and its out-of-sample accuracy against the monitored model.

    Parameters
    ----------
    name : the model.
    since : first day of the data the proposal is fitted on; default: for ``refit`` the date of the model's
        refit verdict; for ``relag`` the date of the break the relag explains (its ``since``, when the
        verdict's relag to that lag carries one); else the start of the recent window
        (``check.recent_window`` periods).
    as_of : the check date (data as known at the end of that day); default the model's newest verdict's.
    action : ``refit`` (same model, new data), ``relag`` (with ``lags``) or ``drop-driver`` (with ``drop``).

    Returns
    -------
    dict (JSON-able): model, as_of, action, epoch (the one in force), since, until, reference (what
    :func:`accept` would set), lags, dropped, fit, current_source, coefficients, check_effects (the refit
    verdict's effects since the same date, when it gave that date: driver, after, se_after), accuracy.

    Raises
    ------
    ConfigError : an unknown model.
    DecisionError : no date to start from, a date outside the data, too few rows since it, or regressors
        that cannot be told apart on those rows.
    """
    model0 = cfg.model(name)
    day = _check_day(store, name, as_of)
    epoch = current(store, [model0], day)[name]
    model = apply_epoch(model0, epoch)
    latest = _latest_verdict(store, name, day)
    if since is None and action == "refit":
        found = _verdict_action(latest, epoch, "refit")
        if not found or not found[0].get("since"):
            raise DecisionError(
                f"model '{name}': no refit verdict in epoch {epoch.number} as of {day.isoformat()} to take the "
                "start date from; give --since DATE (the first day of the data to fit on)")
        since = date.fromisoformat(str(found[0]["since"])[:10])
    if since is None and action == "relag" and lags:
        # a relag that explains the monitors' break carries its date: the new lag holds from there on (the
        # rows before it follow the old lag), so the proposal is fitted from it; else the recent window
        dated = [a for s in sorted(lags) for a in _verdict_action(latest, epoch, "relag", s)
                 if a.get("since") and a.get("lag") == lags[s]]
        if dated:
            since = date.fromisoformat(str(dated[0]["since"])[:10])
    new_model = model
    if lags or drop:
        drivers = [d.model_copy(update={"lag": int(lags[d.series])}) if lags and d.series in lags else d
                   for d in model.drivers if d.series not in drop]
        new_model = model.model_copy(update={"drivers": drivers})
    moment = as_of_moment(day)
    obs = store.load_observations(sorted(set(model.read_series)), moment)
    try:
        cur = prepare_model(cfg, model, obs, moment)
        new = cur if new_model is model else prepare_model(cfg, new_model, obs, moment)
    except DriftError as exc:
        raise DecisionError(f"model '{name}' cannot be fitted as of {day.isoformat()}: {exc}") from None
    d = new.design
    periods = d.periods
    y_known = np.flatnonzero(np.isfinite(d.y))
    last = int(y_known[-1])
    if since is None:
        since = periods[max(d.n_ref, d.n - cfg.check.recent_window)].date()
    if since < model.reference.start or since > periods[last].date():
        raise DecisionError(
            f"model '{name}': --since {since.isoformat()} is outside the data of epoch {epoch.number} "
            f"({model.reference.start.isoformat()} to {periods[last].date().isoformat()}); give a day in between")
    r0 = int(np.searchsorted(periods, pd.Timestamp(since)))
    ok = np.isfinite(new.y) & np.isfinite(new.X).all(axis=1)
    ok[:r0] = False
    k = d.k
    need = k + 3
    n_ok = int(ok.sum())
    start_day = periods[r0].date()
    if n_ok < need:
        raise DecisionError(
            f"model '{name}': {n_ok} usable periods from {start_day.isoformat()} to {periods[last].date().isoformat()}, "
            f"and a fit of its {k} regressors ({', '.join(d.columns)}) needs at least {need}: give an earlier "
            "--since, or wait for more data")
    Xs, ys = new.X[ok], new.y[ok]
    if np.linalg.matrix_rank(Xs) < k:
        zero = [d.columns[j] for j in range(k) if not np.any(Xs[:, j])]
        raise DecisionError(
            f"model '{name}': on the {n_ok} periods since {start_day.isoformat()} its regressors cannot be told "
            "apart" + (f" ({', '.join(zero)} is zero on all of them)" if zero else "")
            + ": give an earlier --since")
    b_new, se_new, sigma_new, df_new = _ols(ys, Xs)
    tq = float(stats.t.ppf(0.5 + COVERAGE / 2, df_new))

    # the monitored model: production coefficients (config ``deployed:``) or the reference-period fit
    dep = coefficient_vector(model, epoch.number, cur.design)
    cd = cur.design
    if dep is not None:
        b_cur, ci_cur, source = dep, None, "deployed"
        e_cur = as_deployed_errors(model0, cd.y, cd.X, dep)  # the errors the check scores
        errors_source = "the deployed coefficients replayed"
    else:
        okr = np.isfinite(cur.y[: cd.n_ref]) & np.isfinite(cur.X[: cd.n_ref]).all(axis=1)
        b_cur, se_cur, _, df_cur = _ols(cur.y[: cd.n_ref][okr], cur.X[: cd.n_ref][okr])
        tc = float(stats.t.ppf(0.5 + COVERAGE / 2, df_cur))
        ci_cur = np.column_stack([b_cur - tc * se_cur, b_cur + tc * se_cur])
        source = "reference fit"
        # the check's as-deployed one-step errors: the recursive fit from the reference period on
        e_cur = np.asarray(engine.recursive_fit(cur.y[None], cur.X[None]).forecast_error)[0]
        errors_source = "drift's recursive re-estimate from the reference period on"
    if model.forecast_series and forecast_horizon(model) == 1:
        # the production system's own one-step forecasts, as logged: their errors are the as-deployed ones
        _, logged = logged_forecast_errors(model, cd.periods, cur.obs)  # type: ignore[misc]
        e_cur, errors_source = logged, "the logged production forecasts"
    cur_terms = _terms(cd.columns, cd.driver_columns)
    new_terms = _terms(d.columns, d.driver_columns)
    coefficients = []
    for j, t in enumerate(new_terms):
        row: dict[str, Any] = {"term": t, "column": d.columns[j], "proposed": _num(b_new[j]),
                               "proposed_se": _num(se_new[j]),
                               "proposed_ci": [_num(b_new[j] - tq * se_new[j]), _num(b_new[j] + tq * se_new[j])]}
        if t in cur_terms:
            i = cur_terms.index(t)
            row["current"] = _num(b_cur[i])
            row["current_ci"] = None if ci_cur is None else [_num(ci_cur[i, 0]), _num(ci_cur[i, 1])]
            row["change"] = _num(b_new[j] - b_cur[i])
        else:
            row.update(current=None, current_ci=None, change=None)
        coefficients.append(row)
    for i, t in enumerate(cur_terms):
        if t not in new_terms:
            coefficients.append({"term": t, "column": cd.columns[i], "proposed": None, "proposed_se": None,
                                 "proposed_ci": None, "current": _num(b_cur[i]),
                                 "current_ci": None if ci_cur is None else [_num(ci_cur[i, 0]), _num(ci_cur[i, 1])],
                                 "change": None})

    # out of sample: the proposal replayed on an expanding window from the start date
    e_new = np.full(d.n, np.nan)
    rf = engine.recursive_fit(new.y[None, r0:], new.X[None, r0:])
    e_new[r0:] = np.asarray(rf.forecast_error)[0]
    behind = np.concatenate([[0], np.cumsum(ok)[:-1]])  # usable proposal rows before each row
    window = np.zeros(d.n, bool)
    window[max(0, d.n - cfg.check.recent_window):] = True
    both = window & (behind >= need) & np.isfinite(e_new) & np.isfinite(e_cur[: d.n])
    accuracy: dict[str, Any]
    if both.sum() >= MIN_COMPARED:
        dm = engine.diebold_mariano(e_cur[: d.n][both], e_new[both], h=1, alternative="greater")
        rows = np.flatnonzero(both)
        accuracy = {
            "window": {"start": periods[rows[0]].date().isoformat(), "end": periods[rows[-1]].date().isoformat(),
                       "n": int(both.sum())},
            "current": _score(e_cur[: d.n][both]), "proposed": _score(e_new[both]),
            "diebold_mariano": {"statistic": _num(dm.statistic, 4), "pvalue": _num(dm.pvalue, 6),
                                "alternative": "the proposed fit is more accurate (squared error)",
                                "method": dm.method, "n": int(dm.nobs)},
        }
    else:
        accuracy = {"window": None, "current": None, "proposed": None, "diebold_mariano": None,
                    "reason": (f"only {int(both.sum())} periods of the recent window have a one-step forecast of the "
                               f"proposal with {need} periods behind it; the comparison needs {MIN_COMPARED}")}
    # the check's own estimate of each driver's effect since the same date (the refit verdict's before/after
    # split: trend, season and the other terms shared with the earlier data), quoted beside the proposal's
    # (every term re-estimated on the rows since): the two answer different questions and can differ
    check_effects = []
    refit_found = _verdict_action(latest, epoch, "refit")
    if refit_found and str(refit_found[0].get("since") or "")[:10] == start_day.isoformat():
        for e in refit_found[0].get("effects") or []:
            if isinstance(e, Mapping) and e.get("after") is not None and e.get("se_after") is not None:
                check_effects.append({"driver": e.get("driver"), "after": e["after"], "se_after": e["se_after"]})
    new_lags = dict(epoch.lags)
    new_lags.update({s: int(v) for s, v in (lags or {}).items()})
    dropped = [*epoch.dropped, *[s for s in drop if s not in epoch.dropped]]
    for s in dropped:
        new_lags.pop(s, None)
    return _jsonable({
        "model": name, "as_of": day.isoformat(), "action": action, "epoch": epoch.as_json(model0),
        "since": start_day.isoformat(), "until": periods[last].date().isoformat(),
        "reference": {"start": start_day.isoformat(), "end": periods[last].date().isoformat()},
        "lags": new_lags, "dropped": dropped,
        "fit": {"rows": n_ok, "regressors": k, "sigma": _num(sigma_new), "df": df_new,
                "error_model": cur.error_model},
        "current_source": source, "current_errors": errors_source, "coefficients": coefficients,
        "check_effects": check_effects, "accuracy": accuracy,
        "unit": model.unit,
    })


def accept(cfg: Config, store: Store, name: str, *, action: str, since: date | None = None, lag: int | None = None,
           driver: str | None = None, note: str | None = None, by: str | None = None,
           as_of: date | None = None, now: datetime | None = None) -> dict[str, Any]:
    """Record a decision: a new monitoring epoch for the model (see the module docstring).

    Returns a dict: model, epoch (the new one, as in the check's JSON), closed_alerts (ids), proposal.

    Raises
    ------
    ConfigError : an unknown model.
    DecisionError : the decision does not fit (no driver or lag to take, a lag too short for the driver's
        delay, a date before the epoch in force, too few rows to fit on).
    """
    if action not in ACTIONS:
        raise DecisionError(f"--action must be one of {', '.join(ACTIONS)}, got '{action}'")
    model0 = cfg.model(name)
    day = _check_day(store, name, as_of)
    epoch = current(store, [model0], day)[name]
    model = apply_epoch(model0, epoch)
    latest = _latest_verdict(store, name, day)
    lags: dict[str, int] = {}
    drop: tuple[str, ...] = ()
    if action in ("relag", "drop-driver"):
        names = [d.series for d in model.drivers]
        if driver is None:
            found = _verdict_action(latest, epoch, action)
            drivers = sorted({str(a.get("driver")) for a in found if a.get("driver")})
            if len(drivers) != 1:
                raise DecisionError(
                    f"model '{name}': give --driver SERIES (" + (f"the verdict names {', '.join(drivers)}"
                                                               if drivers else f"no {action} verdict names one")
                    + f"; its drivers: {', '.join(names) or 'none'})")
            driver = drivers[0]
        if driver not in names:
            raise DecisionError(f"model '{name}': '{driver}' is not one of its drivers in epoch {epoch.number} "
                                f"({', '.join(names) or 'none'})")
        if action == "drop-driver":
            drop = (driver,)
        else:
            if lag is None:
                found = _verdict_action(latest, epoch, "relag", driver)
                if not found or found[0].get("lag") is None:
                    raise DecisionError(f"model '{name}': no relag verdict for '{driver}' to take the lag from; "
                                        "give --lag N")
                lag = int(found[0]["lag"])
            dr = next(d for d in model.drivers if d.series == driver)
            if lag == dr.lag:
                raise DecisionError(f"model '{name}': '{driver}' is already at lag {lag}")
            if lag < 0:
                raise DecisionError(f"--lag must be 0 or more, got {lag}")
            if dr.form == "lagged":
                step = period_length(model.frequency)
                q, r = divmod(cfg.driver_delay(model, dr), step)
                least = 1 + int(q) + (1 if r else 0)
                if lag < least:
                    raise DecisionError(f"model '{name}': lag {lag} is too short for '{driver}' (its value would "
                                        f"not exist yet when the forecast is made); use --lag {least} or more")
            lags = {driver: int(lag)}
    proposal = propose(cfg, store, name, since=since, as_of=day, action=action, lags=lags, drop=drop)
    ref = proposal["reference"]
    new, closed = start_epoch(
        store, model0, action=action, effective=day,
        reference=(date.fromisoformat(ref["start"]), date.fromisoformat(ref["end"])),
        lags=proposal["lags"], dropped=proposal["dropped"], decided_by=decided_by(by), note=note,
        proposal={k: proposal[k] for k in ("since", "until", "fit", "current_source", "current_errors", "coefficients",
                                           "accuracy")},
        now=now)
    log.info("model %s: epoch %d (%s) recorded by %s; %d open alert(s) closed as acted on", name, new.number,
             action, new.decided_by, len(closed))
    return {"model": name, "epoch": new.as_json(model0), "closed_alerts": closed, "proposal": proposal}


# ------------------------------------------------------------------------------------------ rendering
def format_proposal(p: Mapping[str, Any]) -> str:
    """Plain-text rendering of :func:`propose` for a terminal."""
    ep = p["epoch"]
    lines = [f"model {p['model']}: proposed {p['action']} as of {p['as_of']} "
             f"(epoch {ep['number']}, {ep['action']}), fitted on {p['fit']['rows']} periods from {p['since']} "
             f"to {p['until']}" + (f", errors {p['fit']['error_model']}" if p["fit"].get("error_model") else ""),
             ""]
    cur = "deployed" if p["current_source"] == "deployed" else "reference fit"
    head = f"  {'term':<22} {cur + ' [95%]':>30} {'proposed [95%]':>30} {'change':>10}"
    lines.append(head)

    def cell(v: Any, ci: Any) -> str:
        if v is None:
            return "-"
        out = fmt_num(v)
        if ci and ci[0] is not None and ci[1] is not None:
            out += f" [{fmt_num(ci[0])}, {fmt_num(ci[1])}]"
        return out

    for c in p["coefficients"]:
        lines.append(f"  {c['term']:<22} {cell(c['current'], c['current_ci']):>30} "
                     f"{cell(c['proposed'], c['proposed_ci']):>30} "
                     f"{(fmt_num(c['change']) if c['change'] is not None else '-'):>10}")
    ce = p.get("check_effects") or []
    if ce:
        lines.append("")
        lines.append(f"  the check's estimate since {p['since']} (its refit verdict: trend, season and the other terms "
                     "shared with the earlier data): "
                     + "; ".join(f"{e['driver']} {fmt_num(e['after'])} (se {fmt_num(e['se_after'])})" for e in ce))
    acc = p["accuracy"]
    lines.append("")
    if acc.get("window"):
        w, dm = acc["window"], acc["diebold_mariano"]
        unit = p.get("unit") or ""
        lines.append(f"one-step forecasts, {w['n']} periods from {w['start']} to {w['end']} (the proposal replayed "
                     f"out of sample, refitted at each origin on the data since {p['since']}):")
        lines.append(f"  monitored model ({p['current_errors']}): MAE {fmt_num(acc['current']['mae'])} {unit}, "
                     f"RMSE {fmt_num(acc['current']['rmse'])}")
        lines.append(f"  proposed: MAE {fmt_num(acc['proposed']['mae'])} {unit}, RMSE {fmt_num(acc['proposed']['rmse'])}")
        pv = dm["pvalue"]
        lines.append(f"  Diebold–Mariano (HLN) that the proposal is more accurate: statistic "
                     f"{fmt_num(dm['statistic'])}, " + ("p < 0.0001" if pv is not None and pv < 1e-4 else f"p = {pv:.3g}"))
    else:
        lines.append(f"no out-of-sample comparison: {acc.get('reason')}")
    lines.append("")
    lines.append("Nothing was changed. Statistical evidence, not certainty: the decision stays with the model's owner.")
    return "\n".join(lines)


def format_accepted(r: Mapping[str, Any]) -> str:
    ep = r["epoch"]
    n = len(r["closed_alerts"])
    drivers = ", ".join(f"{d['series']} (lag {d['lag']})" for d in ep.get("drivers") or []) or "none"
    return (f"model {r['model']}: epoch {ep['number']} ({ep['action']}) starts with checks as of {ep['since']}, "
            f"decided by {ep['decided_by']}; reference {ep['reference']['start']} to {ep['reference']['end']}; "
            f"drivers {drivers}" + (f"; dropped {', '.join(ep['dropped'])}" if ep["dropped"] else "")
            + f". {n} open alert{'s' if n != 1 else ''} closed as acted on.")
