"""Rolling-window OLS coefficients (drift.engine.rolling)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.regression.rolling import RollingOLS

from drift.engine.rolling import RollingFit, rolling_coefficients
from drift.exceptions import InsufficientDataError


def _design(rng: np.random.Generator, n: int = 100, k: int = 3) -> tuple[np.ndarray, np.ndarray]:
    X = np.column_stack([np.ones(n), rng.normal(size=(n, k - 1)) * 10.0 + 5.0])
    y = X @ np.arange(1.0, k + 1.0) + rng.normal(size=n)
    return y, X


# source: statsmodels 0.15.0 RollingOLS (params, bse)
@pytest.mark.parametrize("window", [3, 10, 30, 100])
def test_matches_statsmodels_rolling_ols(window: int) -> None:
    rng = np.random.default_rng(301)
    y, X = _design(rng, 100, 3)
    fit = rolling_coefficients(y, X, window)
    with np.errstate(divide="ignore", invalid="ignore"):  # statsmodels divides by window - k = 0
        ref = RollingOLS(y, X, window=window).fit()
    assert isinstance(fit, RollingFit)
    np.testing.assert_array_equal(np.isnan(fit.coef), np.isnan(ref.params))
    np.testing.assert_allclose(fit.coef, ref.params, rtol=1e-8, atol=1e-10)
    if window > 3:
        np.testing.assert_allclose(fit.se, ref.bse, rtol=1e-8)
    else:
        assert np.isnan(fit.se).all()  # no residual degrees of freedom
    assert (fit.nobs[window - 1:] == window).all() and (fit.nobs[: window - 1] == 0).all()


# source: statsmodels 0.15.0 RollingOLS, batched against one call per model
def test_batched_matches_statsmodels() -> None:
    rng = np.random.default_rng(302)
    M, n, k, w = 5, 80, 4, 26
    ys, Xs = zip(*[_design(rng, n, k) for _ in range(M)])
    fit = rolling_coefficients(np.stack(ys), np.stack(Xs), w)
    assert fit.coef.shape == (M, n, k) and fit.se.shape == (M, n, k) and fit.nobs.shape == (M, n)
    for m in range(M):
        ref = RollingOLS(ys[m], Xs[m], window=w).fit()
        np.testing.assert_allclose(fit.coef[m], ref.params, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(fit.se[m], ref.bse, rtol=1e-8)


# source: statsmodels 0.15.0 RollingOLS for complete full-rank models, OLS refitted on each window where a
# window has a gap or is rank deficient; a batch of several chunks (the work buffers are reused from one
# chunk to the next, the last chunk is shorter) with the gap and the rank-deficient stretch in later chunks
def test_several_chunks_match_statsmodels() -> None:
    from drift.engine import rolling as rolling_mod

    rng = np.random.default_rng(303)
    M, n, k, w = 2 * rolling_mod._CHUNK + 5, 60, 3, 15
    ys, Xs = zip(*[_design(rng, n, k) for _ in range(M)])
    y, X = np.stack(ys), np.stack(Xs)
    y[M - 2, 30] = np.nan  # a gap in the last chunk
    X[rolling_mod._CHUNK + 1, 10:40, 2] = 0.0  # a silent driver: the windows inside are rank deficient
    fit = rolling_coefficients(y, X, w)
    for m in (0, rolling_mod._CHUNK - 1, rolling_mod._CHUNK, M - 1):
        ref = RollingOLS(y[m], X[m], window=w).fit()
        np.testing.assert_allclose(fit.coef[m], ref.params, rtol=1e-8, atol=1e-10)
        np.testing.assert_allclose(fit.se[m], ref.bse, rtol=1e-8)
    for m in (rolling_mod._CHUNK + 1, M - 2):
        for t in range(w - 1, n):
            rows = slice(t - w + 1, t + 1)
            if np.isnan(y[m, rows]).any() or np.linalg.matrix_rank(X[m, rows]) < k:
                assert np.isnan(fit.coef[m, t]).all() and np.isnan(fit.se[m, t]).all()
            else:
                ols = sm.OLS(y[m, rows], X[m, rows]).fit()
                np.testing.assert_allclose(fit.coef[m, t], ols.params, rtol=1e-8, atol=1e-10)
                np.testing.assert_allclose(fit.se[m, t], ols.bse, rtol=1e-8)


# oracle: statsmodels OLS refitted on each window (plain loop)
def test_nan_windows_and_rank_deficient_windows() -> None:
    rng = np.random.default_rng(303)
    n, w = 60, 12
    y, X = _design(rng, n, 3)
    y[20] = np.nan
    X[40:55, 2] = 0.0  # driver silent: windows inside are rank deficient
    fit = rolling_coefficients(y, X, w)
    for t in range(w - 1, n):
        rows = slice(t - w + 1, t + 1)
        if np.isnan(y[rows]).any() or np.linalg.matrix_rank(X[rows]) < 3:
            assert np.isnan(fit.coef[t]).all() and np.isnan(fit.se[t]).all()
        else:
            ols = sm.OLS(y[rows], X[rows]).fit()
            np.testing.assert_allclose(fit.coef[t], ols.params, rtol=1e-8, atol=1e-10)
            np.testing.assert_allclose(fit.se[t], ols.bse, rtol=1e-8)
    assert fit.nobs[25] == w - 1


# common practice, no source: rescaling a driver rescales its coefficient and standard error only
def test_scaling_invariance() -> None:
    rng = np.random.default_rng(304)
    y, X = _design(rng, 70, 3)
    X2 = X.copy()
    X2[:, 2] *= 1e-4
    a, b = rolling_coefficients(y, X, 20), rolling_coefficients(y, X2, 20)
    np.testing.assert_allclose(b.coef[19:, 2] * 1e-4, a.coef[19:, 2], rtol=1e-9)
    np.testing.assert_allclose(b.se[19:, 2] * 1e-4, a.se[19:, 2], rtol=1e-9)
    np.testing.assert_allclose(b.coef[19:, :2], a.coef[19:, :2], rtol=1e-9)


# robustness (common practice, no source)
def test_degenerate_models_and_errors() -> None:
    rng = np.random.default_rng(305)
    ys, Xs = zip(*[_design(rng, 30, 2) for _ in range(3)])
    y, X = np.stack(ys), np.stack(Xs)
    y[1] = np.nan
    X[2, :, 1] = 1.0  # collinear with the constant everywhere
    fit = rolling_coefficients(y, X, 10)
    assert np.isfinite(fit.coef[0, 9:]).all()
    assert np.isnan(fit.coef[1:]).all() and np.isnan(fit.se[1:]).all()
    with pytest.raises(InsufficientDataError):
        rolling_coefficients(y[0], X[0], 31)
    with pytest.raises(ValueError, match="window"):
        rolling_coefficients(y[0], X[0], 1)
    with pytest.raises(TypeError, match="window"):
        rolling_coefficients(y[0], X[0], 10.0)  # type: ignore[arg-type]


# source: statsmodels 0.15.0 RollingOLS (bse); standard errors asked for some columns only: those columns'
# are the full call's, the others NaN, the coefficients unchanged
def test_standard_errors_of_some_columns() -> None:
    rng = np.random.default_rng(305)
    y, X = _design(rng, 80, 4)
    full = rolling_coefficients(y, X, 20)
    part = rolling_coefficients(y, X, 20, se_columns=[3, 1])
    ref = RollingOLS(y, X, window=20).fit()
    np.testing.assert_array_equal(part.coef, full.coef)
    np.testing.assert_array_equal(part.se[:, [1, 3]], full.se[:, [1, 3]])
    np.testing.assert_allclose(part.se[:, [1, 3]], ref.bse[:, [1, 3]], rtol=1e-8)
    assert np.isnan(part.se[:, [0, 2]]).all()
    assert np.isnan(rolling_coefficients(y, X, 20, se_columns=[]).se).all()
    with pytest.raises(ValueError, match="se_columns"):
        rolling_coefficients(y, X, 20, se_columns=[4])
