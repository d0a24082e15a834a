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
Kendall, M. G. (1954). Note on bias in the estimation of autocorrelation. Biometrika 41(3/4), 403-404.
Marriott, F. H. C. and Pope, J. A. (1954). Bias in the estimation of autocorrelations. Biometrika
41(3/4), 390-402.
Sawa, T. (1978). The exact moments of the least squares estimator for the autoregressive model.
J. Econometrics 8(2), 159-172.
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
#: Bias-corrected AR(1) coefficients are kept inside (-PHI_MAX, PHI_MAX) (a stationary, invertible filter).
PHI_MAX = 0.99
#: Fixed-point iterations solving E[phi-hat | phi] = phi-hat_observed (the map is a contraction with slope
#: O(k/n); four steps reach 1e-6 for n >= 50).
_BIAS_ITERATIONS = 6
#: Central-difference step for the slope dg/dphi of the expected estimate (g is smooth, O(1/n) curvature).
_SLOPE_STEP = 1e-3


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
    cov : (M, p + q, p + q) estimated sampling covariance of (ar, ma), or None (unknown, e.g. an error
        model built by hand). Used by :meth:`log_scale_variance`.
    bias_correction : what was done to ``ar``: "none", "kendall" (AR(1), constant-mean formula) or
        "design" (AR(1), exact-design first-order correction); see :func:`fit_error_model`.
    ar_uncorrected : (M, p) the least-squares estimates before the bias correction (None if none).
    """

    ar: FloatArray
    ma: FloatArray
    sigma2: FloatArray
    nobs: IntArray
    method: str
    squeeze: bool = False
    cov: FloatArray | None = None
    bias_correction: str = "none"
    ar_uncorrected: FloatArray | None = None

    @property
    def order(self) -> tuple[int, int]:
        return (self.ar.shape[1], self.ma.shape[1])

    @property
    def spec(self) -> str:
        p, q = self.order
        return "ols" if p == q == 0 else f"ar({p})" if q == 0 else f"arma({p},{q})"

    def log_scale_variance(self) -> FloatArray:
        """(M,) sampling variance of the log long-run factor ``log[(1 - sum phi) / (1 + sum theta)]``.

        Prewhitening with estimated coefficients leaves the monitored partial sums multiplied by
        :math:`\\hat f / f`, :math:`f = (1 - \\sum\\phi_i)/(1 + \\sum\\theta_j)` (the filter's gain at
        frequency zero), so this is the extra variance the estimated filter adds to the log of the
        monitoring scale. Delta method with :attr:`cov`; zeros when ``cov`` is None (filter treated as
        known), NaN for degenerate models.

        Notes
        -----
        With :math:`g = -(1/(1-\\sum\\phi), \\dots, 1/(1+\\sum\\theta), \\dots)`, the variance is
        :math:`g' \\Sigma g`. For AR(1) it is :math:`\\mathrm{var}(\\hat\\phi)/(1-\\phi)^2
        \\approx (1+\\phi)/((1-\\phi) n)`: large for a persistent error.
        """
        M = self.ar.shape[0]
        if self.cov is None or self.cov.shape[1] == 0:
            return np.zeros(M)
        with np.errstate(invalid="ignore", divide="ignore"):
            g = np.concatenate([np.broadcast_to(-1.0 / (1.0 - self.ar.sum(axis=1, keepdims=True)), self.ar.shape),
                                np.broadcast_to(-1.0 / (1.0 + self.ma.sum(axis=1, keepdims=True)), self.ma.shape)],
                               axis=1)
            return np.einsum("mi,mij,mj->m", g, self.cov, g)

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


def _batched_ols(yv: FloatArray, Z: FloatArray) -> tuple[FloatArray, FloatArray, IntArray, FloatArray]:
    """OLS of yv (M, T) on Z (M, T, r) over the rows complete in both; returns coef, sigma2, n, cov."""
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
    cov = np.linalg.inv(A) * sigma2[:, None, None]
    cov = np.where(good[:, None, None], cov, np.nan)
    return coef, np.where(good, sigma2, np.nan), n, cov


def fit_error_model(resid: Any, order: Any, *, method: EstimationMethod = "ls", X: Any = None,
                    bias_correction: bool = True) -> ErrorModel:
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
    X : optional (T, k) or (M, T, k) regressors of the regression whose OLS residuals ``resid`` are (the
        reference rows). Used only by the AR(1) bias correction, which then accounts for the exact design;
        strongly recommended: trend and seasonal regressors bias phi-hat far more than a constant does.
    bias_correction : AR(1) with ``method="ls"`` only (default True): return the approximately
        mean-unbiased coefficient (see Notes). Other orders and ``"mle"`` are never corrected.

    Returns
    -------
    ErrorModel
        ``cov`` holds the estimation covariance (least squares ``s^2 (Z'Z)^{-1}``; for AR(1) corrected,
        ``(1 - phi^2) / (n - k)``; None for ``"mle"``), ``bias_correction`` what was done and
        ``ar_uncorrected`` the least-squares value.

    Raises
    ------
    ValueError : bad order or method, or shapes.
    TypeError : bias_correction is not a bool.
    InsufficientDataError : fewer than ``p + q + 2`` (ls) usable residuals in some model, or, for the
        Hannan-Rissanen stage, too few for the long autoregression.

    Notes
    -----
    Hannan-Rissanen: (1) fit a long AR(r), r = max(p + q, ceil(2 ln n)), and keep its residuals
    :math:`\\hat\\varepsilon_t`; (2) regress :math:`e_t` on :math:`e_{t-1..t-p}` and
    :math:`\\hat\\varepsilon_{t-1..t-q}`. Consistent, close to the MLE for moderate n; not identical.
    ``sigma2`` is the residual variance of the last regression (degrees-of-freedom corrected).

    AR(1) bias correction. The least-squares :math:`\\hat\\phi = e'Ae / e'Be` (A: lag-one cross products,
    B: lagged squares) computed from OLS residuals :math:`e = Mu`, :math:`M = I - Q Q'`, is biased
    towards zero by O(k/n), and the bias grows with the smoothness of the regressors: each smooth
    regressor (constant, trend, low-frequency Fourier term) costs about :math:`(1+\\phi)/n`, each white
    one about :math:`\\phi/n`. With weekly data, n = 156 and ten regressors the bias is about -0.17 at
    phi = 0.5, enough to double the false-alarm rate of a monitor run on the prewhitened data. The
    expected estimate is approximated to O(1/n) by

    .. math:: g(\\phi) = \\frac{\\mathrm{tr}(MAM\\Sigma_\\phi)}{\\mathrm{tr}(MBM\\Sigma_\\phi)}
              - \\frac{2\\phi}{n},

    the ratio of expectations (which carries the regression's O(k/n) term, computed exactly for the
    design from Q, :math:`\\Sigma_\\phi Q` and k x k products) plus the known-mean term
    :math:`-2\\phi/n` of the ratio's curvature (Marriott & Pope 1954). For a constant alone it reduces to
    the classical :math:`-(1+3\\phi)/n` (Kendall 1954; Marriott & Pope 1954), which is what is used when
    X is not given (``bias_correction="kendall"``: ``(n phi-hat + 1)/(n - 3)``). The corrected
    :math:`\\tilde\\phi` solves :math:`g(\\tilde\\phi) = \\hat\\phi` by fixed-point iteration
    (``bias_correction="design"``) and is clipped to (-PHI_MAX, PHI_MAX). Its variance is taken as
    :math:`(1-\\tilde\\phi^2)/(n-k)` (asymptotic :math:`(1-\\phi^2)/n`, with the degrees of freedom the
    regression leaves; Sawa 1978 gives the exact moments for the no-regressor case).
    """
    p, q = _parse_order(order)
    if method not in ("ls", "mle"):
        raise ValueError(f"method must be 'ls' or 'mle', got {method!r}")
    if not isinstance(bias_correction, (bool, np.bool_)):
        raise TypeError(f"bias_correction must be True or False, got {bias_correction!r}")
    e = np.asarray(resid, dtype=float)
    squeeze = e.ndim == 1
    if e.ndim == 1:
        e = e[None, :]
    if e.ndim != 2:
        raise ValueError(f"resid must be 1-D (T,) or 2-D (M, T), got shape {e.shape}")
    M, T = e.shape
    Xb = _as_design(X, M, T)
    n_avail = np.isfinite(e).sum(axis=1)
    needed = p + q + 2
    if np.any(n_avail < needed) or T < needed:
        raise InsufficientDataError(f"ARMA({p},{q}) error model", needed, int(n_avail.min()))
    if p == q == 0:
        with np.errstate(invalid="ignore"):
            s2 = np.nansum(e * e, axis=1) / n_avail
        return ErrorModel(np.zeros((M, 0)), np.zeros((M, 0)), s2, n_avail.astype(np.int64), method, squeeze,
                          cov=np.zeros((M, 0, 0)))
    if method == "mle":
        return _fit_mle(e, p, q, squeeze)
    if q == 0:
        coef, s2, n, cov = _batched_ols(e, _lagmat(e, p))
        if p == 1 and bias_correction:
            return _corrected_ar1(e, coef, s2, n, Xb, squeeze)
        return ErrorModel(coef, np.zeros((M, 0)), s2, n.astype(np.int64), "ls", squeeze, cov=cov)
    r = max(p + q, int(np.ceil(_HR_LONG_AR_FACTOR * np.log(max(T, 2)))))
    if np.any(n_avail < 2 * r + p + q + 2):
        raise InsufficientDataError(f"ARMA({p},{q}) error model (Hannan-Rissanen)", 2 * r + p + q + 2,
                                    int(n_avail.min()))
    long_coef, _, _, _ = _batched_ols(e, _lagmat(e, r))
    with np.errstate(invalid="ignore"):
        eps = e - np.einsum("mtr,mr->mt", _lagmat(e, r), long_coef)
    Z = np.concatenate([_lagmat(e, p), _lagmat(eps, q)], axis=2) if p else _lagmat(eps, q)
    coef, s2, n, cov = _batched_ols(e, Z)
    return ErrorModel(coef[:, :p], coef[:, p:], s2, n.astype(np.int64), "ls", squeeze, cov=cov)


