"""Boundary constants of the recursive-residual CUSUM test.

Brown, R. L., Durbin, J. & Evans, J. M. (1975). Techniques for testing the constancy of regression
relationships over time. Journal of the Royal Statistical Society, Series B 37(2), 149-192; section 2.3
and the table of ``a`` given there.

The CUSUM path :math:`W_r = \\sum_{j=k+1}^{r} w_j / \\hat\\sigma` is compared with the straight lines
through :math:`(k, \\pm a\\sqrt{T-k})` and :math:`(T, \\pm 3a\\sqrt{T-k})`. The probability that a
Brownian motion crosses such a line is approximated by

.. math:: P(a) = 2\\,[1 - \\Phi(3a) + e^{-4a^2}\\,\\Phi(a)],

so the constant for a level :math:`\\alpha` solves :math:`1 - \\Phi(3a) + e^{-4a^2}\\Phi(a) = \\alpha/2`.
Tabulated: 0.850 (10%), 0.948 (5%), 1.143 (1%).

Note: statsmodels 0.15.0 ``RecursiveLSResults._cusum_significance_bounds`` uses 0.950 for the 10% level;
the correct root of the equation is 0.850 (recomputed by :func:`solve_a`).
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, stats

__all__ = ["CUSUM_A", "crossing_probability", "cusum_a", "solve_a"]

#: Tabulated CUSUM boundary constant ``a`` keyed by two-sided significance level (BDE 1975).
CUSUM_A: dict[float, float] = {0.10: 0.850, 0.05: 0.948, 0.01: 1.143}

# bracket for the root search: P(0) = 2 (capped at 1), P(8) < 1e-60
_A_BRACKET = (0.0, 8.0)


def _half_crossing(a: np.ndarray | float) -> np.ndarray:
    a = np.asarray(a, dtype=float)
    return stats.norm.sf(3.0 * a) + np.exp(-4.0 * a * a) * stats.norm.cdf(a)


def crossing_probability(a: np.ndarray | float) -> np.ndarray:
    """Approximate probability that the CUSUM path crosses the lines with constant ``a``.

    Parameters
    ----------
    a : float or ndarray
        Boundary constant(s) (the CUSUM statistic is the smallest ``a`` the path touches).

    Returns
    -------
    ndarray
        ``min(1, 2 [1 - Phi(3a) + exp(-4 a^2) Phi(a)])``; NaN where ``a`` is NaN.

    References
    ----------
    Brown, Durbin & Evans (1975), JRSS B 37(2), 149-192, section 2.3.
    """
    return np.clip(2.0 * _half_crossing(a), 0.0, 1.0)


def solve_a(level: float) -> float:
    """Recompute the boundary constant for ``level`` from its defining equation (scipy ``brentq``).

    Parameters
    ----------
    level : float in (0, 1)
        Two-sided significance level.

    Returns
    -------
    float
        The root of ``1 - Phi(3a) + exp(-4 a^2) Phi(a) = level / 2``.

    Raises
    ------
    ValueError
        If ``level`` is not in (0, 1).
    """
    if not (0.0 < float(level) < 1.0):
        raise ValueError(f"level must be in (0, 1); got {level!r}")
    lo, hi = _A_BRACKET
    return float(optimize.brentq(lambda a: float(_half_crossing(a)) - level / 2.0, lo, hi, xtol=1e-14))


def cusum_a(level: float) -> float:
    """Boundary constant ``a`` for a two-sided level.

    Tabulated levels (0.10, 0.05, 0.01) return the published three-decimal value; any other level in
    (0, 1) is computed from the defining equation by :func:`solve_a` (no table edge applies).

    Parameters
    ----------
    level : float in (0, 1)

    Returns
    -------
    float

    Raises
    ------
    ValueError
        If ``level`` is not in (0, 1).
    """
    lvl = float(level)
    for key, val in CUSUM_A.items():
        if abs(lvl - key) < 1e-12:
            return val
    return solve_a(lvl)
