"""Is a driver worth keeping? Out-of-sample forecast-accuracy comparisons (batched over models).

- :func:`diebold_mariano`: equal predictive accuracy of two forecasts (non-nested or as a descriptive
  check), with the Harvey, Leybourne & Newbold (1997) small-sample correction.
- :func:`clark_west`: the model *without* the driver (restricted) against the model *with* it
  (unrestricted, nesting it): the adjusted MSPE difference of Clark & West (2007). Prefer this for
  "does the driver help": plain DM is undersized for nested models (under the null the larger model's
  extra estimation noise makes its MSPE larger, so DM centres below zero).

Both are NaN-tolerant: each model uses its pairwise-complete periods (both errors / all forecasts present).

References
----------
Diebold, F. X. and Mariano, R. S. (1995). Comparing predictive accuracy. JBES 13(3), 253-263.
Harvey, D., Leybourne, S. and Newbold, P. (1997). Testing the equality of prediction mean squared errors.
International Journal of Forecasting 13(2), 281-291, eq. (9).
Clark, T. E. and West, K. D. (2007). Approximately normal tests for equal predictive accuracy in nested
models. Journal of Econometrics 138(1), 291-311.
Newey, W. K. and West, K. D. (1987). A simple, positive semi-definite, heteroskedasticity and
autocorrelation consistent covariance matrix. Econometrica 55(3), 703-708.
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
from scipy import stats

from drift.engine.results import TestResult
from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray

Loss = Literal["squared", "absolute"]
Alternative = Literal["two-sided", "less", "greater"]
LEVELS = (0.10, 0.05, 0.01)
#: one-sided standard normal critical values of the Clark-West test, by level
_CW_CRITICAL = {lvl: float(stats.norm.ppf(1.0 - lvl)) for lvl in LEVELS}


def _batch(*arrays: Any) -> tuple[list[FloatArray], bool]:
    arrs = [np.asarray(a, dtype=float) for a in arrays]
    shape = arrs[0].shape
    for a in arrs[1:]:
        if a.shape != shape:
            raise ValueError(f"inputs must have the same shape, got {shape} and {a.shape}")
    if arrs[0].ndim == 1:
        return [a[None, :] for a in arrs], True
    if arrs[0].ndim != 2:
        raise ValueError(f"inputs must be 1-D (T,) or 2-D (M, T), got shape {shape}")
    return arrs, False


def _check_h(h: Any) -> int:
    if not isinstance(h, (int, np.integer)) or isinstance(h, bool) or h < 1:
        raise ValueError(f"h (forecast horizon) must be a positive integer, got {h!r}")
    return int(h)


def _autocov(x: FloatArray, ok: np.ndarray, lags: int) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Mean, count and autocovariances gamma_0..gamma_lags over the valid entries (divisor n)."""
    n = ok.sum(axis=1).astype(float)
    xs = np.where(ok, x, 0.0)
    mean = xs.sum(axis=1) / np.maximum(n, 1)
    dc = np.where(ok, x - mean[:, None], 0.0)
    T = x.shape[1]
    gam = np.stack([np.einsum("mt,mt->m", dc[:, j:], dc[:, : T - j]) / np.maximum(n, 1)
                    for j in range(lags + 1)], axis=1)
    return mean, n, gam


def _squeeze(v: Any, squeeze: bool) -> Any:
    a = np.asarray(v)
    if a.ndim == 0:
        return a.item()
    return a[0].item() if squeeze else a