def _as_design(X: Any, M: int, T: int) -> FloatArray | None:
    if X is None:
        return None
    Xv = np.asarray(X, dtype=float)
    if Xv.ndim == 1:
        Xv = Xv[:, None]
    if Xv.ndim == 2:
        Xv = np.broadcast_to(Xv, (M, *Xv.shape))
    if Xv.ndim != 3 or Xv.shape[:2] != (M, T):
        raise ValueError(f"X must be (T, k) or (M, T, k) matching resid {(M, T)}, got shape {Xv.shape}")
    return Xv


def _ar1_cov_apply(v: FloatArray, phi: FloatArray) -> FloatArray:
    """:math:`\\Sigma_\\phi v` along axis 1 of v (M, T, c), :math:`\\Sigma_{ts} = \\phi^{|t-s|}` (unit variance).

    :math:`\\sum_s \\phi^{|t-s|} v_s = f_t + b_t - v_t` with the forward recursion
    :math:`f_t = v_t + \\phi f_{t-1}` and the backward one :math:`b_t = v_t + \\phi b_{t+1}`: one loop over
    time, vectorised over models and columns.
    """
    T = v.shape[1]
    ph = phi[:, None]
    f = np.empty_like(v)
    b = np.empty_like(v)
    f[:, 0] = v[:, 0]
    for t in range(1, T):
        f[:, t] = v[:, t] + ph * f[:, t - 1]
    b[:, T - 1] = v[:, T - 1]
    for t in range(T - 2, -1, -1):
        b[:, t] = v[:, t] + ph * b[:, t + 1]
    return f + b - v


