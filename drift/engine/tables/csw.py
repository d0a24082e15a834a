"""Boundary constant of the Chu, Stinchcombe & White (1996) CUSUM monitoring procedure.

Chu, C.-S. J., Stinchcombe, M. and White, H. (1996). "Monitoring structural change."
*Econometrica* 64(5), 1045-1065. After a historical sample of size ``m`` the procedure signals at the
first ``n > m`` with :math:`|Q_n| \\ge \\sqrt{n\\,[a^2 + \\ln(n/m)]}`. What the constant must be depends on
where the cumulative sum :math:`Q_n` starts.

**Monitored residuals only** (what :func:`drift.engine.monitor.monitor` uses):
:math:`Q_n = \\hat\\sigma^{-1}\\sum_{t=m+1}^{n} w_t`. In monitoring time :math:`\\tau = (n - m)/m` this is a
Brownian motion started at 0 and the boundary is :math:`\\sqrt{(1+\\tau)[a^2 + \\ln(1+\\tau)]}`, the level set
of the normal-mixture likelihood ratio :math:`(1+\\tau)^{-1/2}\\exp\\{B(\\tau)^2 / (2(1+\\tau))\\}`, a
martingale started at 1. By Ville's maximal equality for a continuous martingale (Robbins 1970; Robbins &
Siegmund 1970) the probability of ever crossing is exactly

.. math:: P(\\text{alarm}) = \\exp(-a^2/2), \\qquad a^2 = -2\\ln\\alpha

(``A_SQUARED``: 4.6052 at 10%, 5.9915 at 5%, 9.2103 at 1%).

**From the start of the history sample** (the paper's eq. 3.5, Theorem 3.4): :math:`Q_n` also contains the
history sample's recursive residuals, so at the start of monitoring it already holds a N(0, 1) value
:math:`x`; the crossing probability is :math:`E[\\min(1, e^{(x^2 - a^2)/2})]`, i.e.

.. math:: P(\\text{alarm}) = 2\\,[1 - \\Phi(a) + a\\,\\varphi(a)]

(``A_SQUARED_HISTORY``: 6.2514 / 7.8147 / 11.345; often quoted rounded as 6.25 / 7.78). Used for the
monitored-only process this constant gives a false-alarm probability of exp(-7.8147/2) = 2.0%, not 5%.

Both are infinite-horizon probabilities and conservative over any finite span; a finite-horizon
calibration of the monitored-only process simulated by ``tools/simulate_monitoring.py`` lives in
:mod:`drift.engine.tables.monitoring`. Values recomputed here (closed form / root finding).

References
----------
Robbins, H. (1970). Statistical methods related to the law of the iterated logarithm. Ann. Math.
Statist. 41(5), 1397-1409.
Robbins, H. and Siegmund, D. (1970). Boundary crossing probabilities for the Wiener process and sample
sums. Ann. Math. Statist. 41(5), 1410-1429.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, stats

#: level -> a^2 (infinite horizon) for the CUSUM of the monitored residuals only: exp(-a^2/2) = level.
A_SQUARED: dict[float, float] = {0.10: 4.6052, 0.05: 5.9915, 0.01: 9.2103}
#: level -> a^2 (infinite horizon) for the CUSUM summed from the start of the history sample,
#: Chu, Stinchcombe & White (1996), eq. (3.5): 2[1 - Phi(a) + a phi(a)] = level.
A_SQUARED_HISTORY: dict[float, float] = {0.10: 6.2514, 0.05: 7.8147, 0.01: 11.345}


def crossing_probability(a2: float | np.ndarray) -> np.ndarray:
    """Infinite-horizon false-alarm probability ``exp(-a^2 / 2)`` of the monitored-only CUSUM.

    Parameters
    ----------
    a2 : a^2 (scalar or array); the largest a^2 at which a path touches the boundary gives its p-value.
        Values <= 0 give probability 1.

    Returns
    -------
    ndarray of probabilities in (0, 1].
    """
    a2 = np.asarray(a2, dtype=float)
    with np.errstate(over="ignore"):
        p = np.exp(-0.5 * np.clip(a2, 0.0, None))
    return np.where(np.isnan(a2), np.nan, np.where(a2 > 0, p, 1.0))


def a_squared(level: float) -> float:
    """``a^2 = -2 ln(level)``: the boundary constant of the monitored-only CUSUM at ``level``.

    Raises
    ------
    ValueError : level outside (0, 1).
    """
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    return float(-2.0 * np.log(level))


def crossing_probability_history(a2: float | np.ndarray) -> np.ndarray:
    """Infinite-horizon false-alarm probability ``2[1 - Phi(a) + a phi(a)]`` of the CUSUM summed from the
    start of the history sample (Chu, Stinchcombe & White 1996, eq. 3.5). Values <= 0 give 1."""
    a2 = np.asarray(a2, dtype=float)
    a = np.sqrt(np.clip(a2, 0.0, None))
    p = 2.0 * (stats.norm.sf(a) + a * stats.norm.pdf(a))
    return np.where(a2 > 0, np.minimum(p, 1.0), 1.0)


def a_squared_history(level: float) -> float:
    """Solve ``2[1 - Phi(a) + a phi(a)] = level`` for a^2 (Chu, Stinchcombe & White 1996, eq. 3.5).

    Raises
    ------
    ValueError : level outside (0, 1).
    """
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    # At a = 0 the probability is 1, and it decreases monotonically to 0 as a grows.
    a = optimize.brentq(lambda x: float(crossing_probability_history(x * x)) - level, 0.0, 40.0, xtol=1e-13)
    return float(a * a)


def lookup(level: float) -> float:
    """a^2 of the monitored-only CUSUM for ``level``: the tabulated value when ``level`` is a key,
    otherwise the closed form."""
    for key, value in A_SQUARED.items():
        if abs(key - level) < 1e-12:
            return value
    return a_squared(level)
