"""The model that is really deployed: production coefficients given in the config (``deployed:``).

Without them drift monitors its own re-estimate of the model. A team's production model was often fitted
elsewhere (a regression with ARMA errors in a forecasting package, a regularised fit, another window), so
its coefficients differ. With ``deployed:`` drift replays *those* coefficients at each forecast origin:
the as-deployed one-step error of period t is exactly

    e_t = y_t − x_t' b                         (no error model), or
    e_t = [θ(L)^{-1} φ(L)] (y − X b)_t         (with ``errors: {ar: [...], ma: [...]}``),

where x_t is drift's design row (:func:`drift.panel.build_design`: the drivers as known at the origin)
and the ARMA filter is the conditional one of :func:`drift.engine.prewhiten` (zero pre-sample values,
started at the first period of the reference: its first p values are missing and the MA part settles
within a few periods). These errors feed the check's accuracy block, its forecast chart and Trigg's
tracking signal; the per-driver ``coef_reference`` and the reference lines of the coefficient charts
show the deployed values. The monitors still watch drift's own recursive fit: they test whether the
*relationship* moved, and they are calibrated for an estimated reference fit.

Column names (the keys of ``deployed.coefficients``), in design order:

- ``const``; ``trend`` (``preprocess.trend: linear``), the column ``t / n_ref``: t counts periods from the
  reference start (0 at the first period), n_ref is the number of reference periods;
- ``sin1``, ``cos1``, ``sin2``, ... (``method: fourier``, ``harmonics`` pairs): ``sin(2π j t / s)``,
  ``cos(2π j t / s)`` with s the season length in periods (``auto``: 365.25/7 weekly, 12 monthly, 4
  quarterly, 7 daily); ``sin{j}`` is absent when 2j = s;
- ``season1`` ... (``method: dummies``): 1 in the periods at that calendar position (position 0 is the
  base);
- each driver by its series name (its lag is the config's);
- each target lag as ``<target>[L<j>]``.

Every column of the model needs a coefficient (give 0 for a term the production model does not have); a
name that is not a column is a config error. The coefficients belong to one monitoring epoch (``epoch``,
default 1: the config as written); after ``drift accept`` starts a new epoch they no longer apply until
the config gives the new production coefficients with that epoch's number.
"""

from __future__ import annotations

import difflib
from typing import Any

import numpy as np

from drift.config import ModelConfig

#: the column names drift gives to deterministic terms (documented in the module docstring)
DETERMINISTIC = ("const", "trend", "sin<j>", "cos<j>", "season<j>")


def expected_terms(model: ModelConfig) -> tuple[list[str], list[str]]:
    """(names that must have a coefficient, names that may) for the model's design.

    Season dummies are optional: a calendar position never seen in the reference period has no column.
    """
    from drift.panel import _season_length

    must = ["const"]
    may: list[str] = []
    pp = model.preprocess
    if pp.trend == "linear":
        must.append("trend")
    s = _season_length(model)
    if s is not None and pp.method == "fourier":
        for j in range(1, min(pp.harmonics, int(np.floor(s / 2))) + 1):
            if 2 * j != s:
                must.append(f"sin{j}")
            must.append(f"cos{j}")
    elif s is not None and pp.method == "dummies":
        if pp.season == "auto":
            si = {"W": 52, "M": 12, "Q": 4, "D": 7}[model.frequency]
        else:
            si = int(pp.season)
        may += [f"season{j}" for j in range(1, si)]
    must += [d.series for d in model.drivers]
    must += [f"{model.target}[L{j}]" for j in model.target_lags]
    return must, may


def check_terms(model: ModelConfig) -> str | None:
    """What is wrong with the names of ``model.deployed.coefficients`` (None when nothing)."""
    if model.deployed is None or model.deployed.coefficients is None:
        return None
    must, may = expected_terms(model)
    given = list(model.deployed.coefficients)
    unknown = [g for g in given if g not in must and g not in may]
    if unknown:
        hints = []
        for u in unknown:
            close = difflib.get_close_matches(u, must + may, n=1, cutoff=0.6)
            hints.append(f"'{u}'" + (f" (did you mean '{close[0]}'?)" if close else ""))
        return (f"{', '.join(hints)} {'is not a column' if len(unknown) == 1 else 'are not columns'} of model "
                f"'{model.name}'; its columns: {', '.join(must + may)}")
    missing = [m for m in must if m not in model.deployed.coefficients]
    if missing:
        return (f"no deployed coefficient for {', '.join(missing)} of model '{model.name}': every column needs "
                "one (give 0 for a term the production model does not have)")
    return None


