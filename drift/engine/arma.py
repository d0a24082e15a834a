"""ARMA models for regression errors and the prewhitening filter that removes them (batched).

A regression with ARMA(p, q) errors, :math:`y_t = x_t'\\beta + u_t`, :math:`\\phi(L) u_t = \\theta(L)
\\varepsilon_t`, becomes one with white errors after filtering every series by
:math:`\\theta(L)^{-1}\\phi(L)`: :math:`\\tilde y_t = \\tilde x_t'\\beta + \\varepsilon_t`. Residual-based
tests (CUSUM, Chow, monitoring) applied to :math:`(\\tilde y, \\tilde X)` then keep their null
distributions (up to the estimation of phi and theta, asymptotically negligible). The error model is
estimated on reference-period residuals, so that a later break does not leak into the filter.

Config strings: ``"ols"`` (no error model), ``"ar(p)"``, ``"arma(p,q)"``; see :func:`parse_error_spec`.

References
----------
Hannan, E. J. and Rissanen, J. (1982). Recursive estimation of mixed autoregressive-moving average
order. Biometrika 69(1), 81-94.
Cochrane, D. and Orcutt, G. H. (1949). Application of least squares regression to relationships
containing auto-correlated error terms. JASA 44(245), 32-61.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray, IntArray

EstimationMethod = Literal["ls", "mle"]

_SPEC = re.compile(r"^\s*(?:(ols)|ar\(\s*(\d+)\s*\)|arma\(\s*(\d+)\s*,\s*(\d+)\s*\))\s*$", re.IGNORECASE)

#: Long-AR order factor of the Hannan-Rissanen first stage: ceil(factor * log(n)) lags, at least p + q.
_HR_LONG_AR_FACTOR = 2.0


def parse_error_spec(spec: str) -> tuple[int, int]:
    """Parse an error-model config string into ``(p, q)``.

    Parameters
    ----------
    spec : ``"ols"`` -> (0, 0); ``"ar(p)"`` -> (p, 0); ``"arma(p,q)"`` -> (p, q); case and spaces ignored.

    Returns
    -------
    (p, q) : non-negative ints.

    Raises
    ------
    TypeError : spec is not a string.
    ValueError : spec is none of the allowed forms.
    """
    if not isinstance(spec, str):
        raise TypeError(f"error spec must be a string such as 'ols', 'ar(1)', 'arma(1,1)', got {spec!r}")
    mt = _SPEC.match(spec)
    if mt is None:
        raise ValueError(f"error spec must be 'ols', 'ar(p)' or 'arma(p,q)', got {spec!r}")
    if mt.group(1):
        return (0, 0)
    if mt.group(2) is not None:
        return (int(mt.group(2)), 0)
    return (int(mt.group(3)), int(mt.group(4)))


def _parse_order(order: Any) -> tuple[int, int]:
    if isinstance(order, str):
        return parse_error_spec(order)
    if isinstance(order, tuple) and len(order) == 2:
        a, b = order
        if isinstance(a, str):
            if a.lower() == "ar" and isinstance(b, (int, np.integer)) and b >= 0:
                return (int(b), 0)
            raise ValueError(f"order must be ('ar', p), (p, q) or a spec string, got {order!r}")
        if isinstance(a, (int, np.integer)) and isinstance(b, (int, np.integer)) and a >= 0 and b >= 0:
            return (int(a), int(b))
    raise ValueError(f"order must be ('ar', p), (p, q) with p, q >= 0, or a spec string, got {order!r}")


@dataclass(frozen=True)
class ErrorModel:
    """Estimated ARMA(p, q) error model for each of M models.

    Convention (statsmodels' sign convention for ``arparams`` / ``maparams``):
    :math:`u_t = \\sum_i \\phi_i u_{t-i} + \\varepsilon_t + \\sum_j \\theta_j \\varepsilon_{t-j}`.

    Attributes
    ----------
    ar : (M, p) phi_1..phi_p.
    ma : (M, q) theta_1..theta_q.
    sigma2 : (M,) innovation variance.
    nobs : (M,) residuals used.
    method : "ls" (batched conditional least squares / Hannan-Rissanen) or "mle" (statsmodels ARIMA).
    squeeze : True when estimated from a single series (accessors return 1-D / scalars).
    """

    ar: FloatArray
    ma: FloatArray
    sigma2: FloatArray
    nobs: IntArray
    method: str
    squeeze: bool = False

    @property
    def order(self) -> tuple[int, int]:
        return (self.ar.shape[1], self.ma.shape[1])

    @property
    def spec(self) -> str:
        p, q = self.order
        return "ols" if p == q == 0 else f"ar({p})" if q == 0 else f"arma({p},{q})"

    def params(self) -> dict[str, Any]:
        """ar, ma and sigma2 squeezed back for a single series."""
        if self.squeeze:
            return {"ar": self.ar[0], "ma": self.ma[0], "sigma2": float(self.sigma2[0])}
        return {"ar": self.ar, "ma": self.ma, "sigma2": self.sigma2}


def _lagmat(e: FloatArray, p: int) -> FloatArray:
    """(M, T, p) matrix of lags 1..p (NaN where not available)."""
    M, T = e.shape
    out = np.full((M, T, p), np.nan)
    for j in range(1, p + 1):
        out[:, j:, j - 1] = e[:, :-j]
    return out


def _batched_ols(yv: FloatArray, Z: FloatArray) -> tuple[FloatArray, FloatArray, IntArray]:
    """OLS of yv (M, T) on Z (M, T, r) over the rows complete in both; returns coef, sigma2, n."""
    ok = np.isfinite(yv) & np.all(np.isfinite(Z), axis=2)
    n = ok.sum(axis=1)
    r = Z.shape[2]
    Zc = np.where(ok[:, :, None], Z, 0.0)
    yc = np.where(ok, yv, 0.0)
    A = np.einsum("mti,mtj->mij", Zc, Zc)
    c = np.einsum("mti,mt->mi", Zc, yc)
    sv = np.linalg.svd(A, compute_uv=False)
    good = (n > r) & (sv[:, -1] > np.maximum(sv[:, 0], 1e-300) * 1e-12)
    A = np.where(good[:, None, None], A, np.eye(r))
    coef = np.linalg.solve(A, c[:, :, None])[:, :, 0]
    res = np.where(ok, yc - np.einsum("mti,mi->mt", Zc, coef), 0.0)
    sigma2 = np.einsum("mt,mt->m", res, res) / np.maximum(n - r, 1)
    coef = np.where(good[:, None], coef, np.nan)
    return coef, np.where(good, sigma2, np.nan), n


def fit_error_model(resid: Any, order: Any, *, method: EstimationMethod = "ls") -> ErrorModel:
    """Estimate an ARMA(p, q) model for (reference-period) regression residuals, batched over models.

    Parameters
    ----------
    resid : (T,) or (M, T) residuals (mean zero by construction; no constant is estimated). NaN allowed:
        rows whose own value or any needed lag is NaN are left out of the estimation.
    order : ``("ar", p)``, ``(p, q)`` or a spec string ``"ols"``, ``"ar(1)"``, ``"arma(1,1)"``.
    method : ``"ls"`` (default): AR(p) by conditional least squares of e_t on e_{t-1..t-p} (for AR(1):
        the closed form sum e_t e_{t-1} / sum e_{t-1}^2), ARMA by the two-stage Hannan-Rissanen
        regression, fully vectorised over models. ``"mle"``: exact Gaussian MLE by statsmodels' ARIMA,
        one model at a time (slow: for small batches and checks only; NaN not allowed).

    Returns
    -------
    ErrorModel

    Raises
    ------
    ValueError : bad order or method, or shapes.
    InsufficientDataError : fewer than ``p + q + 2`` (ls) usable residuals in some model, or, for the
        Hannan-Rissanen stage, too few for the long autoregression.

    Notes
    -----
    Hannan-Rissanen: (1) fit a long AR(r), r = max(p + q, ceil(2 ln n)), and keep its residuals
    :math:`\\hat\\varepsilon_t`; (2) regress :math:`e_t` on :math:`e_{t-1..t-p}` and
    :math:`\\hat\\varepsilon_{t-1..t-q}`. Consistent, close to the MLE for moderate n; not identical.
    ``sigma2`` is the residual variance of the last regression (degrees-of-freedom corrected).
    """
    p, q = _parse_order(order)
    if method not in ("ls", "mle"):
        raise ValueError(f"method must be 'ls' or 'mle', got {method!r}")
    e = np.asarray(resid, dtype=float)
    squeeze = e.ndim == 1
    if e.ndim == 1:
        e = e[None, :]
    if e.ndim != 2:
        raise ValueError(f"resid must be 1-D (T,) or 2-D (M, T), got shape {e.shape}")
    M, T = e.shape
    n_avail = np.isfinite(e).sum(axis=1)
    needed = p + q + 2
    if np.any(n_avail < needed) or T < needed:
        raise InsufficientDataError(f"ARMA({p},{q}) error model", needed, int(n_avail.min()))
    if p == q == 0:
        with np.errstate(invalid="ignore"):
            s2 = np.nansum(e * e, axis=1) / n_avail
        return ErrorModel(np.zeros((M, 0)), np.zeros((M, 0)), s2, n_avail.astype(np.int64), method, squeeze)
    if method == "mle":
        return _fit_mle(e, p, q, squeeze)
    if q == 0:
        coef, s2, n = _batched_ols(e, _lagmat(e, p))
        return ErrorModel(coef, np.zeros((M, 0)), s2, n.astype(np.int64), "ls", squeeze)
    r = max(p + q, int(np.ceil(_HR_LONG_AR_FACTOR * np.log(max(T, 2)))))
    if np.any(n_avail < 2 * r + p + q + 2):
        raise InsufficientDataError(f"ARMA({p},{q}) error model (Hannan-Rissanen)", 2 * r + p + q + 2,
                                    int(n_avail.min()))
    long_coef, _, _ = _batched_ols(e, _lagmat(e, r))
    with np.errstate(invalid="ignore"):
        eps = e - np.einsum("mtr,mr->mt", _lagmat(e, r), long_coef)
    Z = np.concatenate([_lagmat(e, p), _lagmat(eps, q)], axis=2) if p else _lagmat(eps, q)
    coef, s2, n = _batched_ols(e, Z)
    return ErrorModel(coef[:, :p], coef[:, p:], s2, n.astype(np.int64), "ls", squeeze)


def _fit_mle(e: FloatArray, p: int, q: int, squeeze: bool) -> ErrorModel:
    import warnings

    from statsmodels.tsa.arima.model import ARIMA

    if not np.all(np.isfinite(e)):
        raise ValueError("method='mle' needs residuals without NaN; use method='ls'")
    ar = np.empty((e.shape[0], p))
    ma = np.empty((e.shape[0], q))
    s2 = np.empty(e.shape[0])
    for i in range(e.shape[0]):  # per-model fit (not per observation): slow path, documented
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = ARIMA(e[i], order=(p, 0, q), trend="n").fit()
        ar[i], ma[i], s2[i] = res.arparams, res.maparams, res.params[-1]
    return ErrorModel(ar, ma, s2, np.full(e.shape[0], e.shape[1], dtype=np.int64), "mle", squeeze)


def _filter(v: FloatArray, ar: FloatArray, ma: FloatArray) -> FloatArray:
    """Apply theta(L)^{-1} phi(L) along axis 1 of v (M, T, c) with per-model coefficients."""
    M, T, _ = v.shape
    p, q = ar.shape[1], ma.shape[1]
    out = v.copy()
    for j in range(1, p + 1):  # AR part: quasi-difference; first p rows have no full lag -> NaN
        out[:, j:] -= ar[:, j - 1, None, None] * v[:, :-j]
    out[:, :p] = np.nan
    if q == 0:
        return out
    # Inverse MA recursion a_t = out_t - sum_j theta_j a_{t-j}, zero pre-sample values. A missing value
    # gives a missing output and contributes zero to later rows (it does not poison the rest).
    a = np.full_like(out, np.nan)
    zero = np.zeros((M, out.shape[2]))
    for t in range(p, T):
        acc = out[:, t].copy()
        for j in range(1, q + 1):
            prev = a[:, t - j] if t - j >= p else zero
            acc -= ma[:, j - 1, None] * np.where(np.isfinite(prev), prev, 0.0)
        a[:, t] = acc
    return a


def prewhiten(y: Any, X: Any, model: ErrorModel) -> tuple[FloatArray, FloatArray]:
    """Filter target and regressors by the estimated error model: :math:`\\theta(L)^{-1}\\phi(L)`.

    Parameters
    ----------
    y : (T,) or (M, T).
    X : (T, k) or (M, T, k) (a 2-D X with 2-D y is shared and broadcast).
    model : :class:`ErrorModel` with M models (or 1, broadcast to all).

    Returns
    -------
    (y_tilde, X_tilde) : same shapes as the inputs (X broadcast to (M, T, k) for a batch). The first p
        rows are NaN (no full lag), so a reference sample of m rows keeps m - p usable rows.

    Raises
    ------
    TypeError : model is not an ErrorModel.
    ValueError : shapes do not match.

    Notes
    -----
    AR part: :math:`y_t - \\phi_1 y_{t-1} - \\dots - \\phi_p y_{t-p}` (Cochrane-Orcutt quasi-difference).
    MA part: the recursion :math:`a_t = v_t - \\sum_j \\theta_j a_{t-j}` with zero pre-sample values
    (conditional filter); the same recursion as ``scipy.signal.lfilter([1], [1, theta_1, ...])`` but
    with per-model coefficients, which lfilter cannot take, hence a loop over time vectorised over models.
    A NaN in a series makes the p following AR outputs NaN; in the MA recursion a NaN output counts as
    zero for later rows. An intercept column becomes the constant ``1 - sum(phi)`` (then divided by
    ``1 + sum(theta)`` in the long run): keep it as a regressor.
    """
    if not isinstance(model, ErrorModel):
        raise TypeError(f"model must be an ErrorModel from fit_error_model, got {type(model).__name__}")
    yv = np.asarray(y, dtype=float)
    Xv = np.asarray(X, dtype=float)
    squeeze = yv.ndim == 1
    if squeeze:
        if Xv.ndim == 1:
            Xv = Xv[:, None]
        yv, Xv = yv[None], Xv[None]
    elif Xv.ndim == 2:
        Xv = np.broadcast_to(Xv, (yv.shape[0], *Xv.shape))
    if yv.ndim != 2 or Xv.ndim != 3 or Xv.shape[:2] != yv.shape:
        raise ValueError(f"y (M, T) and X (M, T, k) shapes do not match: {yv.shape} vs {Xv.shape}")
    M = yv.shape[0]
    if model.ar.shape[0] not in (1, M):
        raise ValueError(f"model holds {model.ar.shape[0]} error models but y has {M} series")
    ar = np.broadcast_to(model.ar, (M, model.ar.shape[1]))
    ma = np.broadcast_to(model.ma, (M, model.ma.shape[1]))
    with np.errstate(invalid="ignore"):
        both = _filter(np.concatenate([yv[:, :, None], Xv], axis=2), ar, ma)
    yt, Xt = both[:, :, 0], both[:, :, 1:]
    if squeeze:
        return yt[0], Xt[0]
    return yt, Xt
