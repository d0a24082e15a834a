"""Actions from the monitors: alarms → ``refit`` (the break dated, the driver effect that moved) or ``watch``.

Takes a model's context after screening (its alarms, its recursive one-step errors in
``charts['_fe']``, its prewhitened design); gives its relationship actions (:class:`drift.verdicts.Action`
with the reason a reader gets) and, for a refit, the before/after effects (``charts['_effects']``, the
coefficient chart's ``split`` lines, ``charts['break_index']``). After the lag-drift stage,
:func:`_relag_explains_break` turns a refit whose break a moved lag explains into that relag. Also the
words that name a monitor and the horizon, shared with the charts. The other actions come from their own stages: ``data-late``
(:mod:`drift.checking.freshness`), ``drop-driver`` and ``relag`` (:mod:`drift.checking.drivers`), the
production forecasts' ``watch`` (:mod:`drift.checking.production`).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from drift import engine
from drift.checking.context import _Ctx, _num, log
from drift.checking.designs import _prewhiten
from drift.engine.split import split_coefficients
from drift.exceptions import DriftError, InsufficientDataError
from drift.panel import build_design
from drift.verdicts import Action, change_words, fmt_num, fmt_p


def _relationship_actions(c: _Ctx, alarm_idx: int | None, lapsed: bool) -> None:
    """The verdict on the relationship from the monitors of one model: ``refit`` when one crossed
    (:func:`_refit_action`; ``alarm_idx`` the row of the first alarm, ``lapsed`` when it came after the
    horizon), ``watch`` when the monitoring horizon has ended or a monitor passed its warning boundary."""
    d, chk = c.design, c.cfg.check
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


def _relag_explains_break(c: _Ctx) -> None:
    """A refit whose break a moved lag explains becomes that ``relag``: run after the lag-drift stage.

    When the monitors found a break (``refit``) and a driver's lag moved (``relag``: its lag-profile peak
    moved, clears its band, and the model at the new lag forecasts better), the refit is replaced by the
    relag if, from the dated break on, the *reference* fit with that driver at its new lag forecasts as it
    did on the reference period: its errors ``e = y - x' b_ref`` (covariance ``s^2 (I + X P X')`` over those
    rows if only the lag moved, P the inverse of the reference X'X) have a mean not significantly different
    from zero (two-sided z-test at ``check.level``) and a sum of squares not significantly above what that
    covariance gives (:func:`_spread_pvalue`, one-sided at ``check.level``), on at least 8 rows,
    and are smaller in mean square than at the old lag. Then the lag moved and the effect did not: the relag
    carries the monitors' evidence (``since``, ``monitor``) and says to refit at the new lag. Hard actions
    are unchanged in number (a refit becomes a relag), so the false-alarm rule is untouched.
    """
    refit = next((a for a in c.actions if a.action == "refit"), None)
    relags = [a for a in c.actions if a.action == "relag"]
    since = c.charts.get("break_index")
    if refit is None or not relags or since is None or refit.extra.get("monitor", {}).get("beyond_horizon"):
        return
    d, chk = c.design, c.cfg.check
    ref = np.arange(d.n) < d.n_ref
    ok = ref & np.isfinite(c.y) & np.isfinite(c.X).all(axis=1)
    k = c.X.shape[1]
    if ok.sum() <= k + 2:
        return
    b = np.linalg.lstsq(c.X[ok], c.y[ok], rcond=None)[0]  # the reference fit (the monitors' b_ref)
    sigma = float(np.sqrt(np.sum((c.y[ok] - c.X[ok] @ b) ** 2) / (ok.sum() - k)))
    P = np.linalg.pinv(c.X[ok].T @ c.X[ok])
    after = np.arange(d.n) >= since

    def errors(y: np.ndarray, X: np.ndarray) -> np.ndarray:
        good = after & np.isfinite(y) & np.isfinite(X).all(axis=1)
        return np.where(good, y - np.where(good[:, None], X, 0.0) @ b, np.nan)

    e_old = errors(c.y, c.X)
    best = None
    for a in relags:
        s, new = a.extra.get("driver"), a.extra.get("lag")
        try:
            alt = build_design(c.cfg, c.model, c.vintages if c.vintages is not None else c.obs, pd.Timestamp(c.as_of),
                               lags={s: new})
            if not alt.periods.equals(d.periods) or alt.X.shape[1] != k:
                continue
            y_alt, X_alt, _, _ = _prewhiten(c.model, alt)
        except DriftError as exc:
            log.debug("model %s: no relagged design for %s: %s", d.model, s, exc)
            continue
        X_alt = np.asarray(X_alt, float)
        e_new = errors(np.asarray(y_alt, float), X_alt)
        both = np.isfinite(e_new) & np.isfinite(e_old)
        n = int(both.sum())
        if n < 8:
            continue
        # under "the lag moved, not the effect" e = u - x'(b_ref - beta): covariance sigma^2 (I + X P X')
        # over these rows (the reference fit's error is shared by all of them)
        XR = X_alt[both]
        A = XR @ P @ XR.T
        xbar = XR.mean(axis=0)
        en = e_new[both]
        mean_z = float(en.mean() / (sigma * np.sqrt(1.0 / n + xbar @ P @ xbar)))
        p_mean = float(2 * stats.norm.sf(abs(mean_z)))
        # spread: sum e^2 / s^2 is sum_j (1 + mu_j) chi2_1 + chi2_(n - r) (mu_j the r non-zero eigenvalues
        # of X P X' over these rows) over s^2 / sigma^2 ~ chi2_dof / dof; its tail simulated (seeded)
        p_spread = _spread_pvalue(float(np.sum(en * en) / sigma**2), n, A, int(ok.sum()) - k)
        ms_new, ms_old = float(np.mean(en * en)), float(np.mean(e_old[both] ** 2))
        if p_mean >= chk.level and p_spread >= chk.level and ms_new < ms_old and (best is None or ms_new < best[1]):
            best = (a, ms_new, {"n": n, "mean_error": _num(round(float(en.mean()), 6)),
                                "pvalue_mean": _num(p_mean), "spread_ratio": _num(round(np.sqrt(ms_new) / sigma, 4)),
                                "pvalue_spread": _num(p_spread),
                                "spread_ratio_old_lag": _num(round(np.sqrt(ms_old) / sigma, 4))})
    if best is None:
        return
    a, _, figs = best
    since_s = refit.extra.get("since")
    mon = refit.extra.get("monitor", {})
    s, new, cur = a.extra["driver"], a.extra["lag"], d.lags.get(a.extra["driver"])
    a.extra.update({"since": since_s, "monitor": mon, "explains_break": figs})
    a.reason += (
        f" It explains the change the monitors found: {_test_words(mon.get('test', ''), mon.get('driver'))} "
        f"crossed its boundary on {mon.get('date')}, and since {since_s} the reference coefficients with "
        f"'{s}' at lag {new} forecast as on the reference period (mean error {fmt_num(figs['mean_error'])} "
        f"{c.model.unit or ''}, p = {fmt_p(figs['pvalue_mean'])}; spread {fmt_num(figs['spread_ratio'])} "
        f"times the reference's, p = {fmt_p(figs['pvalue_spread'])}; at lag {cur}: "
        f"{fmt_num(figs['spread_ratio_old_lag'])} times): the lag moved, not the effect. Re-lag it and refit "
        f"on data since {since_s}.")
    c.actions = [x for x in c.actions if x is not refit]


#: draws of the seeded simulation behind :func:`_spread_pvalue`
SPREAD_DRAWS = 20_000


def _spread_pvalue(q: float, n: int, A: np.ndarray, dof: int) -> float:
    """P(Q >= q) for ``Q = e'e / s^2`` when ``e ~ N(0, sigma^2 (I + A))`` over n rows and ``s^2`` is an
    independent ``sigma^2 chi2_dof / dof``: ``Q = (sum_j (1 + mu_j) Z_j^2 + chi2_(n - r)) / (chi2_dof / dof)``
    with ``mu_j`` the r non-zero eigenvalues of A, by a seeded simulation (the same figures give the same
    p-value)."""
    mu = np.linalg.eigvalsh((A + A.T) / 2.0)
    mu = mu[mu > 1e-10 * max(1.0, float(mu.max(initial=0.0)))]
    rng = np.random.default_rng(20261203)
    Z = rng.standard_normal((SPREAD_DRAWS, mu.size))
    num = (Z * Z) @ (1.0 + mu) + rng.chisquare(max(n - mu.size, 1), SPREAD_DRAWS)
    draws = num / (rng.chisquare(max(dof, 1), SPREAD_DRAWS) / max(dof, 1))
    return float((np.sum(draws >= q) + 1) / (SPREAD_DRAWS + 1))


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