def coefficient_vector(model: ModelConfig, epoch: int, design: Any) -> np.ndarray | None:
    """The deployed coefficients in the order of ``design.columns``, when the config gives them for
    ``epoch``; None otherwise. A driver column is looked up by its series, others by their column name."""
    dep = model.deployed
    if dep is None or dep.epoch != epoch or dep.coefficients is None:
        return None
    by_col = {j: s for s, j in design.driver_columns.items()}
    names = [by_col.get(j, c) for j, c in enumerate(design.columns)]
    missing = [n for n in names if n not in dep.coefficients]
    if missing:  # the config check guarantees the fixed columns; a driver dropped by an epoch cannot be here
        raise ValueError(f"model '{model.name}': no deployed coefficient for {', '.join(missing)}")
    return np.array([dep.coefficients[n] for n in names], dtype=float)


def as_deployed_errors(model: ModelConfig, y: np.ndarray, X: np.ndarray, coef: np.ndarray) -> np.ndarray:
    """One-step errors of the deployed model replayed with its coefficients: ``y − X b``, filtered by the
    deployed ARMA error model when the config gives one (module docstring). NaN where a value is missing."""
    with np.errstate(invalid="ignore"):
        u = np.asarray(y, float) - np.asarray(X, float) @ np.asarray(coef, float)
    errs = model.deployed.errors if model.deployed is not None else None
    if errs is None or not (errs.ar or errs.ma):
        return u
    from drift.engine import prewhiten
    from drift.engine.arma import ErrorModel

    em = ErrorModel(ar=np.array([errs.ar], float).reshape(1, -1), ma=np.array([errs.ma], float).reshape(1, -1),
                    sigma2=np.array([np.nan]), nobs=np.array([0]), method="given", squeeze=True)
    e, _ = prewhiten(u, np.zeros((u.size, 1)), em)
    return np.asarray(e, float)


# ------------------------------------------------------------------------------------------------------------
# the model-agnostic path: the production system's logged forecasts
#
# For any model, even a black box: the production forecasts of the target are ingested as a series whose
# rows are forecasts of a period issued at an origin (a source with ``issued_column``), and the error of
# period t is y_t − f_t, f_t the latest forecast of t issued by the origin of an h-step forecast (the start
# of period t − h + 1), exactly as the production system logged it.
#
# An h-step forecast error is autocorrelated up to lag h − 1 (consecutive errors share h − 1 shocks; an
# optimal forecast's errors are MA(h − 1)). Every statistic below allows for it:
#
# - bias over the recent window: the mean error with a Newey–West long-run variance over h − 1 lags
#   (Bartlett weights), t test with n − 1 degrees of freedom, two-sided;
# - sequential monitors of the error mean and of the error scale, after the baseline, on the
#   *non-overlapping* errors (every h-th period, counted from the first period of the model's reference):
#   errors h periods apart share no shock, so they are independent under MA(h − 1) and drift's monitoring
#   tables apply as they are, whatever the MA coefficients. tools/size_forecast_monitoring.py measures the
#   false-alarm rates (2000 replications, each monitor at 2.5%, horizon 2): 1.3–2.9% per monitor for
#   h = 1, 2, 4, 8 and 52–156 baseline periods. Prewhitening with an MA(h − 1) filter estimated on the
#   baseline, tried instead, ran oversized (h = 4: 5.4% for the scale monitor with 52 baseline periods;
#   h = 8: 10% and 20%), because the filter is poorly estimated from a short baseline. The mean monitor is the
#   recursive-residual monitor on the errors (a constant as the only regressor); the scale monitor is the same
#   monitor on the square roots of the absolute errors around the baseline mean, a transformation that makes
#   them nearly normal (Hawkins 1981, from memory), so a change in spread moves their mean. Each runs at
#   ``check.level / 2`` over the monitoring horizon; they raise ``watch`` only (the refit rule and its
#   false-alarm guarantee stay with the relationship monitors);
# - Trigg's tracking signal of all the errors (alpha 0.1, its 1% limit for independent errors: for h > 1 it
#   fires more often than 1%), reported for information.
#
# The baseline is the model's reference period when the log covers at least MIN_BASELINE non-overlapping
# errors of it, else the first max(MIN_BASELINE · h, check.recent_window) logged periods; monitoring starts
# after it.

