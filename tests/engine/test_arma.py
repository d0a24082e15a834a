"""Tests of drift.engine.arma: error-model estimation and prewhitening."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.signal import lfilter

from drift.engine.arma import ErrorModel, fit_error_model, parse_error_spec, prewhiten
from drift.exceptions import InsufficientDataError


def _arima_params(e: np.ndarray, p: int, q: int) -> np.ndarray:
    from statsmodels.tsa.arima.model import ARIMA

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ARIMA(e, order=(p, 0, q), trend="n").fit().params


@pytest.mark.parametrize("spec, order", [("ols", (0, 0)), ("AR(1)", (1, 0)), ("ar( 3 )", (3, 0)),
                                         ("arma(1,1)", (1, 1)), ("ARMA(2, 1)", (2, 1))])
def test_parse_error_spec(spec: str, order: tuple[int, int]) -> None:
    assert parse_error_spec(spec) == order


@pytest.mark.parametrize("bad", ["ar", "arma(1)", "ma(1)", "ar(-1)", ""])
def test_parse_error_spec_rejects(bad: str) -> None:
    with pytest.raises(ValueError, match="error spec"):
        parse_error_spec(bad)


def test_ar1_vs_statsmodels_arima() -> None:
    # statsmodels 0.15.0 ARIMA(1,0,0) exact MLE vs batched conditional LS: agree to O(1/n).
    rng = np.random.default_rng(0)
    e = lfilter([1.0], [1.0, -0.6], rng.standard_normal(2000))
    em = fit_error_model(e, ("ar", 1), bias_correction=False)
    ref = _arima_params(e, 1, 0)
    assert em.ar[0, 0] == pytest.approx(ref[0], abs=0.005)
    assert em.sigma2[0] == pytest.approx(ref[1], rel=0.01)
    # closed form of AR(1) conditional LS
    assert em.ar[0, 0] == pytest.approx(np.sum(e[1:] * e[:-1]) / np.sum(e[:-1] ** 2), rel=1e-12)
    mle = fit_error_model(e, "ar(1)", method="mle")
    assert mle.ar[0, 0] == pytest.approx(ref[0], rel=1e-8)


def test_arma11_vs_statsmodels_arima() -> None:
    # statsmodels 0.15.0 ARIMA(1,0,1) MLE vs Hannan-Rissanen (1982): close, not identical.
    rng = np.random.default_rng(1)
    u = lfilter([1.0, 0.4], [1.0, -0.5], rng.standard_normal(3000))
    em = fit_error_model(u, "arma(1,1)")
    ref = _arima_params(u, 1, 1)
    assert em.ar[0, 0] == pytest.approx(ref[0], abs=0.03)
    assert em.ma[0, 0] == pytest.approx(ref[1], abs=0.03)
    assert em.sigma2[0] == pytest.approx(ref[2], rel=0.03)


def test_batched_matches_loop() -> None:
    # Oracle: batched fit == per-series fits (common practice, no source).
    rng = np.random.default_rng(2)
    E = np.stack([lfilter([1.0], [1.0, -phi], rng.standard_normal(300)) for phi in (0.1, 0.5, 0.9)])
    E[1, 40] = np.nan
    eb = fit_error_model(E, (2, 0))
    for i in range(3):
        ei = fit_error_model(E[i], (2, 0))
        np.testing.assert_allclose(eb.ar[i], ei.ar[0])
        assert ei.params()["ar"].shape == (2,)


def test_prewhiten_matches_lfilter_and_is_white() -> None:
    # scipy.signal.lfilter oracle for theta(L)^-1 phi(L); Ljung-Box (statsmodels acorr_ljungbox) whiteness.
    from statsmodels.stats.diagnostic import acorr_ljungbox

    rng = np.random.default_rng(3)
    T = 1500
    X = np.column_stack([np.ones(T), rng.standard_normal(T)])
    u = lfilter([1.0, 0.4], [1.0, -0.5], rng.standard_normal(T))
    y = X @ np.array([2.0, 1.0]) + u
    m = 750
    beta = np.linalg.lstsq(X[:m], y[:m], rcond=None)[0]
    em = fit_error_model(y[:m] - X[:m] @ beta, (1, 1))
    yt, Xt = prewhiten(y, X, em)
    assert np.isnan(yt[0]) and np.all(np.isnan(Xt[0]))
    phi, theta = em.ar[0], em.ma[0]
    v = y[1:] - phi[0] * y[:-1]
    np.testing.assert_allclose(yt[1:], lfilter([1.0], [1.0, theta[0]], v), rtol=1e-10, atol=1e-10)
    resid = yt[1:] - Xt[1:] @ np.linalg.lstsq(Xt[1:m], yt[1:m], rcond=None)[0]
    assert acorr_ljungbox(resid, lags=[10])["lb_pvalue"].iloc[0] > 0.05
    assert acorr_ljungbox(y - X @ beta, lags=[10])["lb_pvalue"].iloc[0] < 1e-6


def test_prewhiten_batch_and_nan() -> None:
    # AR(1) quasi-difference by hand; a NaN affects only the next p rows (common practice, no source).
    rng = np.random.default_rng(4)
    y = rng.standard_normal((2, 30))
    y[0, 10] = np.nan
    X = np.ones((30, 1))
    em = ErrorModel(np.array([[0.5], [0.2]]), np.zeros((2, 0)), np.ones(2), np.array([30, 30]), "ls")
    yt, Xt = prewhiten(y, X, em)
    assert Xt.shape == (2, 30, 1)
    np.testing.assert_allclose(yt[1, 1:], y[1, 1:] - 0.2 * y[1, :-1])
    assert np.isnan(yt[0, [0, 10, 11]]).all() and np.isfinite(yt[0, 12:]).all()
    np.testing.assert_allclose(Xt[0, 1:, 0], 0.5)


def test_robustness() -> None:
    with pytest.raises(InsufficientDataError):
        fit_error_model(np.array([0.1, -0.2]), ("ar", 1))
    with pytest.raises(InsufficientDataError):
        fit_error_model(np.full(50, np.nan), (1, 1))
    with pytest.raises(InsufficientDataError):
        fit_error_model(np.random.default_rng(0).standard_normal(12), (1, 1))  # too short for HR
    with pytest.raises(ValueError, match="order"):
        fit_error_model(np.zeros(50), ("ma", 1))
    with pytest.raises(ValueError, match="method"):
        fit_error_model(np.zeros(50), (1, 0), method="bayes")  # type: ignore[arg-type]
    with pytest.raises(TypeError):
        prewhiten(np.zeros(5), np.zeros((5, 1)), "ar(1)")  # type: ignore[arg-type]
    # constant residuals: degenerate, NaN coefficients, no exception
    em = fit_error_model(np.zeros(50), ("ar", 1))
    assert np.isnan(em.ar).all()


# ------------------------------------------------------------------------------ AR(1) bias correction
def _weekly_design(rng: np.random.Generator, M: int, T: int) -> np.ndarray:
    t = np.arange(T)
    cols = [np.ones(T), t / T] + [f(2 * np.pi * j * t / 52.18) for j in (1, 2, 3) for f in (np.sin, np.cos)]
    d = lfilter([1.0], [1.0, -0.5], rng.standard_normal((M, T, 2)), axis=1)
    return np.concatenate([np.broadcast_to(np.stack(cols, axis=1), (M, T, 8)), d], axis=2)


def _ols_resid(X: np.ndarray, u: np.ndarray) -> np.ndarray:
    b = np.einsum("mkt,mt->mk", np.linalg.pinv(X), u)  # pinv: also for the collinear case
    return u - np.einsum("mtk,mk->mt", X, b)


def test_kendall_correction_closed_form() -> None:
    # Kendall (1954), Marriott & Pope (1954): E phi-hat = phi - (1 + 3 phi)/n; inverted exactly.
    rng = np.random.default_rng(10)
    e = lfilter([1.0], [1.0, -0.5], rng.standard_normal(80))
    e -= e.mean()
    ls = fit_error_model(e, "ar(1)", bias_correction=False)
    em = fit_error_model(e, "ar(1)")
    n = 79
    assert em.bias_correction == "kendall" and em.ar_uncorrected[0, 0] == pytest.approx(ls.ar[0, 0])
    assert em.ar[0, 0] == pytest.approx((n * ls.ar[0, 0] + 1) / (n - 3), rel=1e-12)


def test_design_correction_reduces_to_kendall_for_a_constant() -> None:
    # Kendall (1954): with a constant regressor alone the first-order bias is -(1 + 3 phi)/n.
    from drift.engine.arma import _expected_ar1_ls

    n = 400
    Q = np.full((3, n, 1), 1 / np.sqrt(n))
    pair = np.ones((3, n), bool)
    pair[:, 0] = False
    phi = np.array([0.0, 0.5, 0.8])
    g = _expected_ar1_ls(phi, Q, pair)
    np.testing.assert_allclose(g - phi, -(1 + 3 * phi) / (n - 1), atol=25 / n**2)


def test_design_correction_batched_matches_loop_and_handles_nan_and_collinear() -> None:
    # Oracle: batch == per-model fits (common practice, no source); NaN rows and a duplicated column.
    rng = np.random.default_rng(11)
    X = _weekly_design(rng, 4, 120)
    X[3, :, 9] = X[3, :, 8]  # collinear
    e = _ols_resid(X, lfilter([1.0], [1.0, -0.4], rng.standard_normal((4, 120)), axis=1))
    e[1, 30:33] = np.nan
    eb = fit_error_model(e, "ar(1)", X=X)
    assert eb.bias_correction == "design" and np.all(np.isfinite(eb.ar))
    assert np.all(eb.ar[:, 0] > eb.ar_uncorrected[:, 0])  # the correction moves away from zero
    for i in range(4):
        ei = fit_error_model(e[i], "ar(1)", X=X[i])
        assert ei.ar[0, 0] == pytest.approx(eb.ar[i, 0], rel=1e-10)
        assert ei.cov[0, 0, 0] == pytest.approx(eb.cov[i, 0, 0], rel=1e-8)
    shared = fit_error_model(e[:1], "ar(1)", X=X[0])
    assert shared.ar[0, 0] == pytest.approx(eb.ar[0, 0], rel=1e-12)


def test_log_scale_variance() -> None:
    # delta method (common practice, no source): var(phi-hat) / (1 - phi)^2 for AR(1); zero without cov.
    rng = np.random.default_rng(12)
    e = lfilter([1.0], [1.0, -0.6], rng.standard_normal((3, 200)), axis=1)
    em = fit_error_model(e, "ar(1)")
    np.testing.assert_allclose(em.log_scale_variance(), em.cov[:, 0, 0] / (1 - em.ar[:, 0]) ** 2)
    em2 = fit_error_model(e, "arma(1,1)")
    assert em2.cov.shape == (3, 2, 2) and np.all(em2.log_scale_variance() > 0)
    hand = ErrorModel(np.full((3, 1), 0.5), np.zeros((3, 0)), np.ones(3), np.full(3, 200), "true")
    np.testing.assert_array_equal(hand.log_scale_variance(), 0.0)


def test_bias_correction_arguments() -> None:
    e = np.random.default_rng(13).standard_normal(60)
    with pytest.raises(TypeError, match="bias_correction"):
        fit_error_model(e, "ar(1)", bias_correction="yes")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="X must"):
        fit_error_model(e, "ar(1)", X=np.ones((59, 2)))
    # other orders are never corrected
    assert fit_error_model(e, "ar(2)").bias_correction == "none"


@pytest.mark.slow
@pytest.mark.parametrize("phi", [0.3, 0.7])
def test_design_correction_is_unbiased_with_right_variance(phi: float) -> None:
    # Seeded simulation (invented weekly design, m = 156, k = 10). Least squares is biased by about
    # -0.1 here; the corrected mean is within 0.01 of phi and the modelled sd within 10% of the MC sd.
    rng = np.random.default_rng(14)
    M, n = 1500, 156
    X = _weekly_design(rng, M, n)
    e = _ols_resid(X, lfilter([1.0], [1.0, -phi], rng.standard_normal((M, n + 50)), axis=1)[:, 50:])
    em = fit_error_model(e, "ar(1)", X=X)
    ls = em.ar_uncorrected[:, 0]
    assert ls.mean() < phi - 0.07
    assert abs(em.ar[:, 0].mean() - phi) < 0.01
    sd_model = np.sqrt(np.mean(em.cov[:, 0, 0]))
    assert sd_model == pytest.approx(em.ar[:, 0].std(), rel=0.10)
