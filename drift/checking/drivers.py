"""Evidence per driver: its coefficient then and now, whether it still earns its place, its lag.

Takes a model's context after screening and freshness (the reference coefficients ``charts['_ref_coef']``,
the rolling fit ``charts['_roll_coef']``, the late feeds, a refit's before/after effects); gives one
``drivers`` entry per driver (reference vs recent coefficient with its interval, worth: Clark–West test of
rolling one-step forecasts with vs without it, feed timing), the lag profiles (``charts['lag_profile']``,
cross-correlations reference vs recent window), and the actions ``drop-driver`` (no longer helps and its
interval covers zero) and ``relag`` (the peak moved, is significant, and the new lag forecasts better);
a late feed's ``data-late`` reason gains what running without it would cost.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from drift import engine
from drift.checking.context import _Ctx, _list, _num, log
from drift.checking.designs import _prewhiten
from drift.config import MAX_LAG_BY_FREQ, period_length
from drift.exceptions import DriftError, InsufficientDataError
from drift.panel import build_design, latest_values
from drift.verdicts import Action, fmt_num, fmt_p, window_words


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


def _lag_series(c: _Ctx) -> tuple[int, int, list[tuple[Any, np.ndarray, np.ndarray]]]:
    """The series whose cross-correlations :func:`_lag_drift` profiles: ``(max_lag, recent_n, items)``, one
    item ``(driver, ry, rx)`` per lagged driver, the target's partial residual ``ry`` (deterministic terms
    and the other drivers' reference effects removed) and the driver ``rx`` less its deterministic part,
    both estimated on the reference period only (no look-ahead). Why a driver has none is recorded in
    ``charts['lag_profile_skipped']``. Kept in ``charts['_lag_series']`` so it is built once per check."""
    if "_lag_series" in c.charts:
        return c.charts["_lag_series"]
    d, chk, m = c.design, c.cfg.check, c.model
    max_lag = chk.max_lag or MAX_LAG_BY_FREQ[m.frequency]
    ref = slice(0, d.n_ref)
    det = d.X[:, d.deterministic]
    ok = np.isfinite(d.y[ref])
    skipped: dict[str, str] = {}
    c.charts["lag_profile_skipped"] = skipped  # why a driver has no profile (said beside the chart)
    items: list[tuple[Any, np.ndarray, np.ndarray]] = []
    c.charts["_lag_series"] = out = (max_lag, 0, items)
    lagged = [dr.series for dr in m.drivers if dr.form == "lagged" and dr.series in d.driver_columns]
    if ok.sum() <= det.shape[1] + max_lag + 5:
        skipped.update({s: f"too few reference periods for {max_lag} lags" for s in lagged})
        return out
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
    c.charts["_lag_series"] = out = (max_lag, recent_n, items)
    if recent_n < max(20, max_lag + 10):
        skipped.update({s: f"{recent_n} periods monitored, {max(20, max_lag + 10)} needed" for s in lagged})
        return out
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
        items.append((dr, d.y - fitted + d.X[:, j] * b_ref[j], rx))
    return out


def _lag_profiles_batched(ctxs: list[_Ctx]) -> None:
    """The lag profiles of every model's lagged drivers, one engine call per window shape for the whole
    chunk instead of two per driver and model (the same numbers: each row of the batched call is computed
    on its own). Kept in ``charts['_lag_profiles']``; a model whose inputs fail here, or a batch the engine
    refuses (one series too short or constant), is left to :func:`_lag_drift`, which computes and reports
    it model by model."""
    jobs: dict[tuple[int, int, int], list[tuple[_Ctx, str, np.ndarray, np.ndarray]]] = {}
    for c in ctxs:
        try:
            max_lag, recent_n, items = _lag_series(c)
        except Exception:  # noqa: BLE001 - raised again in the model's own stage, and reported there
            c.charts.pop("_lag_series", None)
            continue
        c.charts["_lag_profiles"] = {}
        d = c.design
        for dr, ry, rx in items:
            jobs.setdefault((d.n_ref, recent_n, max_lag), []).append((c, dr.series, ry, rx))
    for (n_ref, recent_n, max_lag), group in jobs.items():
        _profile_group(group, n_ref, recent_n, max_lag)


def _profile_group(group: list[tuple[_Ctx, str, np.ndarray, np.ndarray]], n_ref: int, recent_n: int,
                   max_lag: int) -> None:
    """One batched call per window; a batch the engine refuses (a series too short or constant) is split in
    halves until the series it refuses is alone, which its model's own stage then computes and reports."""
    if len(group) < 2:
        return
    try:
        with np.errstate(invalid="ignore", divide="ignore"):
            lp_ref = engine.lag_profile(np.stack([ry[:n_ref] for _, _, ry, _ in group]),
                                        np.stack([rx[:n_ref] for _, _, _, rx in group]), max_lag)
            lp_rec = engine.lag_profile(np.stack([ry[len(ry) - recent_n:] for _, _, ry, _ in group]),
                                        np.stack([rx[len(rx) - recent_n:] for _, _, _, rx in group]), max_lag)
    except (DriftError, np.linalg.LinAlgError):
        half = len(group) // 2
        _profile_group(group[:half], n_ref, recent_n, max_lag)
        _profile_group(group[half:], n_ref, recent_n, max_lag)
        return
    for i, (c, s, _, _) in enumerate(group):
        c.charts["_lag_profiles"][s] = (_row(lp_ref, i), _row(lp_rec, i))


def _row(lp: Any, i: int) -> Any:
    """Row ``i`` of a batched :class:`drift.engine.lags.LagProfile`, as a single-model one."""
    return type(lp)(ccf=lp.ccf[i], band=float(lp.band[i]), nobs=int(lp.nobs[i]), peak_lag=int(lp.peak_lag[i]),
                    peak_significant=bool(lp.peak_significant[i]), ar_order=int(lp.ar_order[i]),
                    level=lp.level, squeeze=True)


def _lag_drift(c: _Ctx) -> None:
    """Cross-correlation profile, reference vs recent window, of target and driver after removing the
    deterministic terms; ``relag`` when the peak moved, is significant and the new lag forecasts better."""
    d, chk, m = c.design, c.cfg.check, c.model
    max_lag, recent_n, items = _lag_series(c)
    skipped = c.charts["lag_profile_skipped"]
    done = c.charts.get("_lag_profiles", {})
    profiles: dict[str, Any] = {}
    obs = c.obs
    for dr, ry, rx in items:
        s = dr.series
        try:
            if s in done:
                lp_ref, lp_rec = done[s]
            else:
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
