"""Critical values of the OLS-residual CUSUM test.

Ploberger, W. & Krämer, W. (1992). The CUSUM test with OLS residuals. Econometrica 60(2), 271-285:
under the null of constant coefficients :math:`\\sup_z |\\sum_{t \\le zT} \\hat u_t / (\\hat\\sigma
\\sqrt T)|` converges to the supremum of the absolute value of a standard Brownian bridge, whose law is
Kolmogorov's (``scipy.stats.kstwobign``). Quantiles: 1.2238 (10%), 1.3581 (5%), 1.6276 (1%).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

__all__ = ["OLS_CUSUM_CRITICAL", "critical_value", "pvalue"]

#: Upper quantiles of sup |Brownian bridge| keyed by significance level (4 decimals, scipy kstwobign).
OLS_CUSUM_CRITICAL: dict[float, float] = {0.10: 1.2238, 0.05: 1.3581, 0.01: 1.6276}


def critical_value(level: float) -> float:
    """Asymptotic critical value for ``level``: ``kstwobign.isf(level)`` (any level in (0, 1)).

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
    if not (0.0 < float(level) < 1.0):
        raise ValueError(f"level must be in (0, 1); got {level!r}")
    return float(stats.kstwobign.isf(float(level)))


def pvalue(statistic: np.ndarray | float) -> np.ndarray:
    """Asymptotic p-value ``P(sup |B| > statistic)`` (Kolmogorov survival function); NaN stays NaN."""
    return np.asarray(stats.kstwobign.sf(np.asarray(statistic, dtype=float)))
