"""CUSUM, CUSUM of squares and OLS-residual CUSUM (drift.engine.cusum)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.stats.diagnostic import breaks_cusumolsresid

from drift.engine.cusum import CusumResult, cusum, cusum_squares, ols_cusum
from drift.engine.recursive import recursive_fit
from drift.engine.tables.bde import CUSUM_A
from drift.exceptions import InsufficientDataError


def _design(rng: np.random.Generator, n: int = 80, k: int = 3) -> tuple[np.ndarray, np.ndarray]:
    X = np.column_stack([np.ones(n), rng.normal(size=(n, k - 1))])
    y = X @ np.arange(1.0, k + 1.0) + rng.normal(size=n)
    return y, X


# source: statsmodels 0.15.0 RecursiveLS (cusum, cusum_squares and their significance bounds)
def test_paths_and_bounds_match_statsmodels() -> None:
    rng = np.random.default_rng(201)
    n, k = 90, 3
    y, X = _design(rng, n, k)
    w = recursive_fit(y, X).resid
    res = sm.RecursiveLS(y, X).fit()
    c, s = cusum(w, k=k), cusum_squares(w, k=k)
    assert isinstance(c, CusumResult)
    np.testing.assert_allclose(c.path[k:], res.cusum, rtol=0, atol=1e-8)
    np.testing.assert_allclose(s.path[k:], res.cusum_squares, rtol=0, atol=1e-8)
    assert np.isnan(c.path[:k]).all() and np.isnan(s.path[:k]).all()
    pts = np.arange(k + 1, n + 1)  # BDE's r = k+1..T (1-based)
    for lvl in (0.05, 0.01):  # statsmodels' 10% CUSUM bound uses 0.950, not 0.850: not compared
        lo, hi = res._cusum_significance_bounds(lvl, points=pts)
        np.testing.assert_allclose(c.bounds[lvl][k:], hi, rtol=1e-12)
        np.testing.assert_allclose(c.lower_bounds[lvl][k:], lo, rtol=1e-12)
        lo, hi = res._cusum_squares_significance_bounds(lvl, points=pts)
        np.testing.assert_allclose(s.bounds[lvl][k:], hi, rtol=1e-12)
        np.testing.assert_allclose(s.lower_bounds[lvl][k:], lo, rtol=1e-12)
    # the 10% trap (REFERENCES.md): statsmodels' line is 0.950/0.850 times ours
    _, hi10 = res._cusum_significance_bounds(0.10, points=pts)
    np.testing.assert_allclose(hi10 / c.bounds[0.10][k:], 0.950 / CUSUM_A[0.10], rtol=1e-12)


# source: statsmodels 0.15.0 RecursiveLS, batched against one call per model
def test_batched_matches_statsmodels_and_loop() -> None:
    rng = np.random.default_rng(202)
    M, n, k = 4, 60, 3
    ys, Xs = zip(*[_design(rng, n, k) for _ in range(M)])
    w = recursive_fit(np.stack(ys), np.stack(Xs)).resid
    cb, sb = cusum(w, k=k), cusum_squares(w, k=k)
    assert cb.path.shape == (M, n) and cb.statistic.shape == (M,)
    for m in range(M):
        res = sm.RecursiveLS(ys[m], Xs[m]).fit()
        np.testing.assert_allclose(cb.path[m, k:], res.cusum, rtol=0, atol=1e-8)
        np.testing.assert_allclose(sb.path[m, k:], res.cusum_squares, rtol=0, atol=1e-8)
        c1, s1 = cusum(w[m], k=k), cusum_squares(w[m], k=k)
        assert c1.statistic == pytest.approx(cb.statistic[m], rel=1e-14)
        assert s1.pvalue == pytest.approx(sb.pvalue[m], rel=1e-14)
        for lvl in (0.10, 0.05, 0.01):
            assert c1.first_crossing[lvl] == cb.first_crossing[lvl][m]
            assert s1.first_crossing[lvl] == sb.first_crossing[lvl][m]


# source: Brown, Durbin & Evans (1975), definitions of the statistic, lines and crossing probability
def test_statistic_crossing_and_pvalue_are_consistent() -> None:
    rng = np.random.default_rng(203)
    M, n, k = 40, 60, 2
    X = np.concatenate([np.ones((M, n, 1)), rng.normal(size=(M, n, 1))], axis=2)
    shift = np.where(np.arange(n) >= 35, 1.5, 0.0)
    y = X[:, :, 1] + rng.normal(size=(M, n)) + shift * (np.arange(M)[:, None] % 2)
    w = recursive_fit(y, X).resid
    c = cusum(w, k=k)
    s = cusum_squares(w, k=k)
    for lvl, a in c.critical_values.items():
        crossed = c.first_crossing[lvl] >= 0
        np.testing.assert_array_equal(crossed, c.statistic > a)
        # p-value below the level exactly when the statistic exceeds the tabulated a (to 3 decimals)
        far = np.abs(c.statistic - a) > 2e-3
        np.testing.assert_array_equal((c.pvalue < lvl)[far], (c.statistic > a)[far])
        np.testing.assert_array_equal(s.first_crossing[lvl] >= 0, s.statistic > s.critical_values[lvl])
        far = np.abs(s.statistic - s.critical_values[lvl]) > 1e-9
        np.testing.assert_array_equal((s.pvalue < lvl)[far], (s.statistic > s.critical_values[lvl])[far])
    # direct definition of the statistic
    m = 0
    wd = w[m, k:]
    W = np.cumsum(wd) / np.std(wd, ddof=1)
    r = np.arange(1, wd.size + 1)
    ref = np.max(np.abs(W) / (np.sqrt(wd.size) * (1 + 2 * r / wd.size)))
    assert c.statistic[m] == pytest.approx(ref, rel=1e-13)
    sq = np.cumsum(wd**2) / np.sum(wd**2)
    assert s.statistic[m] == pytest.approx(np.max(np.abs(sq - r / wd.size)), rel=1e-13)
    # the first crossing is really the first index where |W| leaves the band
    t = c.first_crossing[0.05][1]
    if t >= 0:
        assert abs(c.path[1, t]) > c.bounds[0.05][1, t]
        inside = np.abs(c.path[1, k:t]) <= c.bounds[0.05][1, k:t]
        assert inside.all()


# common practice, no source: residual NaN gaps are skipped (the defined residuals, in order, are used)
def test_gaps_are_skipped() -> None:
    rng = np.random.default_rng(204)
    w = rng.normal(size=50)
    w[:3] = np.nan
    wg = w.copy()
    wg[[10, 20]] = np.nan
    a = cusum(wg[np.isfinite(wg)])
    b = cusum(wg)
    assert a.statistic == pytest.approx(b.statistic, rel=1e-14)
    np.testing.assert_allclose(b.path[np.isfinite(wg)], a.path, rtol=1e-14)
    assert np.isnan(b.path[[0, 1, 2, 10, 20]]).all()


# common practice, no source: scaling a driver leaves the CUSUM statistics unchanged
def test_scaling_invariance() -> None:
    rng = np.random.default_rng(205)
    y, X = _design(rng, 70, 3)
    X2 = X * np.array([1.0, 1e5, 1e-3])
    w1, w2 = recursive_fit(y, X).resid, recursive_fit(y, X2).resid
    assert cusum(w1).statistic == pytest.approx(cusum(w2).statistic, rel=1e-9)
    assert cusum_squares(w1).statistic == pytest.approx(cusum_squares(w2).statistic, rel=1e-9)
    # rescaling y scales w but leaves both statistics unchanged
    w3 = recursive_fit(1e3 * y, X).resid
    assert cusum(w3).pvalue == pytest.approx(cusum(w1).pvalue, rel=1e-9)


# source: REFERENCES.md [C]; Nile flow, constant-only regression, Ploberger & Kramer (1992) statistic
def test_ols_cusum_nile() -> None:
    nile = sm.datasets.nile.load_pandas().data["volume"].to_numpy(dtype=float)
    u = sm.OLS(nile, np.ones_like(nile)).fit().resid
    r = ols_cusum(u, ddof=1)
    assert r.statistic == pytest.approx(2.9518, abs=5e-5)
    assert r.pvalue == pytest.approx(5.409e-08, rel=1e-3)
    assert r.nobs == 100
    assert r.critical_values[0.05] == pytest.approx(1.3581)
    assert 20 <= r.break_index <= 35  # the supremum sits near the 1898 break (index 27/28)


# source: statsmodels 0.15.0 breaks_cusumolsresid, batched
@pytest.mark.parametrize("ddof", [0, 2])
def test_ols_cusum_matches_statsmodels(ddof: int) -> None:
    rng = np.random.default_rng(206)
    U = rng.normal(size=(6, 50)) + np.linspace(0, 1, 50) * np.arange(6)[:, None] * 0.2
    r = ols_cusum(U, ddof=ddof)
    for m in range(6):
        stat, p, _ = breaks_cusumolsresid(U[m], ddof=ddof)
        assert r.statistic[m] == pytest.approx(stat, rel=1e-13)
        assert r.pvalue[m] == pytest.approx(p, rel=1e-10, abs=1e-300)


# robustness (common practice, no source)
def test_insufficient_and_degenerate() -> None:
    with pytest.raises(InsufficientDataError):
        cusum(np.array([np.nan, 1.0]))
    with pytest.raises(InsufficientDataError):
        cusum_squares(np.array([np.nan, 1.0, 2.0, 0.5, 0.1]))
    with pytest.raises(InsufficientDataError):
        ols_cusum(np.array([1.0]), ddof=1)
    w = np.full((3, 20), np.nan)
    w[0, 5:] = np.random.default_rng(207).normal(size=15)
    w[1, :4] = 1.0  # too few for the CUSUM of squares and constant for the CUSUM
    c, s = cusum(w), cusum_squares(w)
    assert np.isfinite(c.statistic[0]) and np.isnan(c.statistic[1:]).all()
    assert np.isfinite(s.statistic[0]) and np.isnan(s.statistic[1:]).all()
    assert (c.first_crossing[0.05][1:] == -1).all() and (s.first_crossing[0.05][1:] == -1).all()
    z = ols_cusum(np.zeros((2, 10)))
    assert np.isnan(z.statistic).all() and np.isnan(z.pvalue).all()


def test_bad_arguments() -> None:
    w = np.random.default_rng(208).normal(size=30)
    with pytest.raises(ValueError, match="levels"):
        cusum(w, levels=(0.05, 1.5))
    with pytest.raises(ValueError, match="level"):
        cusum_squares(w, levels=(0.03,))
    with pytest.raises(ValueError, match="k"):
        cusum(w, k=-1)
    with pytest.raises(ValueError, match="w"):
        cusum(np.zeros((2, 2, 2)))
    with pytest.raises(ValueError, match="ddof"):
        ols_cusum(w, ddof=-1)
    with pytest.raises(TypeError, match="levels"):
        cusum(w, levels=0.05)  # type: ignore[arg-type]
    # any level in (0, 1) works for the CUSUM (solved from the BDE equation)
    assert cusum(w, levels=(0.2,)).critical_values[0.2] == pytest.approx(0.7, abs=0.05)


# source: REFERENCES.md [C]: finite-sample size of the BDE CUSUM at nominal 5% is below nominal
@pytest.mark.slow
def test_monte_carlo_size_and_power() -> None:
    rng = np.random.default_rng(209)
    M, n = 2000, 100
    X = np.concatenate([np.ones((M, n, 1)), rng.normal(size=(M, n, 1))], axis=2)
    y0 = X @ np.array([1.0, 0.5]) + rng.normal(size=(M, n))
    w0 = recursive_fit(y0, X).resid
    size = cusum(w0).reject(0.05).mean()
    se = np.sqrt(0.05 * 0.95 / M)
    assert size <= 0.05 + 3 * se
    size_sq = cusum_squares(w0).reject(0.05).mean()
    assert size_sq <= 0.075 + 3 * se  # Edgerton-Wells values run slightly liberal (REFERENCES.md)
    # power: intercept shift of 1.5 sd after 40% of the sample
    y1 = y0 + np.where(np.arange(n) >= 40, 1.5, 0.0)
    power = cusum(recursive_fit(y1, X).resid).reject(0.05).mean()
    assert power > 0.9
