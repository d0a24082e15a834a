"""Tests of drift.engine.lags: cross-correlation lag profiles."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import lfilter

from drift.engine.lags import compare_profiles, lag_profile
from drift.exceptions import InsufficientDataError


def _pair(rng: np.random.Generator, T: int, lead: int, phi: float = 0.7, coef: float = 0.8):
    x = lfilter([1.0], [1.0, -phi], rng.standard_normal(T + lead))
    y = coef * x[:T] + rng.standard_normal(T)  # y_t depends on x_{t-lead}
    return y, x[lead:]


def test_ccf_matches_statsmodels_raw() -> None:
    # statsmodels 0.15.0 ccf(y, x, adjusted=False)[k] = cov(y[t+k], x[t]) / (sd sd): read in its source
    # (ccovf docstring: element k pairs x[k:] with y[:n-k]); our r_k = corr(y_t, x_{t-k}) is the same.
    from statsmodels.tsa.stattools import ccf

    rng = np.random.default_rng(0)
    y, x = _pair(rng, 200, 3)
    lp = lag_profile(y, x, 10, prewhiten=False)
    np.testing.assert_allclose(lp.ccf, ccf(y, x, adjusted=False)[:11], atol=1e-12)
    assert lp.band == pytest.approx(1.959964 / np.sqrt(200), rel=1e-6)  # Bartlett (1946) band


def test_driver_leading_by_three() -> None:
    # Invented data: a driver leading by 3 is found at lag 3 and is significant after prewhitening.
    rng = np.random.default_rng(1)
    y, x = _pair(rng, 300, 3)
    lp = lag_profile(y, x, 8)
    assert lp.peak_lag == 3 and lp.peak_significant
    assert lp.ar_order >= 1
    # prewhitening removes the smear across neighbouring lags that the AR(1) driver causes
    raw = lag_profile(y, x, 8, prewhiten=False)
    assert np.sum(raw.significant()) > np.sum(lp.significant())


def test_batch_oracle_and_compare() -> None:
    # Oracle: batch == per-model; compare_profiles reports a moved peak (invented data).
    rng = np.random.default_rng(2)
    pairs = [_pair(rng, 250, lead) for lead in (1, 3, 5)]
    Y = np.stack([p[0] for p in pairs])
    Xd = np.stack([p[1] for p in pairs])
    lb = lag_profile(Y, Xd, 6)
    for i in range(3):
        li = lag_profile(Y[i], Xd[i], 6)
        np.testing.assert_allclose(lb.ccf[i], li.ccf, atol=1e-12)
    np.testing.assert_array_equal(lb.peak_lag, [1, 3, 5])
    later = [_pair(rng, 250, lead) for lead in (1, 4, 5)]
    lr = lag_profile(np.stack([p[0] for p in later]), np.stack([p[1] for p in later]), 6)
    shift = compare_profiles(lb, lr)
    np.testing.assert_array_equal(shift.moved, [False, True, False])
    assert shift.recent_lag[1] == 4 and shift.lost[1]
    s1 = compare_profiles(lag_profile(Y[1], Xd[1], 6), lag_profile(later[1][0], later[1][1], 6))
    assert s1.moved is True and s1.recent_lag == 4


@pytest.mark.slow
def test_null_band_size() -> None:
    # Bartlett (1946): with independent series, after prewhitening each r_k exceeds the 5% band ~5% of
    # the time (seeded simulation, invented data).
    rng = np.random.default_rng(3)
    M, T = 1000, 200
    x = lfilter([1.0], [1.0, -0.8], rng.standard_normal((M, T)), axis=1)
    y = lfilter([1.0], [1.0, -0.8], rng.standard_normal((M, T)), axis=1)
    lp = lag_profile(y, x, 6)
    rate = lp.significant().mean()
    assert 0.03 < rate < 0.075
    raw = lag_profile(y, x, 6, prewhiten=False).significant().mean()
    assert raw > 0.15  # spurious cross-correlation of two independent AR(1) series


def test_robustness() -> None:
    rng = np.random.default_rng(4)
    with pytest.raises(InsufficientDataError):
        lag_profile(np.arange(4.0), np.arange(4.0), 3)
    with pytest.raises(InsufficientDataError):
        lag_profile(np.ones(50), rng.standard_normal(50), 3)  # constant target
    with pytest.raises(InsufficientDataError):
        lag_profile(rng.standard_normal(50), np.ones(50), 3, prewhiten=False)
    with pytest.raises(InsufficientDataError):
        lag_profile(np.full(50, np.nan), np.full(50, np.nan), 3)
    with pytest.raises(ValueError, match="max_lag"):
        lag_profile(np.zeros(10), np.zeros(10), -1)
    with pytest.raises(ValueError, match="shape"):
        lag_profile(np.zeros(10), np.zeros(11), 2)
    with pytest.raises(TypeError):
        compare_profiles("a", "b")  # type: ignore[arg-type]
    y, x = rng.standard_normal((2, 80))
    y[[5, 40]] = np.nan
    lp = lag_profile(y, x, 4)
    assert np.isfinite(lp.ccf).all()