#: fewest non-overlapping logged errors the baseline needs: the monitors' scale is estimated on them
MIN_BASELINE = 20


def forecast_horizon(model: ModelConfig) -> int:
    """The horizon of the logged production forecasts (``deployed.forecasts.horizon`` or the model's)."""
    f = model.deployed.forecasts if model.deployed is not None else None
    return int(f.horizon or model.horizon) if f is not None else int(model.horizon)


def logged_forecast_errors(model: ModelConfig, periods: Any, obs: Any) -> tuple[np.ndarray, np.ndarray] | None:
    """(forecasts, errors) of the logged production forecasts on the target periods ``periods``: the
    latest forecast of each period issued by its h-step origin, and actual − forecast (the latest value of
    the target). None when the model has no forecast series. NaN where either is missing."""
    fs = model.forecast_series
    if fs is None:
        return None
    from drift.panel import latest_values, shift_periods, values_as_of

    h = forecast_horizon(model)
    origins = shift_periods(periods, model.frequency, h - 1).tz_localize("UTC")
    f = values_as_of(obs[obs["series"] == fs], periods, origins, "forecast")
    y = latest_values(obs[obs["series"] == model.target], periods)
    with np.errstate(invalid="ignore"):
        return f, y - f


def baseline_rows(err: np.ndarray, n_ref: int, recent_window: int, h: int) -> tuple[int, int] | None:
    """(first, end) rows of the baseline of one model's logged errors (``end`` = first monitored row), or
    None when the log is too short for one (module comments above)."""
    ok = np.flatnonzero(np.isfinite(err))
    if ok.size == 0:
        return None
    on_grid = ok[ok % h == 0]
    if int((on_grid < n_ref).sum()) >= MIN_BASELINE:
        return int(ok[0]), int(n_ref)
    span = max(MIN_BASELINE * h, recent_window)
    end = int(ok[0]) + span
    if int(((on_grid >= ok[0]) & (on_grid < end)).sum()) < MIN_BASELINE or end >= len(err):
        return None
    return int(ok[0]), end