def _expected_ar1_ls(phi: FloatArray, Q: FloatArray, pair: np.ndarray) -> FloatArray:
    """First-order expectation g(phi) of the AR(1) least-squares estimate from OLS residuals (see
    :func:`fit_error_model`, Notes). Q: (M, T, k) orthonormal basis of the design (zero rows where the
    residual is missing); pair: (M, T) True at t when e_t and e_{t-1} both enter the estimate."""
    n_p = pair.sum(axis=1).astype(float)
    SQ = _ar1_cov_apply(Q, phi)
    w = pair[:, 1:, None].astype(float)
    q_now, q_lag = Q[:, 1:] * w, Q[:, :-1] * w
    # tr(Q'A Sigma Q) with A = (1/2) sum_pairs (E_{t,t-1} + E_{t-1,t}); tr(Q'B Sigma Q), B = sum_pairs E_{t-1,t-1}
    tr_a_s = 0.5 * (np.einsum("mtk,mtk->m", q_now, SQ[:, :-1]) + np.einsum("mtk,mtk->m", q_lag, SQ[:, 1:]))
    tr_b_s = np.einsum("mtk,mtk->m", q_lag, SQ[:, :-1])
    cross = np.matmul(q_now.transpose(0, 2, 1), q_lag)
    qaq = 0.5 * (cross + cross.transpose(0, 2, 1))
    qbq = np.matmul(q_lag.transpose(0, 2, 1), q_lag)
    qsq = np.matmul(Q.transpose(0, 2, 1), SQ)
    num = n_p * phi - 2.0 * tr_a_s + np.einsum("mij,mji->m", qaq, qsq)
    den = n_p - 2.0 * tr_b_s + np.einsum("mij,mji->m", qbq, qsq)
    return num / den - 2.0 * phi / n_p