def diebold_mariano(e1: Any, e2: Any, *, h: int = 1, loss: Loss = "squared", hln: bool = True,
                    alternative: Alternative = "two-sided") -> TestResult:
    """Diebold-Mariano test of equal predictive accuracy, with the HLN correction.

    Parameters
    ----------
    e1, e2 : (T,) or (M, T) forecast errors of forecast 1 and forecast 2 for the same targets.
    h : forecast horizon (the loss differential is treated as MA(h-1)).
    loss : "squared" or "absolute".
    hln : apply the Harvey, Leybourne & Newbold (1997) correction and use t(n-1); else N(0, 1).
    alternative : "two-sided"; "greater" = forecast 2 is more accurate (mean loss differential
        d = L(e1) - L(e2) > 0); "less" = forecast 1 is more accurate.

    Returns
    -------
    TestResult
        statistic (DM or DM*), pvalue, critical_values (two-sided or one-sided per ``alternative``),
        nobs (pairwise-complete periods), params (h, loss, hln, mean_loss_diff, long_run_variance).

    Raises
    ------
    ValueError : bad h, loss, alternative, shapes.
    InsufficientDataError : fewer than h + 2 complete pairs in some model.

    Notes
    -----
    :math:`d_t = L(e_{1t}) - L(e_{2t})`, :math:`\\bar d`, :math:`\\hat\\gamma_j = n^{-1}\\sum (d_t-\\bar d)
    (d_{t-j}-\\bar d)`, :math:`\\hat V = \\hat\\gamma_0 + 2\\sum_{j=1}^{h-1}\\hat\\gamma_j`,
    :math:`DM = \\bar d / \\sqrt{\\hat V / n}`. HLN (eq. 9):
    :math:`DM^* = DM\\sqrt{(n + 1 - 2h + h(h-1)/n)/n}` against t(n - 1). If :math:`\\hat V \\le 0` (possible
    for h > 1) the Bartlett-weighted (Newey-West) variance with h - 1 lags is used instead, recorded in
    params. With missing values the autocovariances skip pairs where either value is missing.
    """
    h = _check_h(h)
    if loss not in ("squared", "absolute"):
        raise ValueError(f"loss must be 'squared' or 'absolute', got {loss!r}")
    if alternative not in ("two-sided", "less", "greater"):
        raise ValueError(f"alternative must be 'two-sided', 'less' or 'greater', got {alternative!r}")
    (a, b), squeeze = _batch(e1, e2)
    if np.any(np.isinf(a)) or np.any(np.isinf(b)):
        raise ValueError("errors must not contain infinities (use NaN for missing values)")
    d = a * a - b * b if loss == "squared" else np.abs(a) - np.abs(b)
    ok = np.isfinite(d)
    n_ok = ok.sum(axis=1)
    if np.any(n_ok < h + 2):
        raise InsufficientDataError("Diebold-Mariano test", h + 2, int(n_ok.min()))
    mean, n, gam = _autocov(d, ok, h - 1)
    V = gam[:, 0] + 2.0 * gam[:, 1:].sum(axis=1)
    w = 1.0 - np.arange(1, h) / h  # Bartlett weights with h - 1 lags
    V_nw = gam[:, 0] + 2.0 * (gam[:, 1:] * w).sum(axis=1)
    used_nw = V <= 0
    V = np.where(used_nw, V_nw, V)
    with np.errstate(divide="ignore", invalid="ignore"):
        dm = mean / np.sqrt(V / n)
    # Identical forecasts (d == 0 everywhere): no evidence either way.
    dm = np.where((V <= 0) & (mean == 0), 0.0, dm)
    if hln:
        factor = np.sqrt((n + 1.0 - 2.0 * h + h * (h - 1.0) / n) / n)
        stat = dm * factor
        dist: Any = stats.t(df=n - 1.0)
    else:
        stat = dm
        dist = stats.norm()
    if alternative == "two-sided":
        pval = 2.0 * dist.sf(np.abs(stat))
        cvs = {lvl: _squeeze(dist.ppf(1.0 - lvl / 2.0), squeeze) for lvl in LEVELS}
    elif alternative == "greater":
        pval = dist.sf(stat)
        cvs = {lvl: _squeeze(dist.ppf(1.0 - lvl), squeeze) for lvl in LEVELS}
    else:
        pval = dist.cdf(stat)
        cvs = {lvl: _squeeze(dist.ppf(lvl), squeeze) for lvl in LEVELS}
    return TestResult(
        statistic=_squeeze(stat, squeeze), pvalue=_squeeze(pval, squeeze), critical_values=cvs,
        nobs=_squeeze(n.astype(np.int64), squeeze),
        null="equal expected loss of the two forecasts",
        alternative={"two-sided": "expected losses differ", "greater": "forecast 2 is more accurate",
                     "less": "forecast 1 is more accurate"}[alternative],
        method="Diebold-Mariano" + (" with HLN correction (Harvey, Leybourne & Newbold 1997)" if hln else ""),
        params={"h": h, "loss": loss, "hln": hln, "alternative": alternative,
                "mean_loss_diff": _squeeze(mean, squeeze), "long_run_variance": _squeeze(V, squeeze),
                "newey_west_fallback": _squeeze(used_nw, squeeze)},
    )


