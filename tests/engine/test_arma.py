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
