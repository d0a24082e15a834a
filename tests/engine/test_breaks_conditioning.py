"""sup_f on ill-conditioned but valid designs: every candidate date is tested, none dropped silently.

Oracle: the Chow F at each candidate date, computed here independently from residual sums of squares of
Householder-QR least squares (numpy.linalg.qr) on each regime and on the whole sample (Chow 1960):
F = [(S - S1 - S2)/k] / [(S1 + S2)/(n - 2k)].
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from drift.engine.breaks import chow, predictive_failure, sup_f
from drift.exceptions import InsufficientDataError


def _rss(y: np.ndarray, X: np.ndarray) -> float:
    Q, _ = np.linalg.qr(X)
    e = y - Q @ (Q.T @ y)
    return float(e @ e)


def _chow_path(y: np.ndarray, X: np.ndarray, candidates: np.ndarray) -> np.ndarray:
    n, k = X.shape
    S = _rss(y, X)
    out = []
    for m in candidates:
        S12 = _rss(y[:m], X[:m]) + _rss(y[m:], X[m:])
        out.append(((S - S12) / k) / (S12 / (n - 2 * k)))
    return np.array(out)


def test_sup_f_on_longley_equals_the_largest_chow_f() -> None:
    # statsmodels.datasets.longley (Longley 1967; statsmodels 0.15.0): TOTEMP on the six regressors and a
    # constant, a classic ill-conditioned design (condition number about 5e9 in the raw units). With n = 16,
    # k = 7 and 15% trimming each regime needs k + 1 = 8 rows: the one candidate date is row 8.
    data = sm.datasets.longley.load_pandas()
    y = data.endog.to_numpy(float)
    X = sm.add_constant(data.exog.to_numpy(float))
    r = sup_f(y, X)
    cands = np.flatnonzero(np.isfinite(r.f_path))
    assert cands.tolist() == [8]
    assert r.params["candidates"] == 1 and r.params["singular_candidates"] == 0
    expected = _chow_path(y, X, cands)
    np.testing.assert_allclose(r.f_path[cands], expected, rtol=1e-7)
    assert r.statistic == pytest.approx(7 * expected.max(), rel=1e-7)
    assert r.break_index == 8


@pytest.mark.parametrize("delta", [1e-2, 1e-4, 1e-6])
def test_sup_f_near_collinear_design_every_candidate(delta: float) -> None:
    # design [1, x, x + delta z] (common practice, no source: a near-collinear pair whose difference carries
    # the effect of z); invented data, seeded. Every candidate date has a finite F equal to the QR oracle.
    rng = np.random.default_rng(20261111)
    n = 60
    x, z = rng.standard_normal(n), rng.standard_normal(n)
    X = np.column_stack([np.ones(n), x, x + delta * z])
    y = 1.0 + 0.5 * x + 0.3 * z + rng.standard_normal(n) + 1.5 * (np.arange(n) >= 35)
    r = sup_f(y, X)
    lo = int(np.ceil(0.15 * n))
    cands = np.arange(lo, n - lo + 1)
    assert np.isfinite(r.f_path[cands]).all()
    assert np.isnan(np.delete(r.f_path, cands)).all()
    assert r.params["candidates"] == cands.size and r.params["singular_candidates"] == 0
    expected = _chow_path(y, X, cands)
    np.testing.assert_allclose(r.f_path[cands], expected, rtol=1e-6)
    assert r.statistic == pytest.approx(3 * expected.max(), rel=1e-6)
    assert r.break_index == cands[int(np.argmax(expected))]


def test_sup_f_partial_break_on_near_collinear_columns() -> None:
    # a break in the coefficient of x + delta z only (test_columns=[2]); oracle: statsmodels 0.15.0 OLS of
    # the model with the interaction column added, at each candidate (sum of squared residuals)
    rng = np.random.default_rng(20261112)
    n = 50
    x, z = rng.standard_normal(n), rng.standard_normal(n)
    X = np.column_stack([np.ones(n), x, x + 1e-5 * z])
    y = X @ np.array([1.0, 0.5, 0.2]) + rng.standard_normal(n)
    r = sup_f(y, X, test_columns=[2])
    S = _rss(y, X)
    for m in (8, 25, 42):
        Su = _rss(y, np.column_stack([X, X[:, 2] * (np.arange(n) >= m)]))
        assert r.f_path[m] == pytest.approx((S - Su) / (Su / (n - 4)), rel=1e-6)
    assert r.params["singular_candidates"] == 0


def test_sup_f_reports_candidates_with_a_singular_regime() -> None:
    # a regressor that is zero before row 20 (a series that starts there): every candidate up to row 20
    # leaves the early regime with an all-zero column (exactly singular); those dates are counted, not
    # silently skipped
    rng = np.random.default_rng(20261113)
    n = 60
    X = np.column_stack([np.ones(n), rng.standard_normal(n), rng.standard_normal(n) * (np.arange(n) >= 20)])
    y = X @ np.array([1.0, 0.5, 2.0]) + rng.standard_normal(n)
    r = sup_f(y, X)
    lo = int(np.ceil(0.15 * n))
    assert r.params["candidates"] == n - 2 * lo + 1
    assert r.params["singular_candidates"] == 20 - lo + 1  # candidates 9..20: nothing of it before
    assert np.isnan(r.f_path[lo:21]).all() and np.isfinite(r.f_path[21:n - lo + 1]).all()


# ---------------------------------------------------------------- exact fits without a break
def _exact_fit_data(n: int = 40) -> tuple[np.ndarray, np.ndarray]:
    # y = X b exactly (no noise, no break): common practice, no source. Every RSS is rounding, so an F is
    # 0/0: there is nothing to test, never a "certain break" (F = inf, p = 0).
    rng = np.random.default_rng(20261203)
    X = np.column_stack([np.ones(n), rng.standard_normal(n)])
    return X @ np.array([1.0, 2.0]), X


def test_exact_fit_without_break_is_not_a_break() -> None:
    y, X = _exact_fit_data()
    for call in (lambda: sup_f(y, X), lambda: chow(y, X, 20), lambda: predictive_failure(y, X, 30)):
        with pytest.raises(InsufficientDataError, match="fit y exactly"):
            call()


def test_exact_fit_model_in_a_batch_gets_nan_and_is_counted() -> None:
    # in a batch, the exact-fit model gets NaN (it cannot be tested) and params say why; the other is
    # tested as alone
    y, X = _exact_fit_data()
    noisy = y + np.random.default_rng(5).standard_normal(y.size)
    Y, XX = np.stack([y, noisy]), np.stack([X, X])
    r = sup_f(Y, XX)
    alone = sup_f(noisy, X)
    assert np.isnan(r.statistic[0]) and r.break_index[0] == -1
    assert r.statistic[1] == pytest.approx(alone.statistic)
    assert r.params["exact_fit"].tolist() == [True, False]
    c = chow(Y, XX, 20)
    assert np.isnan(c.statistic[0]) and c.statistic[1] == pytest.approx(chow(noisy, X, 20).statistic)
    assert c.params["exact_fit"].tolist() == [True, False]


def test_noise_free_break_on_a_large_level_is_still_found() -> None:
    # the exact-fit rule is relative to y's size: a series around 1e8 with unit noise is not an exact fit
    rng = np.random.default_rng(20261204)
    n = 60
    X = np.column_stack([np.ones(n), rng.standard_normal(n)])
    y = 1e8 + X @ np.array([0.0, 2.0]) + rng.standard_normal(n) + 3.0 * (np.arange(n) >= 30)
    r = sup_f(y, X)
    assert np.isfinite(r.statistic) and not r.params["exact_fit"]
    assert abs(r.break_index - 30) <= 2
