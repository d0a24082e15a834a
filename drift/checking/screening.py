"""Screening: a batch of models' designs → their monitors, tests and charts, in one batched pass.

Takes a batch of contexts (same number of regressors, built by :mod:`drift.checking.designs`); runs, over
the batch at once, the recursive fit, the monitor family (CUSUM, abrupt-shift and variance monitors of the
residuals, per driver its effect monitor), Trigg's tracking signal, the retrospective CUSUM family and the
rolling coefficients; gives each model its ``tests``, ``alarms``, ``accuracy``, charts (forecast, monitor,
CUSUM, coefficients) and the figures later stages reuse (``charts['_fe']``, ``'_ref_coef'``,
``'_roll_coef'``), then its relationship actions (:mod:`drift.checking.actions`).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from drift import engine
from drift.checking.accuracy import _accuracy, _accuracy_block, _seasonal_naive
from drift.checking.actions import _relationship_actions, _sentence_start, _test_words
from drift.checking.context import _Ctx, _num, log
from drift.engine.tables import monitoring as _mon_table
from drift.exceptions import DriftError, InsufficientDataError
from drift.replay import h_step_errors
from drift.verdicts import Z95

#: smallest scale degrees of freedom the tables cover
MIN_DOF = float(_mon_table.DOF[0])


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
    # the check reads coefficients, not their errors; and only those at the end of each model's reference
    # period, unless an h-step replay needs a model's whole coefficient path
    whole_path = any(c.model.horizon > 1 for c in group)
    rf = engine.recursive_fit(Y, Xs, coef_se=False, coef_at=None if whole_path else m - 1)
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
        got = _monitor(Y, Xs, m, levels=lvl, **kw)  # the alarm level and the warning level, one process
        mons.append(None if got is None else got[0])
        warns.append(None if got is None else got[1])
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
        # standard errors only for the drivers' columns: the coefficient charts draw those intervals alone
        drawn = sorted({j for c in group for j in c.design.driver_columns.values()})
        roll = engine.rolling_coefficients(Y, Xs, window, se_columns=drawn)
    _per_model(group, Y, off, m, rf, specs, mons, warns, levels, trigg, cus, cusq, enough, retro_dates,
               roll, window)


def _per_model(group: list[_Ctx], Y: np.ndarray, off: np.ndarray, m: np.ndarray, rf: Any,
               specs: list[tuple[str, str, int | None]], mons: list[Any], warns: list[Any],
               levels: list[tuple[float, float]], trigg: Any, cus: Any, cusq: Any, enough: np.ndarray,
               retro_dates: dict[str, np.ndarray], roll: Any, window: int) -> None:
    """Each model's share of the batched results: its tests, alarms, accuracy and charts, then its
    relationship actions. Every array the charts draw is rounded and turned into JSON values once for the
    batch (:func:`_rows`); the per-model loop only slices them."""
    chk = group[0].cfg.check
    M, T = Y.shape
    cols = np.arange(T)[None, :]
    mon = cols >= m[:, None]  # the monitored rows (padded coordinates)
    dates = _Dates()
    # the forecast chart: actual, as-deployed forecast, seasonal-naive baseline on the monitored rows
    actual = np.full((M, T), np.nan)
    base = np.full((M, T), np.nan)
    for i, c in enumerate(group):
        actual[i, off[i]:] = c.design.y
        base[i, off[i]:] = _seasonal_naive(c.design.y, c.design.season_length)
    # as-deployed one-step forecasts of the target. With AR errors the one-step error of y equals that of
    # the prewhitened y~ (y_t - x_t'b - phi (y_{t-1} - x_{t-1}'b) = y~_t - x~_t'b), so one formula
    fc_rows = _rows(np.where(mon, actual - rf.forecast_error, np.nan))
    base_rows = _rows(np.where(mon, base, np.nan))
    actual_rows = _rows(actual)
    coef_all = np.atleast_3d(rf.coef)
    # the monitors' figures as Python numbers, once
    mon_vals = [None if r is None or rw is None else (
        _ints(r.alarm_index), _ints(r.horizon_end), _floats(r.statistic), _floats(r.pvalue),
        _ints(rw.alarm_index), _floats(rw.statistic)) for r, rw in zip(mons, warns)]
    trigg_last: list[int] = []
    trigg_first: list[int] = []
    trigg_sig = np.empty((0, 0))
    if trigg is not None:
        trigg_sig = np.atleast_2d(trigg.signal)
        fin = np.isfinite(trigg_sig)  # the last finite value of each row: the signal as of the check
        trigg_last = np.where(fin.any(axis=1), T - 1 - np.argmax(fin[:, ::-1], axis=1), -1).tolist()
        trigg_first = _ints(np.atleast_1d(trigg.standing_since()))  # the first check of today's crossing
    retro = None
    if cus is not None and cusq is not None:
        retro = []
        for name, rc in (("cusum", cus), ("cusum-squares", cusq)):
            cv = rc.critical_values.get(0.05)
            crit = (None if cv is None else _floats(cv) if np.ndim(cv) else [_num(cv)] * M)
            retro.append((name, retro_dates[name].tolist(), _floats(rc.statistic), _floats(rc.pvalue), crit))
        cus_path = _rows(np.atleast_2d(cus.path))
        cus_bounds = {f"{lvl:.2f}": _rows(np.atleast_2d(cus.bounds[lvl])) for lvl in (0.05, 0.01)}
    if roll is not None:
        # regressor-major views (k, M, T) of the rolling fit; only the driver columns are drawn
        used = sorted({j for c in group for j in c.design.driver_columns.values()})
        ck = np.atleast_3d(roll.coef).transpose(2, 0, 1)[used]
        sk = np.atleast_3d(roll.se).transpose(2, 0, 1)[used]
        pos = {j: p for p, j in enumerate(used)}
        roll_rows = (_rows(ck), _rows(ck - Z95 * sk), _rows(ck + Z95 * sk))
    pers = [dates.of(c.design.periods) for c in group]
    mon_charts = _monitor_charts(group, off, specs, mons, levels, mon_vals, pers)
    for i, c in enumerate(group):
        o, d = int(off[i]), c.design
        sl = slice(o, None)
        per = pers[i]
        c.charts["periods"] = list(per)
        c.charts["monitor_start_index"] = int(d.n_ref)
        fe = rf.forecast_error[i, sl]
        mon_mask = mon[i, sl]
        c.charts["forecast"] = {"actual": actual_rows[i, sl].tolist(), "forecast": fc_rows[i, sl].tolist(),
                                "baseline": base_rows[i, sl].tolist()}
        c.accuracy = _accuracy_block(d, fe, mon_mask, chk.recent_window, dates=per)
        ref_scale = (c.accuracy["scale"] or {}).get("mae")
        if c.model.horizon > 1:
            eh = h_step_errors(c.cfg, c.model, c.obs, c.as_of, d, coef_all[i, sl], c.model.horizon)
            c.accuracy["h_step"] = {"horizon": c.model.horizon,
                                    **_accuracy(np.where(mon_mask, eh, np.nan)[-chk.recent_window:], ref_scale)}
        # monitoring: every date is the period at which a check run then would have signalled (the
        # monitors are sequential: each row's statistic and boundary use rows up to it only)
        alarm_idx = None
        lapsed = False
        drivers_i = list(d.driver_columns)
        for (name, _det, j), vals, (lv, wl) in zip(specs, mon_vals, levels):
            if (j is not None and j >= len(drivers_i)) or vals is None:
                continue
            ai_l, hend_l, stat_l, pv_l, wi_l, wstat_l = vals
            extra = {} if j is None else {"driver": drivers_i[j]}
            ai, h_end, stat = ai_l[i], hend_l[i], stat_l[i]
            beyond = {"beyond_horizon": True} if ai >= h_end else {}
            # a crossing after the horizon has no calibrated p-value: the monitor's p-value measures its path
            # within the horizon (which did not cross), the statistic its whole path (which did)
            pv = None if beyond else _num(pv_l[i])
            date_ = per[ai - o] if ai >= 0 else None
            c.tests.append({"test": name, **extra, "statistic": _num(stat), "pvalue": pv, "threshold": 1.0,
                            "level": _num(round(lv, 6)), "date": date_, **beyond})
            if ai >= 0:
                c.alarms.append({"test": name, **extra, "date": date_, "statistic": _num(round(stat, 4)),
                                 "threshold": 1.0, "level": _num(round(lv, 6)), **beyond})
                if alarm_idx is None or ai - o < alarm_idx:
                    alarm_idx, lapsed = ai - o, bool(beyond)
            wi = wi_l[i]
            if ai < 0 and wi >= 0:
                c.alarms.append({"test": name, **extra, "date": per[wi - o],
                                 "statistic": _num(round(wstat_l[i], 4)),
                                 "threshold": 1.0, "level": _num(round(wl, 6)), "warning": True,
                                 **({"beyond_horizon": True} if wi >= h_end else {})})
        if mon_charts[i] is not None:
            c.charts[mon_charts[i][0]] = mon_charts[i][1]
        if trigg is not None:
            last = trigg_last[i]
            fs = trigg_first[i] - o
            if last >= o:
                c.tests.append({"test": "tracking-trigg", "statistic": _num(round(float(trigg_sig[i, last]), 4)),
                                "pvalue": None, "threshold": _num(trigg.limit), "level": 0.01,
                                "date": per[fs] if fs >= 0 else None})
        # retrospective CUSUM family: reported in ``tests`` and charted, not alarms: re-run on every check
        # at 5%, their crossings pile up on stable models (their sequential versions are the family's CUSUM
        # and variance monitors). Their date is the first check of the standing crossing (first_signal).
        if retro is not None and enough[i]:
            retro_date: dict[str, str | None] = {}
            for name, rdates, rstat, rpv, rcrit in retro:
                fc_idx = rdates[i]
                retro_date[name] = per[fc_idx - o] if fc_idx >= 0 else None
                c.tests.append({"test": name, "statistic": _num(rstat[i]), "pvalue": _num(rpv[i]),
                                "threshold": None if rcrit is None else _num(rcrit[i]), "level": 0.05,
                                "date": retro_date[name]})
            # the retrospective CUSUM (kept for the chart when no monitor ran): its own crossing date only
            c.charts["cusum"] = {
                "path": cus_path[i, sl].tolist(),
                "bounds": {lvl: b[i, sl].tolist() for lvl, b in cus_bounds.items()},
                "alarm_date": retro_date["cusum"]}
        # rolling coefficients
        if roll is not None:
            c.charts["_roll_coef"] = np.atleast_3d(roll.coef)[i, sl]  # the full model's rolling fit, reused
            c.charts["coefficients"] = {}
            ref_coef = coef_all[i, o + d.n_ref - 1]
            for s, j in d.driver_columns.items():
                p = pos[j]
                c.charts["coefficients"][s] = {
                    "coef": roll_rows[0][p, i, sl].tolist(), "lower": roll_rows[1][p, i, sl].tolist(),
                    "upper": roll_rows[2][p, i, sl].tolist(), "reference": _num(ref_coef[j]),
                    "window": int(window)}
        c.charts["_ref_coef"] = coef_all[i, o + d.n_ref - 1]
        c.charts["_fe"] = fe
        _relationship_actions(c, alarm_idx, lapsed)


class _Dates:
    """ISO dates of a design's periods, computed once per distinct set of periods in the batch (the
    models of a batch mostly share their periods)."""

    def __init__(self) -> None:
        self._seen: dict[tuple[bytes, str], list[str]] = {}

    def of(self, periods: Any) -> list[str]:
        idx = periods if isinstance(periods, pd.DatetimeIndex) else pd.DatetimeIndex(periods)
        key = (idx.asi8.tobytes(), str(idx.tz))
        got = self._seen.get(key)
        if got is None:
            wall = idx if idx.tz is None else idx.tz_localize(None)  # the periods' own calendar dates
            got = np.datetime_as_string(wall.to_numpy().astype("datetime64[D]"), unit="D").tolist()
            self._seen[key] = got
        return got


def _rows(a: np.ndarray) -> np.ndarray:
    """``_list`` for a whole array at once: values rounded to 6 decimals as Python floats, NaN/inf as None
    (an object array; a row's ``.tolist()`` is what ``_list`` gives for it)."""
    x = np.asarray(a, float)
    out = np.round(x, 6).astype(object)
    out[~np.isfinite(x)] = None
    return out


def _ints(a: Any) -> list[int]:
    return np.atleast_1d(np.asarray(a)).astype(np.int64).tolist()  # type: ignore[no-any-return]


def _floats(a: Any) -> list[float]:
    return np.atleast_1d(np.asarray(a, float)).tolist()  # type: ignore[no-any-return]


def _monitor(Y: np.ndarray, X: np.ndarray, m: np.ndarray, **kw: Any) -> Any:
    """engine.monitor_levels (one result per level of ``levels``), or None when no model of the batch can
    be monitored yet (e.g. no data after the reference period): the batch then simply has no monitoring
    evidence."""
    try:
        return engine.monitor_levels(Y, X, m, **kw)
    except InsufficientDataError as exc:
        log.info("monitoring skipped for a batch of %d model(s): %s", Y.shape[0], exc)
        return None


def _chosen_monitor(specs: list[tuple[str, str, int | None]], mons: list[Any], vals: list[Any] | None, i: int,
                    n_drivers: int) -> int | None:
    """Which monitor model ``i`` of the batch draws: the first to cross (smallest alarm index), else the one
    nearest its boundary (largest statistic); None when no monitor has a path for it. ``vals``: each
    monitor's (alarm indices, horizon ends, statistics, ...) as Python lists, when the caller has them."""
    best: tuple[tuple[int, float], int] | None = None
    for s, ((_name, _det, j), r) in enumerate(zip(specs, mons)):
        if r is None or (j is not None and j >= n_drivers) or getattr(r, "path", None) is None:
            continue
        if vals is not None and vals[s] is not None:
            ai, stat = vals[s][0][i], vals[s][2][i]
        else:
            ai = int(np.atleast_1d(r.alarm_index)[i])
            stat = float(np.atleast_1d(r.statistic)[i])
        key = (0, float(ai)) if ai >= 0 else (1, -stat if math.isfinite(stat) else math.inf)
        if best is None or key < best[0]:
            best = (key, s)
    return None if best is None else best[1]


def _monitor_charts(group: list[_Ctx], off: np.ndarray, specs: list[tuple[str, str, int | None]],
                    mons: list[Any], levels: list[tuple[float, float]], vals: list[Any],
                    dates: list[list[str]]) -> list[tuple[str, Any] | None]:
    """The monitor chart of every model of the batch: each model's (charts key, value), None when it draws no
    monitor. The chart is the monitor that raised the alarm (the first to cross), else the one nearest its
    boundary (:func:`_chosen_monitor`): its path and its own boundary as the monitor computed them (read
    from its result, never recomputed), the period where that path crossed that boundary, and the last
    period within its horizon. The paths and boundaries of the models that draw the same monitor are
    rounded and turned into JSON values together (:func:`_rows`)."""
    out: list[tuple[str, Any] | None] = [None] * len(group)
    chosen: dict[int, list[int]] = {}
    for i, c in enumerate(group):
        s = _chosen_monitor(specs, mons, vals, i, len(c.design.driver_columns))
        if s is not None:
            chosen.setdefault(s, []).append(i)
    for s, idx in chosen.items():
        (name, _det, j), r, (lv, _wl) = specs[s], mons[s], levels[s]
        path = np.atleast_2d(np.asarray(r.path, float))
        bound = np.atleast_2d(np.asarray(r.boundary, float))
        ai_all = np.atleast_1d(r.alarm_index)
        he_all = np.atleast_1d(r.horizon_end)
        pr, br = _rows(path[idx]), _rows(bound[idx])
        level = _num(round(float(lv), 6))
        for p, i in enumerate(idx):
            c, o = group[i], int(off[i])
            drivers_i = list(c.design.driver_columns)
            n = c.design.n
            if path.shape[1] != o + n or bound.shape[1] != o + n:
                out[i] = ("monitor_note", f"the {name} path does not line up with the periods; not drawn")
                continue
            ai = int(ai_all[i])
            per = dates[i]
            out[i] = ("monitor", {
                "test": name, **({"driver": drivers_i[j]} if j is not None else {}),
                "title": _sentence_start(_test_words(name, drivers_i[j] if j is not None else None)),
                "path": pr[p, o:].tolist(), "boundary": br[p, o:].tolist(), "level": level,
                "alarm_date": per[ai - o] if ai >= o else None, "horizon_end": _horizon_end(he_all[i], o, per)})
    return out


def _horizon_end(end: Any, o: int, per: list[str]) -> str | None:
    """The last period within the monitoring horizon (``end``: the first column of the monitor's input
    beyond it, ``o`` the model's offset in it), or None when the horizon covers the model's data: the date
    a lapsed horizon's ``watch`` says it "ended on"."""
    k = int(end) - o
    return per[k - 1] if 1 <= k < len(per) else None
