"""The one-step forecast errors of the worth test (drift.checking.drivers): each period's forecast from the
OLS fit on the ``window`` rows before it. Oracle: one ``numpy.linalg.lstsq`` fit per window (common
practice, no source); statsmodels RollingOLS is the engine's own oracle in tests/engine/test_rolling.py."""

from __future__ import annotations

import numpy as np

from drift.checking.drivers import _rolling_forecast_errors


def _by_hand(y: np.ndarray, X: np.ndarray, window: int) -> np.ndarray:
    out = np.full(y.shape, np.nan)
    for m in range(y.shape[0]):
        for t in range(window, y.shape[1]):
            rows = slice(t - window, t)
            if not (np.isfinite(y[m, rows]).all() and np.isfinite(X[m, rows]).all()):
                continue
            b, *_ = np.linalg.lstsq(X[m, rows], y[m, rows], rcond=None)
            out[m, t] = y[m, t] - X[m, t] @ b
    return out


def test_rolling_forecast_errors_from_a_start_equal_one_fit_per_window() -> None:
    rng = np.random.default_rng(11)
    M, n, k, window = 3, 90, 3, 20
    X = np.concatenate([np.ones((M, n, 1)), rng.standard_normal((M, n, k - 1))], axis=2)
    y = X @ np.array([1.0, 0.5, -0.3]) + rng.standard_normal((M, n))
    y[1, 70] = np.nan  # a missing value: the forecasts whose window holds it are NaN, and its own error
    want = _by_hand(y, X, window)
    full = _rolling_forecast_errors(y, X, window)
    np.testing.assert_allclose(full, want, rtol=1e-9, atol=1e-12)
    for start in (0, 15, 40, 89):
        got = _rolling_forecast_errors(y, X, window, start=start)
        assert np.isnan(got[:, :start]).all()
        np.testing.assert_allclose(got[:, start:], want[:, start:], rtol=1e-9, atol=1e-12)
    assert np.isnan(_rolling_forecast_errors(y, X, window, start=n)).all()
    assert np.isnan(_rolling_forecast_errors(y, X, n)).all()  # a window as long as the series: nothing to forecast
