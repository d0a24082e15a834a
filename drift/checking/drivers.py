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

from functools import lru_cache
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from drift import engine
from drift.checking.context import _Ctx, _list, _num, log
from drift.checking.designs import _prewhiten
from drift.config import MAX_LAG_BY_FREQ, period_length
from drift.exceptions import DriftError, InsufficientDataError
from drift.panel import as_ns, build_design
from drift.verdicts import Z95, Action, fmt_num, fmt_p, window_words


def _worth_batched(ctxs: list[_Ctx]) -> None:
    """The chunk's worth evidence (:func:`_worth_fits`) in a few batched engine calls: one rolling fit per
    shape of the nested models (each without one driver) and one Clark–West test per recent-window length,
    instead of two per model (the same numbers: each row of a batched call is computed on its own). A batch
    that fails is split in halves; a model it still fails alone is left to :func:`_drivers_and_worth`, which
    computes and reports it model by model."""
    if not ctxs:
        return
    try:
        _worth_fits(ctxs)
    except Exception:  # noqa: BLE001 - raised again in the model's own stage, and reported there
        for c in ctxs:
            for key in ("_worth", "_fe_roll", "_fe_roll_without"):
                c.charts.pop(key, None)
        if len(ctxs) > 1:
            half = len(ctxs) // 2
            _worth_batched(ctxs[:half])
            _worth_batched(ctxs[half:])


def _worth_fits(ctxs: list[_Ctx]) -> None:
    """Per model and driver, the one-step forecast errors with and without it, both from rolling fits (the
    recent-coefficient window), over the recent window, and the Clark–West test of the two. Kept in
    ``charts['_fe_roll']`` (the model's errors), ``'_fe_roll_without'`` (driver -> errors without it) and
    ``'_worth'`` (driver -> (statistic, p-value, MAE with, MAE without, n) when 10 or more periods compare).

    Worth keeping: one-step forecasts of the model with and without each driver, both re-estimated on a
    rolling window. An expanding (recursive) fit would carry the reference period's effect into the recent
    forecasts: after a driver's effect vanishes the full model keeps forecasting with a stale coefficient
    and the Clark-West adjustment term (y1 - y2)^2 then reads that stale, harmful difference as a gain.
    Clark & West (2007) cover the rolling scheme. Only the recent window's errors are computed (all a
    payload reads); the models of ``ctxs`` with the same shapes share one engine call."""
    fits: dict[tuple[int, int, int, int], list[tuple[dict[str, np.ndarray], str, _Ctx, int]]] = {}
    spans: list[int] = []
    for c in ctxs:
        d, chk = c.design, c.cfg.check
        n = d.n
        window = chk.rolling_window or chk.recent_window
        start = max(d.n_ref, n - chk.recent_window, 1)  # first period of the recent window
        spans.append(start)
        roll_coef = c.charts.get("_roll_coef")
        if roll_coef is not None and window < n:  # the screening pass already fitted this rolling window
            fe_full = np.full(n, np.nan)
            if start < n:
                fe_full[start:] = _one_step_errors(c.y[None, start - 1:], c.X[None, start - 1:],
                                                   roll_coef[None, start - 1:])[0, 1:]
        else:
            fe_full = _rolling_forecast_errors(c.y[None], c.X[None], window, start=start)[0]
        nested: dict[str, np.ndarray] = {}
        c.charts["_fe_roll"], c.charts["_fe_roll_without"] = fe_full, nested  # reused by _lag_drift
        kn = d.k - 1
        for s, j in d.driver_columns.items():
            if n - start < 10 or window < kn + 2 or window >= n:
                nested[s] = np.full(n, np.nan)  # no worth test reads them (nor a relag: 20 recent periods)
            else:
                fits.setdefault((n, start, kn, window), []).append((nested, s, c, j))
    for (n, start, kn, window), group in fits.items():
        # each nested model on the rows its recent forecasts need: the window before the recent one on
        lo = max(0, start - window)
        Y = np.empty((len(group), n - lo))
        X = np.empty((len(group), n - lo, kn))
        for i, (_, _, c, j) in enumerate(group):
            Y[i] = c.y[lo:]
            X[i, :, :j] = c.X[lo:, :j]  # the model's columns less the driver's
            X[i, :, j:] = c.X[lo:, j + 1:]
        fe = np.full((len(group), n), np.nan)
        fe[:, lo:] = _rolling_forecast_errors(Y, X, window, start=start - lo)
        for i, (nested, s, _, _) in enumerate(group):
            nested[s] = fe[i]
    # the Clark–West tests, one engine call per recent-window length
    tests: dict[int, list[tuple[_Ctx, str, np.ndarray, np.ndarray, np.ndarray]]] = {}
    for c, start in zip(ctxs, spans):
        c.charts["_worth"] = {}
        fe_full = c.charts["_fe_roll"][start:]
        for s in c.design.driver_columns:
            e1, e2 = c.charts["_fe_roll_without"][s][start:], fe_full  # without the driver (restricted), with it
            both = np.isfinite(e1) & np.isfinite(e2)
            if both.sum() >= 10:
                tests.setdefault(e2.size, []).append((c, s, both, e1, e2))
    for group in tests.values():
        both = np.stack([b for _, _, b, _, _ in group])
        y = np.where(both, np.stack([c.y[c.design.n - both.shape[1]:] for c, _, _, _, _ in group]), np.nan)
        e1 = np.stack([e1 for _, _, _, e1, _ in group])
        e2 = np.stack([e2 for _, _, _, _, e2 in group])
        cw = engine.clark_west(y, y - e1, y - e2)
        stat, pval = np.atleast_1d(cw.statistic), np.atleast_1d(cw.pvalue)
        n_both = both.sum(axis=1)
        mae_with = np.where(both, np.abs(e2), 0.0).sum(axis=1) / n_both
        mae_without = np.where(both, np.abs(e1), 0.0).sum(axis=1) / n_both
        for i, (c, s, _, _, _) in enumerate(group):
            c.charts["_worth"][s] = (float(stat[i]), float(pval[i]), float(mae_with[i]), float(mae_without[i]),
                                     int(n_both[i]))