def _nw_mean_test(E: np.ndarray, lags: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Per row of E (M, T), NaN = missing: mean, Newey–West t statistic (Bartlett, ``lags``), two-sided
    p-value from t(n − 1), and n."""
    from scipy import stats as _st

    ok = np.isfinite(E)
    n = ok.sum(axis=1).astype(float)
    mean = np.where(ok, E, 0.0).sum(axis=1) / np.maximum(n, 1)
    dc = np.where(ok, E - mean[:, None], 0.0)
    T = E.shape[1]
    lrv = np.einsum("mt,mt->m", dc, dc) / np.maximum(n, 1)
    for j in range(1, lags + 1):
        w = 1.0 - j / (lags + 1.0)
        lrv = lrv + 2.0 * w * np.einsum("mt,mt->m", dc[:, j:], dc[:, : T - j]) / np.maximum(n, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = mean / np.sqrt(lrv / n)
        p = 2.0 * _st.t.sf(np.abs(t), df=np.maximum(n - 1.0, 1.0))
    return mean, t, p, n


def monitor_forecast_errors(E: np.ndarray, first: np.ndarray, m: np.ndarray, h: int, *, level: float,
                            horizon: float, detector: str, recent_window: int,
                            grid: np.ndarray | None = None) -> list[dict[str, Any]]:
    """The statistics of the module comments for a batch of models with the same horizon ``h``.

    Parameters
    ----------
    E : (M, T) logged forecast errors, NaN where missing (models may be NaN-padded on the left).
    first, m : (M,) first baseline row and first monitored row of each model.
    h : the forecasts' horizon; the monitors use the rows ``r`` with ``(r - grid) % h == 0``.
    level : false-alarm probability of each of the two monitors over the horizon.
    grid : (M,) row of each model's first reference period (default 0): anchors the non-overlapping rows,
        so they stay the same from one check to the next.

    Returns
    -------
    one dict per model: ``bias`` (recent window), ``monitors`` (mean and scale: statistic, pvalue,
    ``alarm_row`` in E's columns or -1, level, nobs), ``tracking`` (Trigg: last value, ``first_row`` where
    its standing crossing began or -1, limit), ``baseline_mean``, ``baseline_mad``, ``used`` (words on the rows monitored).
    """
    from drift import engine

    M, T = E.shape
    grid = np.zeros(M, int) if grid is None else np.asarray(grid, int)
    rows = np.arange(T)[None, :]
    base = (rows >= first[:, None]) & (rows < m[:, None])
    mu0 = np.nanmean(np.where(base, E, np.nan), axis=1)
    out: list[dict[str, Any]] = [{"used": "every period" if h == 1 else
                                  f"every {h}th period (non-overlapping {h}-step errors)"} for _ in range(M)]
    # the non-overlapping rows of each model, right-aligned in a compact batch
    keep = (rows >= first[:, None]) & ((rows - grid[:, None]) % h == 0)
    counts = keep.sum(axis=1)
    W = int(counts.max()) if M else 0
    cols = np.full((M, W), -1)
    Es = np.full((M, W), np.nan)
    ms = np.zeros(M, int)
    for i in range(M):  # one pass per model to gather its rows (not per observation)
        r = np.flatnonzero(keep[i])
        cols[i, W - r.size:] = r
        Es[i, W - r.size:] = E[i, r]
        ms[i] = W - r.size + int((r < m[i]).sum())
    monitored = (ms < W) & (np.isfinite(np.where(np.arange(W)[None, :] >= ms[:, None], Es, np.nan)).sum(axis=1) >= 1)
    if monitored.any():
        idx = np.flatnonzero(monitored)
        ones = np.where(np.isfinite(Es[idx]), 1.0, np.nan)[:, :, None]
        with np.errstate(invalid="ignore"):
            spread = np.sqrt(np.abs(Es[idx] - mu0[idx, None]))
        for name, z in (("forecast-mean", Es[idx]), ("forecast-scale", spread)):
            r = engine.monitor(z, ones, ms[idx], horizon=horizon, detector=detector, level=level)
            for k, i in enumerate(idx):
                ai = int(np.atleast_1d(r.alarm_index)[k])
                out[i].setdefault("monitors", []).append({
                    "test": name, "statistic": float(np.atleast_1d(r.statistic)[k]),
                    "pvalue": float(np.atleast_1d(r.pvalue)[k]), "alarm_row": int(cols[i, ai]) if ai >= 0 else -1,
                    "level": level, "nobs": int(np.atleast_1d(r.nobs)[k])})
    # bias over the recent window (monitored rows only)
    recent = (rows >= m[:, None]) & (rows >= T - recent_window)
    mean, t, p, n = _nw_mean_test(np.where(recent, E, np.nan), h - 1)
    # Trigg's tracking signal on the monitored errors, started at the baseline MAD
    mad0 = np.nanmean(np.abs(np.where(base, E - mu0[:, None], np.nan)), axis=1)
    mon_e = np.where(rows >= m[:, None], E, np.nan)
    usable = np.isfinite(mad0) & (mad0 > 0) & (np.isfinite(mon_e).sum(axis=1) >= 2)
    if usable.any():
        k = np.flatnonzero(usable)
        tr = engine.trigg_signal(mon_e[k], 0.1, level=0.01, mad0=mad0[k])
        sig = np.atleast_2d(tr.signal)
        fs = np.atleast_1d(tr.standing_since())
        for j, i in enumerate(k):
            last = np.flatnonzero(np.isfinite(sig[j]))
            out[i]["tracking"] = {"statistic": float(sig[j, last[-1]]) if last.size else None,
                                  "first_row": int(fs[j]), "limit": float(tr.limit), "level": 0.01}
    for i in range(M):
        out[i]["bias"] = {"mean": float(mean[i]) if n[i] else None, "t": float(t[i]) if n[i] > 1 else None,
                          "pvalue": float(p[i]) if n[i] > 1 else None, "n": int(n[i]), "lags": h - 1}
        out[i]["baseline_mean"] = float(mu0[i])
        out[i]["baseline_mad"] = float(mad0[i]) if np.isfinite(mad0[i]) else None
    return out
