"""Recursive least squares and recursive residuals (drift.engine.recursive)."""

from __future__ import annotations

import mpmath as mp
import numpy as np
import pytest
import statsmodels.api as sm

from drift.engine.recursive import RecursiveFit, recursive_fit, recursive_residuals


def _design(rng: np.random.Generator, n: int = 60, k: int = 3) -> tuple[np.ndarray, np.ndarray]:
    X = np.column_stack([np.ones(n), rng.normal(size=(n, k - 1))])
    y = X @ np.arange(1.0, k + 1.0) + rng.normal(size=n)
    return y, X


def _oracle_lstsq(y: np.ndarray, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-step numpy lstsq on the prefix of usable rows (plain loop; test oracle)."""
    n, k = X.shape
    ok = np.isfinite(y) & np.isfinite(X).all(axis=1)
    w = np.full(n, np.nan)
    coef = np.full((n, k), np.nan)
    for t in range(n):
        prev = np.flatnonzero(ok[:t])
        Xp, yp = X[prev], y[prev]
        if ok[t] and prev.size and np.linalg.matrix_rank(Xp) == k:
            b = np.linalg.lstsq(Xp, yp, rcond=None)[0]
            f = np.sqrt(1.0 + X[t] @ np.linalg.solve(Xp.T @ Xp, X[t]))
            w[t] = (y[t] - X[t] @ b) / f
        cur = np.flatnonzero(ok[: t + 1])
        if cur.size and np.linalg.matrix_rank(X[cur]) == k:
            coef[t] = np.linalg.lstsq(X[cur], y[cur], rcond=None)[0]
    return w, coef


# source: statsmodels 0.15.0 RecursiveLS (resid_recursive, recursive_coefficients.filtered)
def test_matches_statsmodels_recursive_ls_unbatched() -> None:
    rng = np.random.default_rng(101)
    y, X = _design(rng, 80, 4)
    fit = recursive_fit(y, X)
    res = sm.RecursiveLS(y, X).fit()
    k = 4
    assert isinstance(fit, RecursiveFit)
    assert np.isnan(fit.resid[:k]).all() and fit.first == k
    np.testing.assert_allclose(fit.resid[k:], res.resid_recursive[k:], rtol=0, atol=1e-8)
    np.testing.assert_allclose(fit.coef[k:], res.recursive_coefficients.filtered.T[k:], rtol=0, atol=1e-8)
    np.testing.assert_array_equal(recursive_residuals(y, X), fit.resid)


# source: statsmodels 0.15.0 RecursiveLS, batch of models against one call per model
def test_matches_statsmodels_batched() -> None:
    rng = np.random.default_rng(102)
    M, n, k = 5, 50, 3
    ys, Xs = zip(*[_design(rng, n, k) for _ in range(M)])
    y, X = np.stack(ys), np.stack(Xs)
    fit = recursive_fit(y, X)
    assert fit.resid.shape == (M, n) and fit.coef.shape == (M, n, k) and fit.first.shape == (M,)
    for m in range(M):
        res = sm.RecursiveLS(y[m], X[m]).fit()
        np.testing.assert_allclose(fit.resid[m, k:], res.resid_recursive[k:], rtol=0, atol=1e-8)


# source: Brown, Durbin & Evans (1975): sum of squared recursive residuals = full-sample OLS RSS;
# statsmodels 0.15.0 OLS for the end-of-sample coefficients and the prefix standard errors
def test_rss_identity_and_final_coefficients() -> None:
    rng = np.random.default_rng(103)
    y, X = _design(rng, 70, 3)
    fit = recursive_fit(y, X)
    ols = sm.OLS(y, X).fit()
    assert np.nansum(fit.resid**2) == pytest.approx(ols.ssr, rel=1e-12)
    assert fit.rss[-1] == pytest.approx(ols.ssr, rel=1e-12)
    np.testing.assert_allclose(fit.coef[-1], ols.params, rtol=1e-12)
    np.testing.assert_allclose(fit.coef_se[-1], ols.bse, rtol=1e-10)
    pre = sm.OLS(y[:20], X[:20]).fit()
    np.testing.assert_allclose(fit.coef_se[19], pre.bse, rtol=1e-10)
    assert fit.nobs[19] == 20
    assert np.isnan(fit.coef_se[2]).all()  # n_t = k: no residual degrees of freedom


# common practice, no source: forecast error and scale definitions
def test_forecast_error_and_scale() -> None:
    rng = np.random.default_rng(104)
    y, X = _design(rng, 40, 3)
    fit = recursive_fit(y, X)
    for t in (3, 10, 39):
        b = np.linalg.lstsq(X[:t], y[:t], rcond=None)[0]
        assert fit.forecast_error[t] == pytest.approx(y[t] - X[t] @ b, rel=1e-10)
        f = np.sqrt(1 + X[t] @ np.linalg.solve(X[:t].T @ X[:t], X[t]))
        assert fit.scale[t] == pytest.approx(f, rel=1e-12)
    np.testing.assert_allclose(fit.resid * fit.scale, fit.forecast_error, rtol=1e-14)


def _mp_recursive(y: np.ndarray, X: np.ndarray, dps: int = 50) -> np.ndarray:
    """Recursive residuals from the normal equations in 50-digit arithmetic (test oracle)."""
    with mp.workdps(dps):
        n, k = X.shape
        out = np.full(n, np.nan)
        for t in range(k, n):
            A = mp.matrix([[mp.mpf(float(v)) for v in r] for r in X[:t]])
            yy = mp.matrix([mp.mpf(float(v)) for v in y[:t]])
            XtX = A.T * A
            b = mp.lu_solve(XtX, A.T * yy)
            x = mp.matrix([mp.mpf(float(v)) for v in X[t]])
            e = mp.mpf(float(y[t])) - (x.T * b)[0]
            f = mp.sqrt(1 + (x.T * mp.lu_solve(XtX, x))[0])
            out[t] = float(e / f)
        return out


# source: high-precision reference (mpmath, 50 digits), ill-conditioned design
def test_ill_conditioned_design_matches_mpmath() -> None:
    rng = np.random.default_rng(105)
    n = 40
    const = 1e-3 * np.ones(n)  # driver scales 1e-3 vs 1e5
    big = 1e5 * rng.normal(size=n)
    near = 1e5 * (1.0 + 1e-5 * rng.normal(size=n))  # nearly collinear with the constant at the start
    near[10:] += 1e5 * rng.normal(size=n - 10)
    X = np.column_stack([const, big, near])
    y = X @ np.array([1e3, 2e-5, 3e-5]) + rng.normal(size=n)
    assert np.linalg.cond(X[:6]) > 1e10
    ref = _mp_recursive(y, X)
    w = recursive_fit(y, X).resid
    assert np.nanmax(np.abs(w - ref)) / np.nanmax(np.abs(ref)) < 1e-10
    np.testing.assert_array_equal(np.isnan(w), np.isnan(ref))


# oracle: per-model loop over the unbatched function on the usable rows only
def test_ragged_starts_and_gaps_match_per_model_loop() -> None:
    rng = np.random.default_rng(106)
    M, n, k = 4, 45, 3
    ys, Xs = zip(*[_design(rng, n, k) for _ in range(M)])
    y, X = np.stack(ys), np.stack(Xs)
    y[0, :7] = np.nan  # ragged start
    X[1, :3, 1] = np.nan
    y[2, [12, 13, 30]] = np.nan  # gaps
    X[3, 20, 2] = np.nan
    fit = recursive_fit(y, X)
    for m in range(M):
        ok = np.isfinite(y[m]) & np.isfinite(X[m]).all(axis=1)
        sub = recursive_fit(y[m, ok], X[m, ok])
        np.testing.assert_allclose(fit.resid[m, ok], sub.resid, rtol=1e-12, atol=1e-12)
        assert np.isnan(fit.resid[m, ~ok]).all()
        np.testing.assert_array_equal(fit.nobs[m], np.cumsum(ok))
        # coefficients carry forward over a skipped row
        for t in np.flatnonzero(~ok):
            if t > 0 and np.isfinite(fit.coef[m, t - 1]).all():
                np.testing.assert_array_equal(fit.coef[m, t], fit.coef[m, t - 1])
    assert fit.first[0] == 7 + k and fit.first[1] == 3 + k


# oracle: per-step numpy lstsq and matrix_rank on the prefix
def test_rank_deficient_start_extends_initial_window() -> None:
    rng = np.random.default_rng(107)
    n = 40
    X = np.column_stack([np.ones(n), rng.normal(size=n), rng.normal(size=n)])
    X[:6, 2] = 0.0  # driver not yet observed as anything but zero
    X[:6, 1] = 2.0 * X[:6, 0]  # and a collinear pair at the start
    y = X @ np.array([1.0, 0.5, -1.0]) + rng.normal(size=n)
    fit = recursive_fit(y, X)
    w_ref, coef_ref = _oracle_lstsq(y, X)
    np.testing.assert_array_equal(np.isnan(fit.resid), np.isnan(w_ref))
    assert fit.first == int(np.flatnonzero(np.isfinite(w_ref))[0])
    np.testing.assert_allclose(fit.resid, w_ref, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(fit.coef, coef_ref, rtol=1e-9, atol=1e-9)
    # sum of w^2 = full RSS minus the RSS of the initial (extended) window
    ols = sm.OLS(y, X).fit()
    start = fit.first - 1
    assert np.nansum(fit.resid**2) == pytest.approx(ols.ssr - fit.rss[start], rel=1e-10)


# common practice, no source: recursive residuals are invariant to rescaling a regressor
def test_scaling_a_driver_leaves_residuals_unchanged() -> None:
    rng = np.random.default_rng(108)
    y, X = _design(rng, 60, 3)
    X2 = X.copy()
    X2[:, 1] *= 1e4
    X2[:, 2] *= 1e-3
    a, b = recursive_fit(y, X), recursive_fit(y, X2)
    np.testing.assert_allclose(a.resid, b.resid, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(a.coef[-1, 1], b.coef[-1, 1] * 1e4, rtol=1e-10)


# robustness sweep (common practice, no source): only NaN results, never a foreign exception
@pytest.mark.parametrize("case", ["all_nan", "tiny", "constant_col", "zero_col", "duplicate_cols"])
def test_robustness(case: str) -> None:
    rng = np.random.default_rng(109)
    n, k = 12, 3
    y, X = _design(rng, n, k)
    if case == "all_nan":
        y[:] = np.nan
    elif case == "tiny":
        y, X = y[:2], X[:2]
    elif case == "constant_col":
        X[:, 2] = 1.0  # collinear with the intercept throughout
    elif case == "zero_col":
        X[:, 1] = 0.0
    elif case == "duplicate_cols":
        X[:, 2] = X[:, 1]
    fit = recursive_fit(y, X)
    assert np.isnan(fit.resid).all() and np.isnan(fit.coef).all() and fit.first == -1


def test_batch_with_one_degenerate_model() -> None:
    rng = np.random.default_rng(110)
    ys, Xs = zip(*[_design(rng, 30, 3) for _ in range(3)])
    y, X = np.stack(ys), np.stack(Xs)
    y[1] = np.nan
    fit = recursive_fit(y, X)
    assert fit.first.tolist() == [3, -1, 3]
    single = recursive_fit(y[2], X[2])
    np.testing.assert_allclose(fit.resid[2], single.resid, rtol=1e-13, atol=1e-13)


@pytest.mark.parametrize(
    "y, X, exc",
    [
        (np.zeros((2, 3, 4)), np.zeros((2, 3, 4)), ValueError),  # y 3-D
        (np.zeros(5), np.zeros((2, 5, 1)), ValueError),  # X not 2-D for 1-D y
        (np.zeros(5), np.zeros((4, 1)), ValueError),  # length mismatch
        (np.array([1.0, np.inf, 2.0]), np.ones((3, 1)), ValueError),  # inf
        (np.zeros(3), np.zeros((3, 0)), ValueError),  # no regressor
    ],
)
def test_bad_arguments(y: np.ndarray, X: np.ndarray, exc: type[Exception]) -> None:
    with pytest.raises(exc):
        recursive_fit(y, X)


@pytest.mark.parametrize("tol", [0.0, 1.0, -1e-3, "1e-10"])
def test_bad_rank_tol(tol: object) -> None:
    with pytest.raises(ValueError, match="rank_tol"):
        recursive_fit(np.zeros(5), np.ones((5, 1)), rank_tol=tol)  # type: ignore[arg-type]


# source: statsmodels 0.15.0 RecursiveLS (resid_recursive, recursive_coefficients.filtered), one call per
# model, against the residual-only recursion and the fit without standard errors on a batch with gaps, a
# ragged start and a rank-deficient start
def test_residual_only_and_no_se_paths_match_statsmodels() -> None:
    rng = np.random.default_rng(111)
    M, n, k = 6, 70, 4
    ys, Xs = zip(*[_design(rng, n, k) for _ in range(M)])
    y, X = np.stack(ys), np.stack(Xs)
    y[1, :5] = np.nan  # ragged start
    y[2, [20, 21, 40]] = np.nan  # gaps
    X[3, :6, 3] = 0.0  # a driver seen only as zero at first: the initial window is extended
    w = recursive_residuals(y, X)
    fast = recursive_fit(y, X, coef_se=False)
    full = recursive_fit(y, X)
    np.testing.assert_array_equal(w, full.resid)  # the same recursion, the same numbers
    np.testing.assert_array_equal(fast.resid, full.resid)
    np.testing.assert_array_equal(fast.forecast_error, full.forecast_error)
    np.testing.assert_array_equal(fast.rss, full.rss)
    np.testing.assert_allclose(fast.coef, full.coef, rtol=1e-10, atol=1e-12)  # back substitution vs R^-1
    assert np.isnan(fast.coef_se).all()
    for m in (0, 4, 5):  # complete models: statsmodels' Kalman filter on the same rows
        res = sm.RecursiveLS(y[m], X[m]).fit()
        np.testing.assert_allclose(w[m, k:], res.resid_recursive[k:], rtol=0, atol=1e-8)
        np.testing.assert_allclose(fast.coef[m, k:], res.recursive_coefficients.filtered.T[k:], rtol=0,
                                   atol=1e-8)
    for m in (1, 2):  # gaps: statsmodels on the usable rows only
        ok = np.isfinite(y[m])
        res = sm.RecursiveLS(y[m, ok], X[m, ok]).fit()
        np.testing.assert_allclose(w[m, ok][k:], res.resid_recursive[k:], rtol=0, atol=1e-8)
    assert np.isnan(w[m, ~ok]).all()
    # unbatched input gives one model's residuals (to rounding: alone, it leaves the guarded start sooner)
    np.testing.assert_allclose(recursive_residuals(y[0], X[0]), w[0], rtol=1e-12, atol=1e-13)


# common practice, no source: values near the overflow bound take the hypot path and agree with a scaled copy
def test_large_values_use_the_overflow_safe_rotations() -> None:
    rng = np.random.default_rng(112)
    y, X = _design(rng, 40, 3)
    big = 1e120
    w = recursive_residuals(y * big, X * big)
    np.testing.assert_allclose(w[3:] / big, recursive_residuals(y, X)[3:], rtol=1e-9)


# source: statsmodels 0.15.0 RecursiveLS (recursive_coefficients.filtered, resid_recursive) at the row asked
# for; the fit with coefficients at one row per model gives the same residuals, forecast errors and rss as
# the full path, and the full path's coefficients (and standard errors) at that row, NaN elsewhere
def test_coefficients_at_one_row_per_model() -> None:
    rng = np.random.default_rng(113)
    M, n, k = 5, 60, 3
    ys, Xs = zip(*[_design(rng, n, k) for _ in range(M)])
    y, X = np.stack(ys), np.stack(Xs)
    y[1, :4] = np.nan  # ragged start
    at = np.array([40, 40, 1, 59, 25])  # row 1 of model 2 is before full rank: NaN there as in the full path
    full = recursive_fit(y, X)
    for coef_se in (True, False):
        part = recursive_fit(y, X, coef_se=coef_se, coef_at=at)
        for name in ("resid", "forecast_error", "scale", "rss", "nobs", "first"):
            np.testing.assert_array_equal(getattr(part, name), getattr(full, name), err_msg=name)
        for i, t in enumerate(at):
            np.testing.assert_allclose(part.coef[i, t], full.coef[i, t], rtol=1e-12, atol=1e-14)
            if coef_se:
                np.testing.assert_array_equal(part.coef_se[i, t], full.coef_se[i, t])
            assert np.isnan(np.delete(part.coef[i], t, axis=0)).all()
            assert np.isnan(np.delete(part.coef_se[i], t, axis=0)).all()
    assert np.isnan(part.coef[2, 1]).all()
    for i in (0, 3, 4):  # complete models: statsmodels' Kalman filter on the same rows
        res = sm.RecursiveLS(y[i], X[i]).fit()
        np.testing.assert_allclose(part.coef[i, at[i]], res.recursive_coefficients.filtered[:, at[i]], rtol=0,
                                   atol=1e-8)
    one = recursive_fit(y[0], X[0], coef_at=30)  # unbatched, a plain int
    np.testing.assert_allclose(one.coef[30], full.coef[0, 30], rtol=1e-12)


@pytest.mark.parametrize("bad", [np.array([1.5, 2.0]), np.array([1, 2, 3]), np.zeros((2, 1), int), True])
def test_bad_coef_at(bad: object) -> None:
    y, X = np.zeros((2, 10)), np.ones((2, 10, 1))
    with pytest.raises(ValueError, match="coef_at"):
        recursive_fit(y, X, coef_at=bad)