def _drivers_and_worth(c: _Ctx) -> None:
    """Per driver: reference vs recent coefficient, Clark–West test of the model with vs without it
    (:func:`_worth_fits`, computed here unless the chunk's batched pass already did)."""
    d, chk = c.design, c.cfg.check
    ref_coef = c.charts.pop("_ref_coef")
    window = chk.rolling_window or chk.recent_window
    if "_worth" not in c.charts:
        _worth_fits([c])
    c.charts.pop("_roll_coef", None)
    worth = c.charts.pop("_worth")
    feeds = c.charts.get("feeds", {})
    coefficients = c.charts.get("coefficients", {})
    effects = c.charts.get("_effects", {})
    days: dict[tuple[int, int], tuple[str, str]] = {}
    for dr in c.model.drivers:
        s = dr.series
        if s not in d.driver_columns:
            continue
        j = d.driver_columns[s]
        info: dict[str, Any] = {"series": s, "lag": d.lags.get(s, dr.lag), "form": dr.form,
                                "coef_reference": _num(round(float(ref_coef[j]), 6))}
        coefs = coefficients.get(s)
        if coefs:
            lastc = next((k for k in range(len(coefs["coef"]) - 1, -1, -1) if coefs["coef"][k] is not None), None)
            if lastc is not None:
                info["coef_recent"] = coefs["coef"][lastc]
                info["ci_recent"] = [coefs["lower"][lastc], coefs["upper"][lastc]]
                w = int(coefs.get("window") or window)
                a, b = max(0, lastc - w + 1), lastc
                if (a, b) not in days:  # the drivers share one window: its dates made once per model
                    days[a, b] = _days(d.periods, a, b)
                info["recent_window"] = {"start": days[a, b][0], "end": days[a, b][1], "n": w}
        if s in effects:
            info["break"] = effects[s]  # the refit's before/after figures (same object)
        feed = feeds.get(s, {})
        info["last_period"] = feed.get("last_period")
        info["next_due"] = feed.get("next_due")
        info["late"] = bool(feed.get("late", False))
        # worth keeping: forecasts y - e over the recent window
        if s in worth:
            cw_stat, cw_p, mae_with, mae_without, n_both = worth[s]
            info["worth"] = {"test": "clark-west", "statistic": _num(cw_stat), "pvalue": _num(cw_p),
                             "mae_with": round(mae_with, 4), "mae_without": round(mae_without, 4),
                             "n": n_both}
            ci = info.get("ci_recent")
            covers_zero = ci is not None and ci[0] is not None and ci[0] <= 0 <= ci[1]
            helps = _num(cw_p) is not None and cw_p < chk.level
            # the effect since a dated break (the refit's figures): clearly not zero means the driver still acts,
            # whatever a recent window that straddles the break says
            brk = effects.get(s) or {}
            after, se_after = _num(brk.get("after")), _num(brk.get("se_after"))
            since_break = after is not None and se_after is not None and abs(after) > Z95 * se_after
            late_action = next((a for a in c.actions if a.action == "data-late" and a.extra.get("driver") == s),
                               None)
            if late_action is not None and late_action.extra.get("missing_periods", 0) > chk.feed_limit:
                # a feed gone for long is a data problem, not a verdict on the driver: say what running
                # without it would cost (the same figures as the driver's worth entry)
                cost = (f"without it the one-step MAE would go from {fmt_num(mae_with)} to {fmt_num(mae_without)} "
                        f"{c.model.unit} over {window_words(n_both, chk.recent_window)} "
                        f"({_refitted(window)}; Clark–West p = {fmt_p(cw_p)})")
                if helps:
                    late_action.reason += f" It still helps the forecasts, so restore the feed: {cost}."
                elif since_break:
                    late_action.reason += (
                        f" It still acts since the break of {brk.get('after_window', {}).get('start')} (effect "
                        f"{fmt_num(after)}, standard error {fmt_num(se_after)}: not zero), so restore the feed; "
                        f"over a recent window that straddles the break the refits do not show it: {cost}.")
                else:
                    late_action.reason += (f" It no longer helps the forecasts much: {cost}. Restore the feed or "
                                           "run without it.")
                late_action.extra["without"] = {"mae_with": info["worth"]["mae_with"],
                                                "mae_without": info["worth"]["mae_without"],
                                                "n": n_both, "pvalue": _num(cw_p)}
            # a driver that still helps the forecasts is never proposed for dropping; nor one whose effect since
            # a dated break is clearly not zero: the recent window then mixes the old and the new effect, and
            # the refit is the advice
            if not helps and covers_zero and not since_break:
                reason = (f"Driver '{s}' is not earning its place: over "
                          f"{window_words(n_both, chk.recent_window)} it no "
                          f"longer improves the forecasts (Clark–West p = {fmt_p(cw_p)}) and its recent "
                          f"coefficient interval [{fmt_num((ci or [None])[0])}, {fmt_num((ci or [None, None])[1])}] "
                          f"covers zero; without it the one-step MAE would go from {fmt_num(mae_with)} to "
                          f"{fmt_num(mae_without)} {c.model.unit} ({_refitted(window)}).")
                c.actions.append(Action("drop-driver", reason=reason, extra={"driver": s}))
        c.drivers.append(info)