def clark_west(y: Any, f_restricted: Any, f_unrestricted: Any, *, h: int = 1) -> TestResult:
    """Clark & West (2007) adjusted-MSPE test: does the larger (nesting) model forecast better?

    Parameters
    ----------
    y : (T,) or (M, T) realised values over the out-of-sample span.
    f_restricted : forecasts of the model without the driver (model 1, nested).
    f_unrestricted : forecasts of the model with the driver (model 2).
    h : forecast horizon; the variance uses Newey-West with h - 1 lags.

    Returns
    -------
    TestResult
        statistic CW, one-sided pvalue ``1 - Phi(CW)``, critical_values (normal quantiles
        1.282 / 1.645 / 2.326), nobs P (complete periods), params (h, mspe_restricted,
        mspe_unrestricted, adjusted_mspe_diff).

    Raises
    ------
    ValueError : bad h or shapes.
    InsufficientDataError : fewer than h + 2 complete periods in some model.

    Notes
    -----
    :math:`\\hat f_t = (y_t - \\hat y_{1t})^2 - [(y_t - \\hat y_{2t})^2 - (\\hat y_{1t} - \\hat y_{2t})^2]`,
    :math:`CW = \\sqrt{P}\\,\\bar f / \\sqrt{\\hat V}`, :math:`\\hat V = \\hat\\gamma_0 + 2\\sum_{j=1}^{h-1}
    (1 - j/h)\\hat\\gamma_j` (Newey-West, Bartlett weights, h - 1 lags). Reject "no gain from the driver"
    for large CW (one-sided). If all forecasts coincide, CW = 0.
    """
    h = _check_h(h)
    (yy, f1, f2), squeeze = _batch(y, f_restricted, f_unrestricted)
    if any(np.any(np.isinf(a)) for a in (yy, f1, f2)):
        raise ValueError("inputs must not contain infinities (use NaN for missing values)")
    e1 = yy - f1
    e2 = yy - f2
    fhat = e1 * e1 - (e2 * e2 - (f1 - f2) ** 2)
    ok = np.isfinite(fhat)
    n_ok = ok.sum(axis=1)
    if np.any(n_ok < h + 2):
        raise InsufficientDataError("Clark-West test", h + 2, int(n_ok.min()))
    mean, n, gam = _autocov(fhat, ok, h - 1)
    w = 1.0 - np.arange(1, h) / h
    V = gam[:, 0] + 2.0 * (gam[:, 1:] * w).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        cw = np.sqrt(n) * mean / np.sqrt(V)
    cw = np.where((V <= 0) & (mean == 0), 0.0, cw)
    pval = stats.norm.sf(cw)
    with np.errstate(invalid="ignore"):
        mspe1 = np.nanmean(np.where(ok, e1 * e1, np.nan), axis=1)
        mspe2 = np.nanmean(np.where(ok, e2 * e2, np.nan), axis=1)
    return TestResult(
        statistic=_squeeze(cw, squeeze), pvalue=_squeeze(pval, squeeze),
        critical_values=dict(_CW_CRITICAL),
        nobs=_squeeze(n.astype(np.int64), squeeze),
        null="the driver adds nothing: equal population MSPE of the nested and the larger model",
        alternative="the model with the driver has the smaller MSPE (one-sided)",
        method="Clark-West adjusted MSPE (Clark & West 2007)",
        params={"h": h, "mspe_restricted": _squeeze(mspe1, squeeze),
                "mspe_unrestricted": _squeeze(mspe2, squeeze), "adjusted_mspe_diff": _squeeze(mean, squeeze)},
    )
