"""Lag profiles: at which lag does a driver lead the target, and has that lag moved? (batched)

The cross-correlation of target and driver at lag k (driver leading the target by k periods) is

.. math:: r_k = \\frac{n^{-1}\\sum_t (y_t - \\bar y)(x_{t-k} - \\bar x)}{s_y s_x}, \\qquad k = 0..K,

with the divisor n and full-sample means and standard deviations (Box & Jenkins). It equals
``statsmodels.tsa.stattools.ccf(y, x, adjusted=False)[k]`` (whose k-th value is the covariance of
``y[t+k]`` and ``x[t]``).

Raw cross-correlations of autocorrelated series are spuriously wide and smeared across lags. With
``prewhiten=True`` (Box-Jenkins practice) an AR(p) model is fitted to the *driver* (p by AIC up to
``max_ar``, per model), and the same filter :math:`\\hat\\phi(L)` is applied to both the driver and the
target; the driver's filtered series is then (close to) white, and under the null of no
cross-correlation each :math:`r_k` is approximately N(0, 1/n) (Bartlett 1946), hence the band
:math:`\\pm z_{1-\\alpha/2}/\\sqrt{n}`.

References
----------
Box, G. E. P. and Jenkins, G. M. (1976). Time Series Analysis: Forecasting and Control, rev. ed.,
Holden-Day, ch. 11 (prewhitening and the cross-correlation function).
Bartlett, M. S. (1946). On the theoretical specification and sampling properties of autocorrelated time
series. JRSS Supplement 8(1), 27-41.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy import stats

from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray, IntArray


@dataclass(frozen=True)
class LagProfile:
    """Cross-correlation profile of target and driver for lags 0..max_lag (batched).

    Attributes
    ----------
    ccf : (M, max_lag + 1) r_k, driver leading target by k.
    band : (M,) half-width z_{1 - level/2} / sqrt(n) of the band under no cross-correlation.
    nobs : (M,) observations used (after prewhitening removes the first p).
    peak_lag : (M,) lag with the largest |r_k|.
    peak_significant : (M,) |r_peak| > band.
    ar_order : (M,) AR order of the prewhitening filter (0 without prewhitening).
    level : two-sided level of the band.
    squeeze : single-model input.
    """

    ccf: Any
    band: Any
    nobs: Any
    peak_lag: Any
    peak_significant: Any
    ar_order: Any
    level: float
    squeeze: bool = False

    def significant(self) -> np.ndarray:
        """(M, max_lag + 1) bool: lags whose |r_k| exceeds the band."""
        return np.abs(self.ccf) > np.asarray(self.band)[..., None]


@dataclass(frozen=True)
class ProfileShift:
    """How the peak of a lag profile moved between a reference and a recent window.

    Attributes
    ----------
    reference_lag, recent_lag : (M,) peak lags.
    moved : (M,) True when the recent peak is significant and at a different lag than the reference peak.
    lost : (M,) True when the reference peak was significant but the recent profile is no longer
        significant at that lag (the driver stopped leading at its old lag).
    reference_significant, recent_significant : (M,) peak significance in each window.
    """

    reference_lag: Any
    recent_lag: Any
    moved: Any
    lost: Any
    reference_significant: Any
    recent_significant: Any


def _lagged(v: FloatArray, j: int) -> FloatArray:
    out = np.full_like(v, np.nan)
    if j == 0:
        return v.copy()
    out[:, j:] = v[:, :-j]
    return out


def _fit_ar_aic(x: FloatArray, max_ar: int) -> tuple[FloatArray, IntArray]:
    """AR(p) fits by least squares for p = 0..max_ar on a common sample; choose p by AIC per model."""
    M, T = x.shape
    xc = x - np.nanmean(x, axis=1, keepdims=True)
    # lags[m, t, j - 1] = xc[m, t - j] (NaN before the start): windows of the series padded by max_ar NaN
    pad = np.concatenate([np.full((M, max_ar), np.nan), xc], axis=1)
    Z = sliding_window_view(pad, max_ar, axis=1)[:, :T, ::-1].copy() if max_ar else np.zeros((M, T, 0))
    # common sample for every order: x_t and its max_ar lags all known (no missing value among x_{t-max_ar..t})
    missing = np.concatenate([np.zeros((M, 1), dtype=np.int64), np.cumsum(~np.isfinite(pad), axis=1)], axis=1)
    ok = missing[:, max_ar + 1:] - missing[:, :T] == 0
    n = ok.sum(axis=1)
    yv = np.where(ok, xc, 0.0)
    Z[~ok] = 0.0
    best_aic = np.full(M, np.inf)
    best = np.zeros((M, max_ar))
    order = np.zeros(M, dtype=np.int64)
    yy = np.einsum("mt,mt->m", yv, yv)
    # the cross-products of every order at once (order p uses the leading p x p block): matrix products
    Zt = Z.transpose(0, 2, 1)
    G = Zt @ Z
    cz = (Zt @ yv[:, :, None])[:, :, 0]
    for p in range(max_ar + 1):
        if p == 0:
            coef = np.zeros((M, 0))
            rss = yy
        else:
            Zp = Z[:, :, :p]
            A = G[:, :p, :p] + np.eye(p) * 1e-12 * yy[:, None, None]
            coef = _solve_normal(A, cz[:, :p])
            r = yv - (Zp @ coef[:, :, None])[:, :, 0]
            rss = np.einsum("mt,mt->m", r, r)
        with np.errstate(divide="ignore"):
            aic = n * np.log(np.maximum(rss, 1e-300) / np.maximum(n, 1)) + 2.0 * p
        better = aic < best_aic - 1e-12
        best_aic = np.where(better, aic, best_aic)
        order = np.where(better, p, order)
        padded = np.zeros((M, max_ar))
        padded[:, :p] = coef
        best = np.where(better[:, None], padded, best)
    return best, order


def _solve_normal(A: FloatArray, c: FloatArray) -> FloatArray:
    """(M, p) ``pinv(A[m]) @ c[m]`` for symmetric positive semi-definite (M, p, p) ``A``: a model whose
    Cholesky factor is well conditioned (its smallest diagonal entry at least 1e-3 of its largest) by a
    linear solve, the others by the pseudo-inverse (a constant or all-zero series gives A = 0 and
    coefficients 0, not an error)."""
    good = (np.diagonal(A, axis1=1, axis2=2) > 0).all(axis=1) & np.isfinite(A).all(axis=(1, 2))
    coef = np.zeros(c.shape)
    if good.any():
        try:
            d = np.diagonal(np.linalg.cholesky(A[good]), axis1=1, axis2=2)
            good[good] = (d.min(axis=1) >= 1e-3 * d.max(axis=1)) & (d.min(axis=1) > 0)
        except np.linalg.LinAlgError:  # one model not positive definite: every model by the pseudo-inverse
            good[:] = False
    if good.any():
        coef[good] = np.linalg.solve(A[good], c[good][:, :, None])[:, :, 0]
    bad = ~good
    if bad.any():
        coef[bad] = (np.linalg.pinv(A[bad], hermitian=True) @ c[bad][:, :, None])[:, :, 0]
    return coef


def _apply_ar(v: FloatArray, phi: FloatArray) -> FloatArray:
    out = v.copy()
    for j in range(1, phi.shape[1] + 1):
        out = out - phi[:, j - 1, None] * _lagged(v, j)
    return out


def lag_profile(y: Any, x: Any, max_lag: int, *, prewhiten: bool = True, max_ar: int = 8,
                level: float = 0.05) -> LagProfile:
    """Cross-correlation profile of target ``y`` and driver ``x`` for lags 0..max_lag.

    Parameters
    ----------
    y, x : (T,) or (M, T) target and driver on the same periods (NaN = missing; products involving a
        missing value are skipped and n counts the complete pairs at lag 0).
    max_lag : largest lag k (driver leading by k), 0 <= max_lag < T - 2.
    prewhiten : filter both series by an AR model of the driver first (see module docstring).
    max_ar : largest AR order considered for the prewhitening filter (AIC chooses 0..max_ar, capped at
        T // 10).
    level : two-sided level of the band, e.g. 0.05 -> z = 1.96.

    Returns
    -------
    LagProfile

    Raises
    ------
    ValueError : bad max_lag, max_ar, level, or shapes.
    InsufficientDataError : fewer than max_lag + 3 complete observations after prewhitening, or a
        constant target or driver.

    Notes
    -----
    Means and standard deviations are taken over the complete pairs at lag 0 (after prewhitening) and the
    divisor is that n for every lag, as in the Box-Jenkins estimator; the peak is the argmax of |r_k|
    (the smallest such lag on ties).
    """
    if not isinstance(max_lag, (int, np.integer)) or isinstance(max_lag, bool) or max_lag < 0:
        raise ValueError(f"max_lag must be a non-negative integer, got {max_lag!r}")
    if not isinstance(max_ar, (int, np.integer)) or max_ar < 0:
        raise ValueError(f"max_ar must be a non-negative integer, got {max_ar!r}")
    if not isinstance(level, (int, float)) or not 0 < level < 1:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    yv = np.asarray(y, dtype=float)
    xv = np.asarray(x, dtype=float)
    if yv.shape != xv.shape:
        raise ValueError(f"y and x must have the same shape, got {yv.shape} and {xv.shape}")
    squeeze = yv.ndim == 1
    if squeeze:
        yv, xv = yv[None], xv[None]
    if yv.ndim != 2:
        raise ValueError(f"y and x must be 1-D (T,) or 2-D (M, T), got shape {yv.shape}")
    if np.any(np.isinf(yv)) or np.any(np.isinf(xv)):
        raise ValueError("y and x must not contain infinities (use NaN for missing values)")
    M, T = yv.shape
    if max_lag > T - 3:
        raise InsufficientDataError("lag profile", max_lag + 3, T)

    if prewhiten:
        p_cap = min(int(max_ar), max(T // 10, 0))
        n_x = np.isfinite(xv).sum(axis=1)
        if np.any(n_x < max_lag + 3 + p_cap):
            raise InsufficientDataError("lag profile (prewhitening)", max_lag + 3 + p_cap, int(n_x.min()))
        phi, order = _fit_ar_aic(xv, p_cap)
        a = _apply_ar(xv, phi)
        b = _apply_ar(yv, phi)
    else:
        order = np.zeros(M, dtype=np.int64)
        a, b = xv, yv
    ok0 = np.isfinite(a) & np.isfinite(b)
    n = ok0.sum(axis=1)
    if np.any(n < max_lag + 3):
        raise InsufficientDataError("lag profile", max_lag + 3, int(n.min()))
    a0 = np.where(ok0, a, np.nan)
    b0 = np.where(ok0, b, np.nan)
    with np.errstate(invalid="ignore"):
        ma, mb = np.nanmean(a0, axis=1), np.nanmean(b0, axis=1)
        sa, sb = np.nanstd(a0, axis=1), np.nanstd(b0, axis=1)
    scale_a = np.nanmax(np.abs(a0), axis=1)
    scale_b = np.nanmax(np.abs(b0), axis=1)
    if np.any(sa <= 1e-12 * np.maximum(scale_a, 1e-300)) or np.any(sb <= 1e-12 * np.maximum(scale_b, 1e-300)):
        raise InsufficientDataError("lag profile (target or driver is constant)", 2, 0)
    ac = np.where(ok0, a - ma[:, None], np.nan)
    bc = np.where(ok0, b - mb[:, None], np.nan)
    ccf = np.empty((M, max_lag + 1))
    for k in range(max_lag + 1):
        prod = bc[:, k:] * ac[:, : T - k]  # y_t * x_{t-k}
        ccf[:, k] = np.where(np.isfinite(prod), prod, 0.0).sum(axis=1) / n
    ccf /= (sa * sb)[:, None]
    band = stats.norm.ppf(1.0 - level / 2.0) / np.sqrt(n)
    peak = np.argmax(np.abs(ccf), axis=1).astype(np.int64)
    sig = np.abs(ccf[np.arange(M), peak]) > band
    order = np.asarray(order, dtype=np.int64)
    n = n.astype(np.int64)
    if squeeze:
        return LagProfile(ccf=ccf[0], band=float(band[0]), nobs=int(n[0]), peak_lag=int(peak[0]),
                          peak_significant=bool(sig[0]), ar_order=int(order[0]), level=float(level),
                          squeeze=True)
    return LagProfile(ccf=ccf, band=band, nobs=n, peak_lag=peak, peak_significant=sig, ar_order=order,
                      level=float(level), squeeze=False)


def compare_profiles(reference: LagProfile, recent: LagProfile) -> ProfileShift:
    """Did the peak lag move between a reference-window profile and a recent-window profile?

    Parameters
    ----------
    reference, recent : :class:`LagProfile` over the same models and the same max_lag.

    Returns
    -------
    ProfileShift

    Raises
    ------
    TypeError : not LagProfile objects.
    ValueError : different numbers of models or lags.

    Notes
    -----
    A descriptive comparison (no formal test of equal lags): ``moved`` needs the recent peak to clear its
    own band; ``lost`` needs the old peak to have cleared the reference band and the recent |r| at that
    lag to fall inside the recent band.
    """
    if not isinstance(reference, LagProfile) or not isinstance(recent, LagProfile):
        raise TypeError("reference and recent must be LagProfile results of lag_profile")
    if np.shape(reference.ccf) != np.shape(recent.ccf):
        raise ValueError(f"profiles differ in shape: {np.shape(reference.ccf)} vs {np.shape(recent.ccf)}")
    r_ccf = np.atleast_2d(recent.ccf)
    ref_lag = np.atleast_1d(reference.peak_lag)
    rec_lag = np.atleast_1d(recent.peak_lag)
    ref_sig = np.atleast_1d(reference.peak_significant)
    rec_sig = np.atleast_1d(recent.peak_significant)
    at_old = np.abs(r_ccf[np.arange(r_ccf.shape[0]), ref_lag])
    moved = rec_sig & (rec_lag != ref_lag)
    lost = ref_sig & (at_old <= np.atleast_1d(recent.band))
    if reference.squeeze:
        return ProfileShift(int(ref_lag[0]), int(rec_lag[0]), bool(moved[0]), bool(lost[0]),
                            bool(ref_sig[0]), bool(rec_sig[0]))
    return ProfileShift(reference_lag=ref_lag, recent_lag=rec_lag, moved=moved, lost=lost,
                        reference_significant=ref_sig, recent_significant=rec_sig)
