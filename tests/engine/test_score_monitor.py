"""Score (single-coefficient) monitoring: ``monitor(..., weights=score_weights(...))``.

A slope change of a mean-zero driver leaves the residual mean unchanged, so the residual CUSUM monitors
have (almost) no power against it (Ploberger & Krämer 1992, Econometrica 60(2): power of CUSUM tests is
zero against changes orthogonal to the mean regressor); the score process of that coefficient drifts.
Simulation (seeded, invented data); sizes against the nominal level plus Monte Carlo error.
"""

from __future__ import annotations

import numpy as np
import pytest

from drift.engine.monitor import monitor, score_weights


def design(rng: np.random.Generator, M: int, T: int, m: int) -> np.ndarray:
    t = np.arange(T)
    x = rng.normal(size=(M, T))
    return np.stack([np.ones((M, T)), np.broadcast_to(t / m, (M, T)),
                     np.broadcast_to(np.sin(2 * np.pi * t / 52.18), (M, T)), x], axis=2)


def test_weights_orthogonal_and_unit_variance_out_of_sample() -> None:
    rng = np.random.default_rng(5)  # simulation
    M, T, m, extra = 400, 260, 156, 36
    X = design(rng, M, T, m)
    X[:, :, 3] += 0.5 * X[:, :, 1]  # correlated with the trend: the weight removes that part
    # many extra columns (as with seasonal dummies): an in-sample normalisation would be badly off here
    X = np.concatenate([X, rng.normal(size=(M, T, extra))], axis=2)
    W = score_weights(X, m, np.full((M, 1), 3))[:, 0]
    # orthogonalised: adding a multiple of another column to the driver leaves the weights unchanged
    X2 = X.copy()
    X2[:, :, 3] += 3.0 * X[:, :, 1] - 2.0 * X[:, :, 5]
    W2 = score_weights(X2, m, np.full((M, 1), 3))[:, 0]
    assert np.allclose(W2, W, atol=1e-8)
    # unit variance on monitored rows (Monte Carlo over models; common practice, no source)
    ms = np.mean(W[:, m:] ** 2)
    assert ms == pytest.approx(1.0, abs=0.05)
    # a missing slot (-1) gives zero weights
    W3 = score_weights(X[:3], m, np.array([[3, -1]] * 3))
    assert np.all(W3[:, 1] == 0)


@pytest.mark.slow
def test_size_and_power_against_an_orthogonal_slope_change() -> None:
    rng = np.random.default_rng(20261201)
    M, T, m, level = 2000, 260, 156, 0.05
    se = np.sqrt(level * (1 - level) / M)
    t = np.arange(T)
    for brk in (False, True):
        X = design(rng, M, T, m)
        beta = np.where(t >= 200, 0.5, 1.5) if brk else np.full(T, 1.5)
        y = 1 + 0.5 * t / m + 2 * np.sin(2 * np.pi * t / 52.18) + beta * X[:, :, 3] + rng.normal(size=(M, T))
        W = score_weights(X, m, np.full((M, 1), 3))[:, 0]
        resid = np.mean(monitor(y, X, m, horizon=1.0, detector="page", level=level).alarm_index >= 0)
        score = np.mean(monitor(y, X, m, horizon=1.0, detector="page", level=level, weights=W).alarm_index >= 0)
        if not brk:
            assert score <= level + 3 * se and resid <= level + 3 * se
        else:
            assert score > 0.95  # the coefficient monitor sees the change
            assert resid < 0.2  # the residual monitor barely does


@pytest.mark.slow
def test_size_with_autocorrelated_drivers_and_many_columns() -> None:
    # simulation: AR(1) drivers (phi 0.5) next to a trend and 6 Fourier terms, m = 156, horizon 0.5 fully
    # observed; the effect monitors (information time) stay within nominal + 3 Monte Carlo s.e.
    rng = np.random.default_rng(11)
    M, m, level = 1500, 156, 0.05
    T = m + 78
    t = np.arange(T)

    def ar(phi: float = 0.5) -> np.ndarray:
        e = rng.normal(0, 3.0, (M, T + 10))
        v = np.zeros((M, T + 10))
        for i in range(1, T + 10):
            v[:, i] = phi * v[:, i - 1] + e[:, i]
        return 20 + v[:, 10:]

    x1, x2 = ar(), ar()
    base = [np.ones(T), t / m] + [f(2 * np.pi * j * t / 52.18) for j in (1, 2, 3) for f in (np.sin, np.cos)]
    X = np.concatenate([np.broadcast_to(np.stack(base, 1), (M, T, len(base))), x1[:, :, None], x2[:, :, None]], 2)
    y = 100 + 0.3 * t + 8 * np.sin(2 * np.pi * t / 52.18) + 2 * x1 + 1.5 * x2 + rng.normal(size=(M, T))
    k = X.shape[2]
    W = score_weights(X, m, np.tile([k - 2, k - 1], (M, 1)))
    se = np.sqrt(level * (1 - level) / M)
    for j in range(2):
        r = monitor(y, X, m, horizon=0.5, detector="page", level=level, weights=W[:, j])
        assert np.mean(r.alarm_index >= 0) <= level + 3 * se
