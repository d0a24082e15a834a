"""Boundary constant of the Chu, Stinchcombe & White (1996) CUSUM monitoring procedure.

Chu, C.-S. J., Stinchcombe, M. and White, H. (1996). "Monitoring structural change."
*Econometrica* 64(5), 1045-1065, Theorem 3.4 / eq. (3.5): after a historical sample of size ``m`` the
recursive-residual CUSUM :math:`Q_n = \\hat\\sigma^{-1}\\sum_{t=m+1}^{n} w_t` signals at the first
``n > m`` with :math:`|Q_n| \\ge \\sqrt{n\\,[a^2 + \\ln(n/m)]}`. Over an infinite monitoring horizon the
probability of a false alarm is

.. math:: P(\\text{alarm}) = 2\\,[1 - \\Phi(a) + a\\,\\varphi(a)],

(a boundary-crossing probability of Brownian motion, Robbins & Siegmund 1970), so :math:`a^2` at level
:math:`\\alpha` solves :math:`2[1 - \\Phi(a) + a\\varphi(a)] = \\alpha`.

``A_SQUARED`` holds the solutions (recomputed here by root finding, 4-5 significant digits; often quoted
rounded as 7.78 / 6.25). :func:`a_squared` solves the equation for any level in (0, 1) and
:func:`crossing_probability` is its inverse (used for the infinite-horizon p-value). Over a *finite*
horizon the procedure is conservative; a finite-horizon calibration simulated by
``tools/simulate_monitoring.py`` lives in :mod:`drift.engine.tables.monitoring`.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, stats

#: level -> a^2 (infinite monitoring horizon), Chu, Stinchcombe & White (1996), eq. (3.5).
A_SQUARED: dict[float, float] = {0.10: 6.2514, 0.05: 7.8147, 0.01: 11.345}


def crossing_probability(a2: float | np.ndarray) -> np.ndarray:
    """Infinite-horizon false-alarm probability ``2[1 - Phi(a) + a phi(a)]`` for boundary constant a^2.

    Parameters
    ----------
    a2 : a^2 >= 0 (scalar or array). Values <= 0 give probability 1 (the boundary is crossed at once
        with probability one in the limit).

    Returns
    -------
    ndarray of probabilities in (0, 1].
    """
    a2 = np.asarray(a2, dtype=float)
    a = np.sqrt(np.clip(a2, 0.0, None))
    p = 2.0 * (stats.norm.sf(a) + a * stats.norm.pdf(a))
    return np.where(a2 > 0, np.minimum(p, 1.0), 1.0)


def a_squared(level: float) -> float:
    """Solve ``2[1 - Phi(a) + a phi(a)] = level`` for a^2 (Chu, Stinchcombe & White 1996, eq. 3.5).

    Parameters
    ----------
    level : false-alarm probability over an infinite horizon, 0 < level < 1.

    Returns
    -------
    float : a^2.

    Raises
    ------
    ValueError : level outside (0, 1).
    """
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    # At a = 0 the probability is 1, and it decreases monotonically to 0 as a grows.
    a = optimize.brentq(lambda x: float(crossing_probability(x * x)) - level, 0.0, 40.0, xtol=1e-13)
    return float(a * a)


def lookup(level: float) -> float:
    """a^2 for ``level``: the tabulated value when ``level`` is a key, otherwise solved exactly."""
    for key, value in A_SQUARED.items():
        if abs(key - level) < 1e-12:
            return value
    return a_squared(level)