def _refitted(window: int) -> str:
    """What the worth figures are, said beside them: both models re-estimated on a rolling window, so their
    MAE is not the as-deployed MAE of the accuracy line (which forecasts with the deployed coefficients)."""
    return f"both models refitted on each rolling {window}-period window, not the deployed coefficients"


def _days(periods: pd.DatetimeIndex, a: int, b: int) -> tuple[str, str]:
    """``periods[i].date().isoformat()`` for ``i`` = ``a`` and ``b``, without making a Timestamp for a naive
    index."""
    if periods.tz is None:
        both = np.datetime_as_string(periods.values[[a, b]], unit="D")
        return str(both[0]), str(both[1])
    return periods[a].date().isoformat(), periods[b].date().isoformat()


def _rolling_forecast_errors(Y: np.ndarray, X: np.ndarray, window: int, *, start: int = 0) -> np.ndarray:
    """(M, n) one-step errors ``y_t - x_t' b_{t-1}``, ``b_{t-1}`` the OLS fit on rows ``t - window .. t - 1``;
    NaN where that window cannot be fitted (too short, a missing row, rank deficient). Only the errors of
    periods ``t >= start`` are computed (the rows before ``start - window`` are not fitted), NaN before."""
    M, n, k = X.shape
    out = np.full((M, n), np.nan)
    if window < k + 2 or window >= n or start >= n:
        return out
    lo = max(0, start - window)
    try:
        roll = engine.rolling_coefficients(Y[:, lo:], X[:, lo:], window, se_columns=())  # no standard errors
    except InsufficientDataError:
        return out
    fe = _one_step_errors(Y[:, lo:], X[:, lo:], np.asarray(roll.coef).reshape(M, n - lo, k))
    out[:, lo + max(0, start - lo):] = fe[:, max(0, start - lo):]
    return out


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
    ``charts['lag_profile_skipped']``. Kept in ``charts['_lag_series']`` so it is built once per check (for
    the whole chunk by :func:`_lag_profiles_batched`, :func:`_lag_series_chunk`)."""
    if "_lag_series" not in c.charts:
        _lag_series_chunk([c])
    return c.charts["_lag_series"]  # type: ignore[no-any-return]


def _lag_series_chunk(ctxs: list[_Ctx]) -> None:
    """:func:`_lag_series` of several models: their reference fits and their drivers' deterministic parts in
    a few batched least-squares calls, their drivers' latest values read in one pass over the models'
    observations. With several models, one whose inputs fail is left without (its own stage builds them
    again and reports the failure); a single model's failure is raised."""
    alone = len(ctxs) == 1
    started: list[tuple[_Ctx, np.ndarray]] = []
    for c in ctxs:
        try:
            okx = _lag_start(c)
        except Exception:  # raised again in the model's own stage, and reported there
            if alone:
                raise
            c.charts.pop("_lag_series", None)
            continue
        if okx is not None:
            started.append((c, okx))
    if not started:
        return
    try:
        _lag_fill(started)
    except Exception:  # each model on its own below: a model that fails fails alone
        if alone:
            raise
        for c, okx in started:
            try:
                _lag_fill([(c, okx)])
            except Exception:  # noqa: BLE001 - raised again in the model's own stage, and reported there
                c.charts.pop("_lag_series", None)


