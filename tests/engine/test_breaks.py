"""Tests of drift.engine.breaks: Chow, predictive failure, sup-F (ave/exp) and Nyblom-Hansen L_c."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats
from statsmodels.datasets import nile
from statsmodels.stats.diagnostic import breaks_hansen

from drift.engine.breaks import chow, nyblom, predictive_failure, sup_f
from drift.engine.tables import andrews as andrews_tables
from drift.engine.tables import nyblom as nyblom_tables
from drift.exceptions import InsufficientDataError


@pytest.fixture(scope="module")
def nile_y() -> np.ndarray:
    return nile.load_pandas().data["volume"].to_numpy(dtype=float)


def _data(rng: np.random.Generator, M: int, n: int, k: int) -> tuple[np.ndarray, np.ndarray]:
    X = np.concatenate([np.ones((M, n, 1)), rng.standard_normal((M, n, k - 1))], axis=2)
    y = X @ rng.standard_normal(k) + rng.standard_normal((M, n))
    return y, X


# ---------------------------------------------------------------- Nile known answers
def test_nile_chow(nile_y: np.ndarray) -> None:
    # REFERENCES.md [C]: Nile, break after 1898 (Cobb 1978, Biometrika 65(2)): F(1, 98) = 75.930, p = 7.4e-14
    r = chow(nile_y, np.ones((100, 1)), 28)
    assert r.statistic == pytest.approx(75.930, abs=5e-4)
    assert r.pvalue == pytest.approx(7.4e-14, rel=0.01)
    assert r.params["df"] == (1, 98)
    # REFERENCES.md [C]: RSS 2,835,156.75 (no break), 1,597,457.19 (break at 1898)
    S, S1, S2 = r.params["rss"]
    assert S == pytest.approx(2_835_156.75, abs=0.01)
    assert S1 + S2 == pytest.approx(1_597_457.19, abs=0.01)
    assert r.critical_values[0.05] == pytest.approx(stats.f.isf(0.05, 1, 98))


def test_nile_sup_f(nile_y: np.ndarray) -> None:
    # REFERENCES.md [C]: the break is at index 28; sup-F equals the Chow F there (k = 1: chi2 = F scale)
    r = sup_f(nile_y, np.ones((100, 1)))
    assert r.break_index == 28
    assert r.statistic == pytest.approx(75.930, abs=5e-4)
    assert r.pvalue < 1e-6 and r.ave_pvalue < 1e-3 and r.exp_pvalue < 1e-6
    assert r.critical_values == {0.10: 7.12, 0.05: 8.68, 0.01: 12.16}
    cand = ~np.isnan(r.f_path)
    assert np.flatnonzero(cand)[[0, -1]].tolist() == [15, 85]  # 15% trimming of n = 100


def test_nile_nyblom_vs_statsmodels(nile_y: np.ndarray) -> None:
    # statsmodels 0.15.0 breaks_hansen; REFERENCES.md: Nile L_c = 3.08
    X = np.ones((100, 1))
    ref, _ = breaks_hansen(sm.OLS(nile_y, X).fit())
    r = nyblom(nile_y, X)
    assert r.statistic == pytest.approx(ref, rel=1e-10)
    assert r.statistic == pytest.approx(3.08, abs=0.005)
    assert r.critical_values == {0.10: 0.6070, 0.05: 0.7475, 0.01: 1.0737}
    assert r.pvalue < 0.01
    assert r.individual.shape == (1,)


# ---------------------------------------------------------------- statsmodels oracles
def test_chow_and_predictive_failure_match_three_ols() -> None:
    # statsmodels 0.15.0 OLS: three regressions per model, formulas of Chow (1960)
    rng = np.random.default_rng(1)
    y, X = _data(rng, 4, 60, 3)
    at = np.array([10, 25, 40, 50])
    c = chow(y, X, at)
    pf = predictive_failure(y, X, at)
    for i in range(4):
        S = sm.OLS(y[i], X[i]).fit().ssr
        S1 = sm.OLS(y[i, :at[i]], X[i, :at[i]]).fit().ssr
        S2 = sm.OLS(y[i, at[i]:], X[i, at[i]:]).fit().ssr
        n1, n2, k = at[i], 60 - at[i], 3
        F = ((S - S1 - S2) / k) / ((S1 + S2) / (60 - 2 * k))
        assert c.statistic[i] == pytest.approx(F, rel=1e-10)
        assert c.pvalue[i] == pytest.approx(stats.f.sf(F, k, 60 - 2 * k), rel=1e-8)
        Fp = ((S - S1) / n2) / (S1 / (n1 - k))
        assert pf.statistic[i] == pytest.approx(Fp, rel=1e-10)
        assert pf.pvalue[i] == pytest.approx(stats.f.sf(Fp, n2, n1 - k), rel=1e-8)
    assert c.params["df"][1].tolist() == [54] * 4


def test_predictive_failure_equals_recursive_residuals() -> None:
    # Brown, Durbin & Evans (1975) / REFERENCES.md [C]: S - S1 = sum of post-break squared recursive residuals
    recursive = pytest.importorskip("drift.engine.recursive")
    rng = np.random.default_rng(2)
    y, X = _data(rng, 1, 50, 2)
    at = 35
    fit = recursive.recursive_fit(y[0], X[0])
    pf = predictive_failure(y[0], X[0], at)
    S, S1 = pf.params["rss"]
    assert S - S1 == pytest.approx(np.sum(fit.resid[at:] ** 2), rel=1e-9)


def test_predictive_failure_short_post_segment() -> None:
    # Chow (1960): predictive failure is valid with n2 < k, where the break test is not
    rng = np.random.default_rng(3)
    y, X = _data(rng, 1, 30, 3)
    r = predictive_failure(y[0], X[0], 29)
    assert r.params["df"] == (1, 26)
    with pytest.raises(InsufficientDataError, match="predictive_failure"):
        chow(y[0], X[0], 29)


def test_sup_f_path_equals_chow_at_each_candidate() -> None:
    # oracle: the sup-F path is the Chow F at each candidate date (all coefficients tested)
    rng = np.random.default_rng(4)
    y, X = _data(rng, 2, 40, 2)
    r = sup_f(y, X, 0.2)
    for m in np.flatnonzero(~np.isnan(r.f_path[0])):
        assert r.f_path[0, m] == pytest.approx(chow(y[0], X[0], m).statistic, rel=1e-8)
    assert r.statistic[1] == pytest.approx(2 * np.nanmax(r.f_path[1]))


def test_sup_f_partial_matches_dummy_regression() -> None:
    # oracle: partial break (one tested column) = F test of adding X[:, j] * 1(t >= m), statsmodels OLS
    rng = np.random.default_rng(5)
    y, X = _data(rng, 1, 50, 3)
    r = sup_f(y[0], X[0], 0.15, test_columns=[1])
    S = sm.OLS(y[0], X[0]).fit().ssr
    for m in (10, 25, 40):
        Z = np.column_stack([X[0], X[0, :, 1] * (np.arange(50) >= m)])
        Su = sm.OLS(y[0], Z).fit().ssr
        assert r.f_path[m] == pytest.approx((S - Su) / (Su / (50 - 4)), rel=1e-8)
    assert r.params["q"] == 1 and r.critical_values[0.05] == 8.68


# ---------------------------------------------------------------- tables
@pytest.mark.parametrize("p", [1, 2, 3, 4, 5])
def test_simulated_sup_table_matches_andrews(p: int) -> None:
    # Andrews (1993) Table 1 / corrigendum (2003), via REFERENCES.md: allow ~3% (simulation, discretisation)
    q = andrews_tables.simulated_quantiles("sup", p, 0.15)
    probs = andrews_tables.supf_sim.PROBS
    for lv in (0.10, 0.05, 0.01):
        assert q[probs.index(lv)] == pytest.approx(andrews_tables.SUP_WALD_15[lv][p], rel=0.03)
    pv = andrews_tables.pvalue(np.array([andrews_tables.SUP_WALD_15[0.05][p]]), p, 0.15)
    assert pv[0] == pytest.approx(0.05, abs=0.01)


@pytest.mark.parametrize("m", [1, 2, 3, 4, 5])
def test_simulated_nyblom_table_matches_imhof_values(m: int) -> None:
    # REFERENCES.md [C, Imhof inversion] L_c critical values; our seeded simulation within 2%
    probs = nyblom_tables.nyblom_sim.PROBS
    for lv in (0.10, 0.05, 0.01):
        assert nyblom_tables.nyblom_sim.QUANTILES[m - 1][probs.index(lv)] == pytest.approx(
            nyblom_tables.LC[lv][m], rel=0.02)
    assert nyblom_tables.critical_values(m)[0.05] == nyblom_tables.LC[0.05][m]


def test_nyblom_first_moment() -> None:
    # exact: E int ||B_m||^2 = m / 6; the simulated median is below that and the tail p-value monotone
    pv = nyblom_tables.pvalue(np.array([0.0, 0.1, 0.5, 1.0, 5.0, np.inf, np.nan]), 1)
    assert pv[0] == 1.0 and pv[5] == 0.0 and np.isnan(pv[6])
    assert np.all(np.diff(pv[:5]) < 0)


def test_table_lookups_reject_bad_arguments() -> None:
    with pytest.raises(ValueError, match="trim"):
        andrews_tables.critical_values(1, 0.01)
    with pytest.raises(ValueError, match="p"):
        andrews_tables.critical_values(0)
    with pytest.raises(ValueError, match="m"):
        nyblom_tables.critical_values(99)


def test_trim_interpolation_between_grid_points() -> None:
    # lookup rule (module docstring): linear in ln(lambda) between simulated trims
    a = andrews_tables.simulated_quantiles("sup", 2, 0.15)
    b = andrews_tables.simulated_quantiles("sup", 2, 0.20)
    mid = andrews_tables.simulated_quantiles("sup", 2, 0.175)
    assert np.all((mid <= a + 1e-12) & (mid >= b - 1e-12))


# ---------------------------------------------------------------- noise-free, invariance, batching
def test_noise_free_break_recovered_exactly() -> None:
    # common practice, no source: a noise-free coefficient shift is located exactly
    n = 80
    rng = np.random.default_rng(6)
    x = rng.standard_normal(n)
    X = np.column_stack([np.ones(n), x])
    for at in (20, 41, 60):
        y = np.where(np.arange(n) < at, 1.0 + 2.0 * x, 3.0 - 1.0 * x)
        r = sup_f(y, X)
        assert r.break_index == at
        assert np.isinf(r.statistic) or r.statistic > 1e10
        assert chow(y, X, at).pvalue == pytest.approx(0.0, abs=1e-12)


def test_scaling_a_driver_leaves_statistics_unchanged() -> None:
    # invariance (STYLE.md): rescaling a regressor changes no test statistic
    rng = np.random.default_rng(7)
    y, X = _data(rng, 3, 50, 3)
    X2 = X.copy()
    X2[:, :, 2] *= 1e6
    for f in (lambda X_: chow(y, X_, 20).statistic, lambda X_: predictive_failure(y, X_, 40).statistic,
              lambda X_: sup_f(y, X_).statistic, lambda X_: nyblom(y, X_).statistic,
              lambda X_: nyblom(y, X_).individual):
        np.testing.assert_allclose(f(X2), f(X), rtol=1e-9)


def test_batched_equals_per_model_loop() -> None:
    # oracle: batched results equal a loop of single-model calls, with NaN rows in some models
    rng = np.random.default_rng(8)
    y, X = _data(rng, 5, 45, 2)
    y[1, [3, 17, 30]] = np.nan
    X[2, 5, 1] = np.nan
    rb = sup_f(y, X)
    cb = chow(y, X, 22)
    nb = nyblom(y, X)
    for i in range(5):
        r1 = sup_f(y[i], X[i])
        assert rb.statistic[i] == pytest.approx(r1.statistic, rel=1e-10)
        assert rb.break_index[i] == r1.break_index
        np.testing.assert_allclose(rb.f_path[i], r1.f_path, rtol=1e-10)
        assert rb.exp_f[i] == pytest.approx(r1.exp_f, rel=1e-10)
        assert cb.statistic[i] == pytest.approx(chow(y[i], X[i], 22).statistic, rel=1e-10)
        assert nb.statistic[i] == pytest.approx(nyblom(y[i], X[i]).statistic, rel=1e-10)


def test_nan_rows_are_dropped() -> None:
    # oracle: NaN rows give the same answer as deleting them (break index in input coordinates)
    rng = np.random.default_rng(9)
    y, X = _data(rng, 1, 40, 2)
    y = y[0].copy()
    X = X[0]
    y[[5, 6, 33]] = np.nan
    keep = ~np.isnan(y)
    at = 20
    r = chow(y, X, at)
    r0 = chow(y[keep], X[keep], int(keep[:at].sum()))
    assert r.statistic == pytest.approx(r0.statistic, rel=1e-12)
    assert nyblom(y, X).statistic == pytest.approx(nyblom(y[keep], X[keep]).statistic, rel=1e-12)
    assert nyblom(y, X).statistic == pytest.approx(breaks_hansen(sm.OLS(y[keep], X[keep]).fit())[0], rel=1e-10)


# ---------------------------------------------------------------- robustness
@pytest.mark.parametrize("case", ["tiny", "constant", "collinear", "nan", "allnan", "zero_x"])
@pytest.mark.parametrize("fn", ["chow", "pf", "sup", "nyblom"])
def test_robustness_only_our_exception(case: str, fn: str) -> None:
    rng = np.random.default_rng(10)
    n = {"tiny": 4}.get(case, 30)
    X = np.column_stack([np.ones(n), rng.standard_normal(n)])
    y = rng.standard_normal(n)
    if case == "constant":
        y = np.full(n, 3.0)
    elif case == "collinear":
        X = np.column_stack([X, 2 * X[:, 1]])
    elif case == "nan":
        y[::2] = np.nan
    elif case == "allnan":
        y[:] = np.nan
    elif case == "zero_x":
        X[:, 1] = 0.0
    call = {"chow": lambda: chow(y, X, n // 2), "pf": lambda: predictive_failure(y, X, n // 2),
            "sup": lambda: sup_f(y, X), "nyblom": lambda: nyblom(y, X)}[fn]
    try:
        r = call()
    except InsufficientDataError:
        return
    assert np.all(np.isnan(r.pvalue) | ((r.pvalue >= 0) & (r.pvalue <= 1)))


def test_batch_with_one_bad_model_gives_nan_for_it() -> None:
    rng = np.random.default_rng(11)
    y, X = _data(rng, 3, 30, 2)
    y[1, :25] = np.nan
    r = sup_f(y, X)
    assert np.isnan(r.statistic[1]) and r.break_index[1] == -1 and np.isfinite(r.statistic[[0, 2]]).all()


@pytest.mark.parametrize("kwargs, exc", [
    ({"trim": 0.6}, ValueError), ({"trim": "a"}, TypeError), ({"test_columns": [5]}, ValueError),
    ({"test_columns": []}, ValueError)])
def test_sup_f_bad_arguments(kwargs: dict, exc: type) -> None:
    with pytest.raises(exc):
        sup_f(np.zeros(30), np.ones((30, 1)), **kwargs)


def test_bad_shapes_and_at() -> None:
    with pytest.raises(ValueError, match="at must"):
        chow(np.zeros(30), np.ones((30, 1)), 30)
    with pytest.raises(TypeError, match="at must"):
        chow(np.zeros(30), np.ones((30, 1)), 2.5)
    with pytest.raises(ValueError, match="shape"):
        chow(np.zeros(30), np.ones((29, 1)), 10)
    with pytest.raises(ValueError, match="infinite"):
        nyblom(np.r_[np.inf, np.zeros(29)], np.ones((30, 1)))


# ---------------------------------------------------------------- Monte Carlo (seeded)
@pytest.mark.slow
def test_monte_carlo_size_and_power() -> None:
    # common practice, no source: size <= nominal + 3 MC s.e. under iid errors; power against a shift
    rng = np.random.default_rng(12)
    M, n = 1500, 100
    y, X = _data(rng, M, n, 2)
    s = sup_f(y, X)
    c = chow(y, X, 50)
    ny = nyblom(y, X)
    se = 3 * np.sqrt(0.05 * 0.95 / M)
    for res in (s, c, ny):
        assert np.mean(res.pvalue < 0.05) <= 0.05 + se
    assert np.mean(s.statistic > s.critical_values[0.05]) <= 0.05 + se
    assert np.mean(s.ave_pvalue < 0.05) <= 0.05 + se and np.mean(s.exp_pvalue < 0.05) <= 0.05 + se
    # shift of the slope by 1 s.d. of the error at 60% of the sample
    y2 = y + (np.arange(n) >= 60) * X[:, :, 1]
    s2 = sup_f(y2, X)
    assert np.mean(s2.pvalue < 0.05) > 0.9
    assert np.mean(np.abs(s2.break_index - 60) <= 5) > 0.6
    assert np.mean(nyblom(y2, X).pvalue < 0.05) > 0.5