def _var_ar1_ls(phi: FloatArray, g: FloatArray, Q: FloatArray, pair: np.ndarray,
                chunk: int = 256) -> FloatArray:
    """First-order (delta-method) variance of the AR(1) least-squares estimate from OLS residuals.

    :math:`\\mathrm{var}(\\hat\\phi) \\approx 2\\,\\mathrm{tr}\\{(G S)^2\\} / \\mathrm{tr}(B S)^2` with
    :math:`S = M\\Sigma_\\phi M`, :math:`G = A - g(\\phi) B` (the variance of the linearised estimating
    equation :math:`e'Ae - g\\,e'Be`, a Gaussian quadratic form). Low rank: :math:`S = \\Sigma - ZKZ'` with
    :math:`Z = [Q, \\Sigma Q]`, :math:`K = [[-Q'\\Sigma Q, I], [I, 0]]`, so
    :math:`\\mathrm{tr}(GSGS) = \\mathrm{tr}(G\\Sigma G\\Sigma) - 2\\,\\mathrm{tr}(K (GZ)'\\Sigma(GZ))
    + \\mathrm{tr}(K Z'GZ K Z'GZ)` and :math:`\\mathrm{tr}(BS) = n - \\mathrm{tr}(K Z'BZ)`; only the first
    term needs (T, T) arrays (elementwise, in chunks of models).
    """
    M, T, k = Q.shape
    pw = pair.astype(float)
    nxt = np.zeros_like(pw)  # pair_{i+1}: row i enters as the lagged value
    nxt[:, :-1] = pw[:, 1:]

    def apply_g(v: FloatArray) -> FloatArray:  # G v along axis 1 of v (M, T, c)
        out = -g[:, None, None] * nxt[:, :, None] * v
        out[:, 1:] += 0.5 * pw[:, 1:, None] * v[:, :-1]
        out[:, :-1] += 0.5 * nxt[:, :-1, None] * v[:, 1:]
        return out

    SQ = _ar1_cov_apply(Q, phi)
    Z = np.concatenate([Q, SQ], axis=2)
    K = np.zeros((M, 2 * k, 2 * k))
    K[:, :k, :k] = -np.matmul(Q.transpose(0, 2, 1), SQ)
    K[:, :k, k:] = np.eye(k)
    K[:, k:, :k] = np.eye(k)
    GZ = apply_g(Z)
    W = np.matmul(Z.transpose(0, 2, 1), GZ)
    V = np.matmul(GZ.transpose(0, 2, 1), _ar1_cov_apply(GZ, phi))
    ZBZ = np.matmul(Z.transpose(0, 2, 1), nxt[:, :, None] * Z)
    KW = np.matmul(K, W)
    low = -2.0 * np.einsum("mij,mji->m", K, V) + np.einsum("mij,mji->m", KW, KW)
    den = pw.sum(axis=1) - np.einsum("mij,mji->m", K, ZBZ)
    lag = np.abs(np.arange(T)[:, None] - np.arange(T)[None, :])
    main = np.empty(M)
    for lo in range(0, M, chunk):  # chunks of models bound the (T, T) memory; each is vectorised
        sl = slice(lo, min(M, lo + chunk))
        powers = np.cumprod(np.concatenate([np.ones((phi[sl].size, 1)),
                                            np.repeat(phi[sl, None], T - 1, axis=1)], axis=1), axis=1)
        sig = powers[:, lag]  # (c, T, T) Toeplitz phi^|t-s|
        GS = -g[sl, None, None] * nxt[sl][:, :, None] * sig
        GS[:, 1:] += 0.5 * pw[sl][:, 1:, None] * sig[:, :-1]
        GS[:, :-1] += 0.5 * nxt[sl][:, :-1, None] * sig[:, 1:]
        main[sl] = (GS * GS.transpose(0, 2, 1)).sum(axis=(1, 2))
    return 2.0 * (main + low) / den**2