def _lag_start(c: _Ctx) -> np.ndarray | None:
    """The checks of :func:`_lag_series` before any fit: ``None`` when no driver gets a profile (the reason in
    ``charts['lag_profile_skipped']``), else the usable reference rows of the model's reference fit."""
    d, chk, m = c.design, c.cfg.check, c.model
    max_lag = chk.max_lag or MAX_LAG_BY_FREQ[m.frequency]
    ref = slice(0, d.n_ref)
    ok = np.isfinite(d.y[ref])
    skipped: dict[str, str] = {}
    c.charts["lag_profile_skipped"] = skipped  # why a driver has no profile (said beside the chart)
    items: list[tuple[Any, np.ndarray, np.ndarray]] = []
    c.charts["_lag_series"] = (max_lag, 0, items)
    lagged = [dr.series for dr in m.drivers if dr.form == "lagged" and dr.series in d.driver_columns]
    if ok.sum() <= len(d.deterministic) + max_lag + 5:
        skipped.update({s: f"too few reference periods for {max_lag} lags" for s in lagged})
        return None
    okx = np.isfinite(d.y[ref]) & np.isfinite(d.X[ref]).all(axis=1)
    recent_n = min(chk.recent_window, d.n - d.n_ref)
    c.charts["_lag_series"] = (max_lag, recent_n, items)
    if recent_n < max(20, max_lag + 10):
        skipped.update({s: f"{recent_n} periods monitored, {max(20, max_lag + 10)} needed" for s in lagged})
        return None
    return okx


