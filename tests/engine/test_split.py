"""Before/after coefficients from one regression with interaction columns.

Reference: statsmodels 0.15.0 OLS on the same augmented design (the estimates and the t test of the
interaction coefficient are the textbook dummy-variable formulation of a Chow-type change, Gujarati 2003
ch. 9 — from memory for the textbook chapter).
"""

import numpy as np
import pytest
import statsmodels.api as sm

from drift.engine.split import split_coefficients
from drift.exceptions import InsufficientDataError


def test_matches_statsmodels_dummy_regression() -> None:
    rng = np.random.default_rng(3)  # simulation
    n, at = 120, 80
    x = rng.normal(size=n)
    X = np.column_stack([np.ones(n), np.arange(n) / n, x])
    beta = np.where(np.arange(n) >= at, 0.5, 2.0)
    y = 1 + 0.3 * X[:, 1] + beta * x + rng.normal(0, 0.5, n)
    sp = split_coefficients(y, X, at, [2])
    post = (np.arange(n) >= at).astype(float)
    Z = np.column_stack([X, x * post, post])
    res = sm.OLS(y, Z).fit()
    assert sp.before[0] == pytest.approx(res.params[2], rel=1e-10)
    assert sp.after[0] == pytest.approx(res.params[2] + res.params[3], rel=1e-10)
    assert sp.se_diff[0] == pytest.approx(res.bse[3], rel=1e-8)
    assert sp.pvalue_diff[0] == pytest.approx(res.pvalues[3], rel=1e-6)
    ci = res.conf_int()[2]
    assert sp.ci_before[0] == pytest.approx(ci, rel=1e-8)
    assert sp.ci_after[0, 0] < 0.5 < sp.ci_after[0, 1]


def test_too_few_after_raises_our_error() -> None:
    X = np.column_stack([np.ones(20), np.arange(20.0)])
    y = np.arange(20.0) + np.sin(np.arange(20.0))
    with pytest.raises(InsufficientDataError):
        split_coefficients(y, X, 19, [1])
