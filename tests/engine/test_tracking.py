"""Tests of drift.engine.tracking: cumulative-error / MAD and Trigg signals."""

from __future__ import annotations

import numpy as np
import pytest

from drift.engine.tracking import tracking_signal, trigg_signal
from drift.exceptions import InsufficientDataError


def test_tracking_signal_by_hand() -> None:
    # Brown (1959) cumulative error / exponential MAD, reset after a signal; arithmetic written out.
    e = np.array([1.0, 1.0, 1.0, 1.0, 1.0, -1.0])
    r = tracking_signal(e, alpha=0.5, limit=2.5, mad0=1.0)
    # MAD stays 1 (|e| = 1); C: 1, 2, 3 -> fires at index 2 and resets; then 1, 2, 1
    np.testing.assert_allclose(r.signal, [1, 2, 3, 1, 2, 1])
    assert r.first_signal == 2 and r.signals.tolist() == [False, False, True, False, False, False]


def test_tracking_signal_window_mad() -> None:
    # Rolling-window MAD (common practice, no source).
    e = np.array([2.0, 0.0, 4.0, -2.0])
    r = tracking_signal(e, window=2, mad0=1.0, limit=10.0)
    # window starts filled with mad0 = 1: MAD = (1+2)/2, (2+0)/2, (0+4)/2, (4+2)/2
    np.testing.assert_allclose(r.mad, [1.5, 1.0, 2.0, 3.0])
    np.testing.assert_allclose(r.signal, [2 / 1.5, 2 / 1.0, 6 / 2.0, 4 / 3.0])


@pytest.mark.slow
def test_tracking_signal_iid_rate_and_bias_detection() -> None:
    # Seeded simulation, invented data. On iid N(0,1) errors the reset random walk leaves +-4 MAD about
    # every (3.2 + 0.58)^2 ~ 14 periods (random-walk exit time, from memory); a 1-sigma bias shift makes it
    # fire within a few periods.
    rng = np.random.default_rng(0)
    e = rng.standard_normal((2000, 300))
    r = tracking_signal(e)
    per_signal = 300 / r.signals.sum(axis=1).mean()
    assert 10 < per_signal < 20
    rate_iid = r.signals[:, 100:].mean()
    e[:, 150:] += 1.0
    rb = tracking_signal(e)
    rate_bias = rb.signals[:, 150:].mean()
    assert rate_bias > 2.5 * rate_iid
    # the signal sign follows the bias
    assert np.nanmean(rb.signal[:, 150:]) > 1.0


def test_trigg_bounded_and_by_hand() -> None:
    # Trigg (1964): |T| <= 1 always (triangle inequality); recursion written out.
    e = np.array([1.0, -1.0, 2.0])
    r = trigg_signal(e, alpha=0.5, mad0=1.0, limit=0.9)
    E = [0.5, 0.5 * -1 + 0.25, 0.5 * 2 + 0.5 * -0.25]  # 0.5, -0.25, 0.875
    mad = [1.0, 1.0, 0.5 * 2 + 0.5]  # 1, 1, 1.5
    np.testing.assert_allclose(r.signal, np.array(E) / np.array(mad))
    rng = np.random.default_rng(1)
    big = rng.standard_t(2, size=(200, 500)) + np.linspace(0, 5, 500)
    assert np.nanmax(np.abs(trigg_signal(big).signal)) <= 1.0


@pytest.mark.slow
def test_trigg_exceedance_rate_matches_table() -> None:
    # Trigg (1964) limits, tabulated by tools/simulate_monitoring.py: stationary P(|T| > limit) = level.
    rng = np.random.default_rng(2)
    e = rng.standard_normal((400, 1000))
    r = trigg_signal(e, alpha=0.1, level=0.05, mad0=np.sqrt(2 / np.pi))
    assert r.limit == pytest.approx(0.538, abs=0.003)
    rate = r.signals[:, 200:].mean()
    assert abs(rate - 0.05) < 0.01
    e[:, 500:] += 1.0
    rb = trigg_signal(e, alpha=0.1, level=0.05, mad0=np.sqrt(2 / np.pi))
    assert rb.signals[:, 550:].mean() > 0.5


def test_batch_oracle_and_nan() -> None:
    # Oracle: batch == per-series; NaN periods are skipped (common practice, no source).
    rng = np.random.default_rng(3)
    e = rng.standard_normal((3, 80))
    e[1, 30:33] = np.nan
    for fn in (tracking_signal, trigg_signal):
        rb = fn(e)
        for i in range(3):
            ri = fn(e[i])
            np.testing.assert_allclose(rb.signal[i], ri.signal, equal_nan=True)
            assert rb.first_signal[i] == ri.first_signal
    assert np.isnan(tracking_signal(e).signal[1, 30:33]).all()


def test_robustness() -> None:
    with pytest.raises(InsufficientDataError):
        tracking_signal(np.array([1.0, 2.0]))  # warm-up needs 19
    with pytest.raises(InsufficientDataError):
        tracking_signal(np.zeros(40))
    with pytest.raises(InsufficientDataError):
        trigg_signal(np.zeros(40))
    with pytest.raises(InsufficientDataError):
        trigg_signal(np.full(10, np.nan))
    with pytest.raises(ValueError, match="alpha"):
        trigg_signal(np.ones(10), alpha=1.5)
    with pytest.raises(ValueError, match="alpha"):
        trigg_signal(np.random.default_rng(0).standard_normal(10), alpha=0.15)  # no tabulated limit
    with pytest.raises(ValueError, match="window"):
        tracking_signal(np.ones(10), window=0)
    with pytest.raises(ValueError, match="limit"):
        tracking_signal(np.ones(10), limit=-1.0)
    with pytest.raises(ValueError, match="infinit"):
        tracking_signal(np.array([[1.0, np.inf]]))


def test_trigg_standing_since_against_a_replay() -> None:
    """``standing_since`` is the first check of the crossing that stands at the last time: replayed here as
    of every time with a plain loop (common practice, no source: the definition itself), on streams with a
    crossing that ended, one that stands, missing times inside a run, and none at all."""
    rng = np.random.default_rng(4)
    e = rng.normal(0, 1, (40, 120))
    e[::3, 70:] += 2.5  # a shift that stands at the end in every third stream
    e[1::5, 20:30] -= 4.0  # an early burst that ends
    e[rng.random(e.shape) < 0.05] = np.nan
    e[7, -1] = np.nan  # the last time missing: the run is judged at the last non-missing one
    tr = trigg_signal(e, 0.1, level=0.01, mad0=np.full(40, 0.8))
    got = tr.standing_since()
    for i in range(e.shape[0]):
        sig = tr.signal[i]
        times = np.flatnonzero(np.isfinite(sig))
        want = -1
        if abs(sig[times[-1]]) > tr.limit:  # standing now: walk back to the first of the run
            want = int(times[-1])
            for t in times[::-1]:
                if abs(sig[t]) <= tr.limit:
                    break
                want = int(t)
        assert got[i] == want
    assert (got[::3] >= 70).all()  # the shift's run stands, dated at or after the shift
    assert (tr.first_signal[1::5][got[1::5] >= 0] <= got[1::5][got[1::5] >= 0]).all()
    one = trigg_signal(e[0], 0.1, level=0.01, mad0=0.8)
    assert one.standing_since() == got[0]