def _corrected_ar1(e: FloatArray, coef: FloatArray, s2: FloatArray, n: IntArray, X: FloatArray | None,
                   squeeze: bool) -> ErrorModel:
    """Bias-corrected AR(1) (see :func:`fit_error_model`, Notes), batched."""
    M = e.shape[0]
    phi_ls = coef[:, 0]
    n_p = n.astype(float)
    fin = np.isfinite(e)
    pair = np.zeros_like(fin)
    pair[:, 1:] = fin[:, 1:] & fin[:, :-1]
    good = np.isfinite(phi_ls)
    phi0 = np.where(good, phi_ls, 0.0)
    if X is None:
        k = np.ones(M)
        phi = (n_p * phi0 + 1.0) / np.maximum(n_p - 3.0, 1.0)  # solves phi - (1 + 3 phi)/n = phi-hat
        kind = "kendall"
    else:
        rows = fin & np.all(np.isfinite(X), axis=2)
        Xz = np.where(rows[:, :, None], X, 0.0)
        U, sv, _ = np.linalg.svd(Xz, full_matrices=False)
        keep = sv > np.maximum(sv[:, :1], 1e-300) * (max(Xz.shape[1:]) * np.finfo(float).eps)
        Q = U * keep[:, None, :]
        k = keep.sum(axis=1).astype(float)
        phi = phi0.copy()
        for _ in range(_BIAS_ITERATIONS):
            phi = np.clip(phi0 - (_expected_ar1_ls(phi, Q, pair) - phi), -PHI_MAX, PHI_MAX)
        kind = "design"
        g = _expected_ar1_ls(phi, Q, pair)
        slope = (_expected_ar1_ls(np.clip(phi + _SLOPE_STEP, -PHI_MAX, PHI_MAX), Q, pair)
                 - _expected_ar1_ls(np.clip(phi - _SLOPE_STEP, -PHI_MAX, PHI_MAX), Q, pair)) / (2 * _SLOPE_STEP)
        with np.errstate(invalid="ignore", divide="ignore"):
            var = _var_ar1_ls(phi, g, Q, pair) / slope**2
    phi = np.clip(phi, -PHI_MAX, PHI_MAX)
    if X is None:
        var = (1.0 - phi**2) / np.maximum(n_p - k, 1.0) * (n_p / np.maximum(n_p - 3.0, 1.0)) ** 2
    phi = np.where(good, phi, np.nan)
    cov = np.where(good, var, np.nan)[:, None, None]
    return ErrorModel(phi[:, None], np.zeros((M, 0)), s2, n.astype(np.int64), "ls", squeeze, cov=cov,
                      bias_correction=kind, ar_uncorrected=coef)


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
