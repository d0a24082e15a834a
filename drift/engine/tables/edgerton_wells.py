"""Critical values of the CUSUM-of-squares test (Edgerton & Wells response surface).

Edgerton, D. & Wells, C. (1994). Critical values for the CUSUMSQ statistic in medium and large sized
samples. Oxford Bulletin of Economics and Statistics 56(3), 355-365: the one-sided critical value of
:math:`\\max_r (s_r - (r-k)/(T-k))` is approximated by

.. math:: c_0(n, \\alpha) \\approx c_1/\\sqrt n + c_2/n + c_3/n^{3/2}, \\qquad n = \\tfrac12 (T-k) - 1,

with the coefficients below, keyed by the *one-sided* level (the same five columns as statsmodels
0.15.0 ``recursive_ls._cusum_squares_scalars``). A two-sided test at level :math:`\\alpha` uses the
:math:`\\alpha/2` column. The exact distribution is Durbin's (1969, Biometrika 56(1), 1-15) table; these
approximations run slightly liberal (about 5.3-7.1% at nominal 5%, computed by simulation for this
project). Note :math:`c_1 = \\sqrt{-\\ln(\\alpha)/2}`, the one-sided Smirnov (Brownian bridge) quantile.

Edges: the formula is used for :math:`n \\ge` :data:`MIN_N` (= 2, i.e. at least 6 recursive residuals);
below that it is not monotone in the level (it even turns negative at n = 1), so lookups refuse.
Levels outside the five columns are not extrapolated by :func:`c0`; :func:`pvalue` states its rule
beyond the columns.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

__all__ = ["EW_COEFFICIENTS", "MIN_N", "c0", "ew_n", "pvalue"]

#: (c1, c2, c3) keyed by one-sided significance level (Edgerton & Wells 1994).
EW_COEFFICIENTS: dict[float, tuple[float, float, float]] = {
    0.10: (1.0729830, -0.6698868, -0.5816458),
    0.05: (1.2238734, -0.6700069, -0.7351697),
    0.025: (1.3581015, -0.6701218, -0.8858694),
    0.01: (1.5174271, -0.6702672, -1.0847745),
    0.005: (1.6276236, -0.6703724, -1.2365861),
}

#: smallest n = (T-k)/2 - 1 for which the approximation is used (monotone in the level from n = 1.5)
MIN_N: float = 2.0


def ew_n(n_resid: np.ndarray | int) -> np.ndarray:
    """Edgerton-Wells sample-size argument ``n = (T - k)/2 - 1`` from the number of recursive residuals."""
    return 0.5 * np.asarray(n_resid, dtype=float) - 1.0


def _one_sided_key(level: float, sided: int) -> float:
    if sided not in (1, 2):
        raise ValueError(f"sided must be 1 or 2; got {sided!r}")
    one = float(level) / sided
    for key in EW_COEFFICIENTS:
        if abs(one - key) < 1e-12:
            return key
    allowed = sorted(k * sided for k in EW_COEFFICIENTS)
    raise ValueError(f"level must be one of {allowed} for a {sided}-sided test; got {level!r}")


def c0(n: np.ndarray | float, level: float, *, sided: int = 2) -> np.ndarray:
    """Approximate CUSUM-of-squares critical value ``c0(n, level)``.

    Parameters
    ----------
    n : float or ndarray
        ``(T - k)/2 - 1`` (see :func:`ew_n`); values below :data:`MIN_N` give NaN.
    level : float
        Significance level: two-sided (0.20, 0.10, 0.05, 0.02, 0.01) when ``sided=2``, one-sided
        (0.10, 0.05, 0.025, 0.01, 0.005) when ``sided=1``.
    sided : {1, 2}

    Returns
    -------
    ndarray
        ``c1/sqrt(n) + c2/n + c3/n**1.5``, NaN where ``n < MIN_N``.

    Raises
    ------
    ValueError
        For a level that is not one of the table's columns, or a bad ``sided``.
    """
    c1, c2, c3 = EW_COEFFICIENTS[_one_sided_key(level, sided)]
    nn = np.asarray(n, dtype=float)
    ok = nn >= MIN_N
    ns = np.where(ok, nn, 1.0)
    return np.where(ok, c1 / np.sqrt(ns) + c2 / ns + c3 / ns**1.5, np.nan)


def pvalue(statistic: np.ndarray | float, n: np.ndarray | float) -> np.ndarray:
    """Two-sided p-value of ``D = max_r |s_r - (r-k)/(T-k)|`` by inverting the approximation.

    Parameters
    ----------
    statistic : float or ndarray
        ``D`` per model.
    n : float or ndarray
        ``(T - k)/2 - 1`` per model.

    Returns
    -------
    ndarray
        Two-sided p-value; NaN where ``n < MIN_N`` or the statistic is NaN.

    Notes
    -----
    Rule (documented choice, no published source): at the five columns the two-sided p-value is
    ``2 * alpha_1``, with ``alpha_1`` the one-sided level, and ``c0`` the critical value.
    Between columns, ``log(p)`` is interpolated linearly in ``c0**2`` (exact for the leading term, since
    ``log(alpha_1) = -2 c1**2``). Beyond the columns the asymptotic law of ``sqrt(n) * D`` (Kolmogorov,
    sup of |Brownian bridge|, survival function ``K``) supplies the shape, anchored so that the p-value
    is continuous at the edge: for ``D > c0(0.005)``, ``p = 0.01 * K(sqrt(n) D) / K(sqrt(n) c0(0.005))``;
    for ``D < c0(0.10)``, ``p = 1 - 0.8 * F(sqrt(n) D) / F(sqrt(n) c0(0.10))`` with ``F = 1 - K``
    (so ``p -> 1`` as ``D -> 0``).
    """
    d = np.asarray(statistic, dtype=float)
    nn = np.asarray(n, dtype=float)
    d, nn = np.broadcast_arrays(d, nn)
    keys = sorted(EW_COEFFICIENTS, reverse=True)  # 0.10 ... 0.005: critical values increasing
    crit = np.stack([c0(nn, lvl, sided=1) for lvl in keys])  # (5, ...)
    logp = np.log(2.0 * np.asarray(keys))
    ok = np.isfinite(d) & (nn >= MIN_N)
    out = np.full(d.shape, np.nan)
    if not ok.any():
        return out
    dd, cc = d[ok], crit[:, ok]
    sq = np.sqrt(nn[ok])
    res = np.empty(dd.shape)
    lo, hi = cc[0], cc[-1]
    inside = (dd >= lo) & (dd <= hi)
    # inside the columns: piecewise-linear log p against c0^2
    if inside.any():
        di, ci = dd[inside], cc[:, inside]
        seg = np.clip((di[None, :] > ci).sum(axis=0) - 1, 0, len(keys) - 2)
        cols = np.arange(di.size)
        x0, x1 = ci[seg, cols] ** 2, ci[seg + 1, cols] ** 2
        frac = (di**2 - x0) / (x1 - x0)
        res[inside] = np.exp(logp[seg] + frac * (logp[seg + 1] - logp[seg]))
    above = dd > hi
    if above.any():
        num = stats.kstwobign.sf(sq[above] * dd[above])
        den = stats.kstwobign.sf(sq[above] * hi[above])
        res[above] = np.exp(logp[-1]) * num / den
    below = dd < lo
    if below.any():
        num = stats.kstwobign.cdf(sq[below] * dd[below])
        den = stats.kstwobign.cdf(sq[below] * lo[below])
        res[below] = 1.0 - (1.0 - np.exp(logp[0])) * num / den
    out[ok] = np.clip(res, 0.0, 1.0)
    return out