def _lag_fill(started: list[tuple[_Ctx, np.ndarray]]) -> None:
    """The items of :func:`_lag_series` of models past :func:`_lag_start` (``(context, usable reference
    rows)``); every figure is computed before any model's charts are written, so a failure leaves none."""
    # partial residual of the target: remove deterministic terms and the *other* drivers' reference effects
    b_ref = _ols_by_shape([(c.design.X[: c.design.n_ref], c.design.y[: c.design.n_ref], okx) for c, okx in started])
    latest = _latest_values([c for c, _ in started],
                            [[dr.series for dr in c.model.drivers if dr.form == "lagged"
                              and dr.series in c.design.driver_columns and dr.series not in c.late]
                             for c, _ in started])
    skips: list[dict[str, str]] = []
    todo: list[tuple[int, Any, np.ndarray]] = []  # (model, driver, its values)
    dets: list[np.ndarray] = []  # each model's deterministic columns
    for i, (c, _) in enumerate(started):
        d = c.design
        skips.append({})
        dets.append(d.X[:, : len(d.deterministic)] if d.deterministic == list(range(len(d.deterministic)))
                    else d.X[:, d.deterministic])
        for dr in c.model.drivers:
            s = dr.series
            if dr.form != "lagged" or s not in d.driver_columns:
                continue
            if s in c.late:
                skips[i][s] = "its feed is late"
                continue
            xv = latest[i][s]
            if np.isfinite(xv[: d.n_ref]).sum() <= len(d.deterministic) + 5:
                skips[i][s] = "too few reference values"
                continue
            todo.append((i, dr, xv))
    # deterministic part estimated on the reference period only (no look-ahead into the monitoring span)
    n_ref = [c.design.n_ref for c, _ in started]
    b_det = _ols_by_shape([(dets[i][: n_ref[i]], xv[: n_ref[i]], np.isfinite(xv[: n_ref[i]])) for i, _, xv in todo])
    items: list[list[tuple[Any, np.ndarray, np.ndarray]]] = [[] for _ in started]
    fits: dict[int, np.ndarray] = {}  # each model's reference fit, shared by its drivers
    for (i, dr, xv), b in zip(todo, b_det):
        d = started[i][0].design
        j = d.driver_columns[dr.series]
        if i not in fits:
            fits[i] = d.X @ b_ref[i]
        fitted = fits[i]
        items[i].append((dr, d.y - fitted + d.X[:, j] * b_ref[i][j], xv - dets[i] @ b))
    for (c, _), skip, its in zip(started, skips, items):
        c.charts["lag_profile_skipped"].update(skip)
        c.charts["_lag_series"][2].extend(its)


def _ols_by_shape(problems: list[tuple[np.ndarray, np.ndarray, np.ndarray]]) -> list[np.ndarray]:
    """The least-squares coefficients of each problem ``(A, b, rows)``: ``b[rows]`` on ``A[rows]``, batched
    over the problems of the same shape (:func:`_ols`)."""
    out: list[np.ndarray] = [np.zeros(0)] * len(problems)
    shapes: dict[tuple[int, ...], list[int]] = {}
    for i, (A, _, _) in enumerate(problems):
        shapes.setdefault(A.shape, []).append(i)
    for idx in shapes.values():
        coef = _ols(np.stack([problems[i][0] for i in idx]), np.stack([problems[i][1] for i in idx]),
                    np.stack([problems[i][2] for i in idx]))
        for r, i in enumerate(idx):
            out[i] = coef[r]
    return out


def _ols(A: np.ndarray, b: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """(M, k) ``np.linalg.lstsq(A[m][rows[m]], b[m][rows[m]])[0]`` for each model ``m`` of (M, n, k) ``A``, (M, n)
    ``b`` and ``rows``: one batched QR factorisation of the usable rows (the others zeroed: they add nothing
    to the fit). A model whose columns are close to collinear on its rows (a column's part orthogonal to
    the ones before it below 1e-6 of its size: there the two solutions could differ beyond rounding), or
    whose fit is not finite, is solved by ``np.linalg.lstsq`` itself (its minimum-norm solution)."""
    M, _, k = A.shape
    Az = np.where(rows[:, :, None], A, 0.0)
    bz = np.where(rows, b, 0.0)
    coef = np.full((M, k), np.nan)
    with np.errstate(all="ignore"):
        try:
            Q, R = np.linalg.qr(Az)
            size = np.sqrt(np.einsum("mtk,mtk->mk", Az, Az))
            good = ((np.abs(np.diagonal(R, axis1=1, axis2=2)) > 1e-6 * size).all(axis=1)
                    & (rows.sum(axis=1) >= k))
            if good.any():
                qb = Q[good].transpose(0, 2, 1) @ bz[good][:, :, None]
                coef[good] = np.linalg.solve(R[good], qb)[:, :, 0]
        except np.linalg.LinAlgError:
            pass
    for i in np.flatnonzero(~np.isfinite(coef).all(axis=1)):
        coef[i] = np.linalg.lstsq(A[i][rows[i]], b[i][rows[i]], rcond=None)[0]
    return coef


def _latest_values(ctxs: list[_Ctx], series: list[list[str]]) -> list[dict[str, np.ndarray]]:
    """For each context and its series ``s``: ``latest_values(c.obs[c.obs["series"] == s], c.design.periods)``
    (:func:`drift.panel.latest_values`: the latest known vintage of each period on the target's grid), from
    the model's observations as arrays (``c.vintages``), or from its frame when it has none
    (:func:`_latest_by_series`)."""
    out: list[dict[str, np.ndarray]] = [{} for _ in ctxs]
    arrays = [i for i, c in enumerate(ctxs) if c.vintages is not None]
    framed = [i for i, c in enumerate(ctxs) if c.vintages is None]
    if arrays:
        # every grid as drift.panel.as_ns gives it (UTC for aware ones), converted at once
        grids = as_ns(np.concatenate([_utc_values(ctxs[i].design.periods) for i in arrays]))
        at = 0
        jobs: list[tuple[Any, np.ndarray, np.ndarray]] = []  # (vintages, grid, where the values go)
        for i in arrays:
            c = ctxs[i]
            rp = grids[at:at + c.design.n]
            at += c.design.n
            vint = c.vintages or {}
            out[i] = {s: np.full(rp.size, np.nan) for s in series[i]}
            jobs.extend((vint[s], rp, out[i][s]) for s in series[i] if s in vint and len(vint[s]) and rp.size)
        if jobs:
            _latest_of_vintages(jobs)
    if framed:
        for i, got in zip(framed, _latest_by_series([ctxs[i].obs for i in framed], [series[i] for i in framed],
                                                    [ctxs[i].design.periods for i in framed])):
            out[i] = got
    return out


def _latest_of_vintages(jobs: list[tuple[Any, np.ndarray, np.ndarray]]) -> None:
    """For each job ``(vintages, grid, out)``: ``out[:] = latest_values(vintages, grid)``
    (:func:`drift.panel.latest_values`: the latest known vintage of each period, the one with the latest
    ``available``, the later row on a tie), every job's vintages sorted in one pass."""
    sizes = np.array([len(v) for v, _, _ in jobs])
    group = np.repeat(np.arange(len(jobs)), sizes)
    vp = np.concatenate([v.period for v, _, _ in jobs])
    at = np.concatenate([v.available for v, _, _ in jobs])
    val = np.concatenate([v.value for v, _, _ in jobs])
    order = np.lexsort((np.arange(vp.size), at, vp, group))  # by job, period, time, row order
    g_s, p_s = group[order], vp[order]
    last = np.r_[(g_s[1:] != g_s[:-1]) | (p_s[1:] != p_s[:-1]), True]  # last row of each (job, period)
    g_last, p_last, v_last = g_s[last], p_s[last], val[order][last]
    # a period as its rank among the stored ones, so that (job, period rank) is one sorted number
    known = np.unique(p_last)
    key_last = g_last * known.size + np.searchsorted(known, p_last)
    wp = np.concatenate([rp for _, rp, _ in jobs])
    wg = np.repeat(np.arange(len(jobs)), [rp.size for _, rp, _ in jobs])
    r = np.minimum(np.searchsorted(known, wp), known.size - 1)
    key = wg * known.size + r
    k = np.minimum(np.searchsorted(key_last, key), key_last.size - 1)
    found = np.where((known[r] == wp) & (key_last[k] == key), v_last[k], np.nan)
    pos = 0
    for _, rp, out in jobs:
        out[:] = found[pos:pos + rp.size]
        pos += rp.size


def _utc_values(grid: Any) -> np.ndarray:
    """A grid of periods as datetime64 values, UTC for an aware one (what :func:`drift.panel.as_ns` reads)."""
    g = grid if isinstance(grid, pd.DatetimeIndex) else pd.DatetimeIndex(grid)
    return (g.tz_convert(None) if g.tz is not None else g).values  # read-only use: to_numpy costs ~20 µs a call, .values ~2


def _latest_by_series(frames: list[pd.DataFrame], series: list[list[str]],
                      periods: list[pd.DatetimeIndex]) -> list[dict[str, np.ndarray]]:
    """For each frame ``obs`` of observations, its series and its period grid: ``latest_values(obs[obs["series"]
    == s], periods)`` for each of its series ``s`` (:func:`drift.panel.latest_values`: the latest known vintage
    of each period, the one with the latest ``available_at``, the later row on a tie), all the frames sorted
    in one pass instead of one filtered frame per series."""
    out = [{s: np.full(len(grid), np.nan) for s in names} for names, grid in zip(series, periods)]
    obs = pd.concat(frames, ignore_index=True) if len(frames) > 1 else frames[0]
    if obs.empty:
        return out
    frame = np.repeat(np.arange(len(frames)), [len(f) for f in frames])
    codes, uniques = pd.factorize(obs["series"])
    code = {str(u): i for i, u in enumerate(uniques)}
    group = frame * (len(code) + 1) + (codes + 1)  # (frame, series) as one sortable number
    vp = as_ns(obs["period"])
    at = as_ns(obs["available_at"])
    val = obs["value"].to_numpy(dtype=float)
    order = np.lexsort((np.arange(len(obs)), at, vp, group))  # by frame and series, period, time, row order
    g_s, p_s = group[order], vp[order]
    last = np.r_[(g_s[1:] != g_s[:-1]) | (p_s[1:] != p_s[:-1]), True]  # last row of each (series, period)
    g_last, p_last, v_last = g_s[last], p_s[last], val[order][last]
    # every wanted (frame, series, period) looked up at once: a period as its rank among the stored ones,
    # so that (series group, period rank) is one sorted number
    known = np.unique(p_last)
    key_last = g_last * known.size + np.searchsorted(known, p_last)
    sizes = [len(grid) for grid in periods]
    # the grids as drift.panel.as_ns gives them (UTC for aware ones), converted at once
    grids = as_ns(np.concatenate([_utc_values(grid) for grid in periods]))
    ends = np.cumsum(sizes)
    want_g: list[np.ndarray] = []
    want_p: list[np.ndarray] = []
    for i, names in enumerate(series):
        rp = grids[ends[i] - sizes[i]:ends[i]]
        for s in names:
            want_g.append(np.full(rp.size, i * (len(code) + 1) + code[s] + 1 if s in code else -1))
            want_p.append(rp)
    if not want_g:
        return out
    wg, wp = np.concatenate(want_g), np.concatenate(want_p)
    r = np.minimum(np.searchsorted(known, wp), known.size - 1)
    key = wg * known.size + r
    k = np.minimum(np.searchsorted(key_last, key), key_last.size - 1)
    found = np.where((wg >= 0) & (known[r] == wp) & (key_last[k] == key), v_last[k], np.nan)
    pos = 0
    for got in out:
        for s, x in got.items():
            x[:] = found[pos:pos + x.size]
            pos += x.size
    return out


def _lag_profiles_batched(ctxs: list[_Ctx]) -> None:
    """The lag profiles of every model's lagged drivers, one engine call per window shape for the whole
    chunk instead of two per driver and model (the same numbers: each row of the batched call is computed
    on its own). Kept in ``charts['_lag_profiles']`` (driver -> reference and recent profiles and their
    payload lists); a model whose inputs fail here, or a batch the engine
    refuses (one series too short or constant), is left to :func:`_lag_drift`, which computes and reports
    it model by model."""
    jobs: dict[tuple[int, int, int], list[tuple[_Ctx, str, np.ndarray, np.ndarray]]] = {}
    _lag_series_chunk([c for c in ctxs if "_lag_series" not in c.charts])
    for c in ctxs:
        if "_lag_series" not in c.charts:  # its inputs failed: its own stage computes and reports it
            continue
        max_lag, recent_n, items = c.charts["_lag_series"]
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
    ref_lists, rec_lists = _lists(lp_ref.ccf), _lists(lp_rec.ccf)  # the payload's figures, all rows at once
    for i, (c, s, _, _) in enumerate(group):
        c.charts["_lag_profiles"][s] = (_row(lp_ref, i), _row(lp_rec, i), ref_lists[i], rec_lists[i])


def _lists(a: np.ndarray) -> list[list[float | None]]:
    """:func:`drift.checking.context._list` of each row of ``a`` (rounded to 6 decimals, NaN/inf as None)."""
    x = np.asarray(a, float)
    out = np.round(x, 6).astype(object)
    out[~np.isfinite(x)] = None
    return out.tolist()  # type: ignore[no-any-return]


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
    for dr, ry, rx in items:
        s = dr.series
        try:
            if s in done:
                lp_ref, lp_rec, l_ref, l_rec = done[s]
            else:
                with np.errstate(invalid="ignore", divide="ignore"):
                    lp_ref = engine.lag_profile(ry[: d.n_ref], rx[: d.n_ref], max_lag)
                    lp_rec = engine.lag_profile(ry[d.n - recent_n:], rx[d.n - recent_n:], max_lag)
                l_ref, l_rec = None, None
        except (DriftError, np.linalg.LinAlgError) as exc:
            log.info("model %s: no lag profile for %s: %s", m.name, s, exc)
            skipped[s] = f"cannot be computed ({exc})"
            continue
        if not (np.isfinite(lp_ref.ccf).any() and np.isfinite(lp_rec.ccf).any()):
            skipped[s] = "constant: no cross-correlation"
            continue
        cur = d.lags.get(s, dr.lag)
        profiles[s] = {"lags": list(range(max_lag + 1)),
                       "reference": _list(lp_ref.ccf) if l_ref is None else l_ref,
                       "recent": _list(lp_rec.ccf) if l_rec is None else l_rec, "band_reference": _num(lp_ref.band),
                       "band_recent": _num(lp_rec.band), "current_lag": cur}
        new = int(lp_rec.peak_lag)
        # the peak must clear a band corrected for scanning max_lag + 1 lags (Bonferroni)
        z = _norm_ppf(1 - chk.level / (2 * (max_lag + 1))) / np.sqrt(float(lp_rec.nobs))
        r_new = float(np.asarray(lp_rec.ccf)[new])
        if new == cur or abs(r_new) <= z or new < _min_lag(c, dr):
            continue
        # does the model at the new lag beat the current one out of sample (recent window)?
        try:
            alt = build_design(c.cfg, m, c.vintages if c.vintages is not None else c.obs, pd.Timestamp(c.as_of),
                               lags={s: new})
        except DriftError:
            continue
        # Both models re-estimated on the same rolling window as the worth test: with expanding fits the
        # current-lag model carries the reference period's effect, so *any* other lag (where the reference
        # fit found little) would look better once the effect at the current lag has gone.
        y_alt, X_alt, _, _ = _prewhiten(m, alt)
        window = chk.rolling_window or chk.recent_window
        e_new = _rolling_forecast_errors(y_alt[None], X_alt[None], window, start=d.n - recent_n)[0][d.n - recent_n:]
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


@lru_cache(maxsize=64)
def _norm_ppf(q: float) -> float:
    """The standard normal quantile ``q`` (the same level and lag count recur in every model)."""
    return stats.norm.ppf(q)  # type: ignore[no-any-return]


def _min_lag(c: _Ctx, dr: Any) -> int:
    delay = c.cfg.driver_delay(c.model, dr)
    step = period_length(c.model.frequency)
    q, r = divmod(delay, step)
    return 1 + int(q) + (1 if r else 0)
