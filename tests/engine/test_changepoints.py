"""Tests of drift.engine.changepoints (penalised least-squares change points via ruptures)."""

from __future__ import annotations

import numpy as np
import pytest
import ruptures as rpt
from statsmodels.datasets import nile

from drift.engine.changepoints import METHODS, change_points, check_partition
from drift.exceptions import InsufficientDataError


@pytest.fixture(scope="module")
def nile_y() -> np.ndarray:
    return nile.load_pandas().data["volume"].to_numpy(dtype=float)


@pytest.mark.parametrize("method", sorted(METHODS))
@pytest.mark.parametrize("cost", ["linear", "l2"])
def test_nile_break_and_segments(nile_y: np.ndarray, method: str, cost: str) -> None:
    # REFERENCES.md [C]: Nile change at index 28 (Cobb 1978); segment means 1097.75 / 849.972;
    # RSS with the break 1,597,457.19
    r = change_points(nile_y, method=method, cost=cost)
    assert r.break_indices == (28,)
    assert r.break_index == 28 and r.statistic == 1
    a, b = r.segments
    assert (a.start, a.stop, b.start, b.stop) == (0, 28, 28, 100)
    assert a.coef[0] == pytest.approx(1097.75, abs=1e-9)
    assert b.coef[0] == pytest.approx(849.972, abs=5e-4)
    assert a.rss + b.rss == pytest.approx(1_597_457.19, abs=0.01)
    assert r.params["jump"] == 1


def test_nile_with_explicit_constant_regressor(nile_y: np.ndarray) -> None:
    # same answer with X = constant column (linear cost)
    r = change_points(nile_y, np.ones((100, 1)))
    assert r.break_indices == (28,)


def test_matches_plain_ruptures_call(nile_y: np.ndarray) -> None:
    # ruptures 1.1.10 Pelt(model="l2", jump=1): same partition for the same penalty
    pen = 2 * 150.0**2 * np.log(100)
    ref = rpt.Pelt(model="l2", min_size=15, jump=1).fit(nile_y).predict(pen=pen)
    r = change_points(nile_y, cost="l2", penalty=pen, min_size=15)
    assert list(r.break_indices) == ref[:-1]


def test_noise_free_regression_breaks_recovered() -> None:
    # common practice, no source: noise-free piecewise regression, two changes recovered exactly
    n = 120
    x = np.random.default_rng(1).standard_normal(n)
    t = np.arange(n)
    y = np.select([t < 40, t < 85], [1 + 2 * x, -1 + 0.5 * x], 4 - x)
    X = np.column_stack([np.ones(n), x])
    for method in sorted(METHODS):
        r = change_points(y, X, method=method)
        assert r.break_indices == (40, 85), method
        np.testing.assert_allclose(r.segments[1].coef, [-1, 0.5], atol=1e-9)


def test_batched_with_nan_rows_maps_to_input_indices() -> None:
    # oracle: batched == per-model loop; NaN rows dropped and indices mapped back
    rng = np.random.default_rng(2)
    n = 90
    y = rng.standard_normal((3, n)) + 3.0 * (np.arange(n) >= 50)
    y[1, [10, 11, 12, 70]] = np.nan
    r = change_points(y, cost="l2")
    for i in range(3):
        r1 = change_points(y[i], cost="l2")
        assert r.break_indices[i] == r1.break_indices
        assert r.break_indices[i] == (50,)
    assert r.break_array.shape == (3, 1)
    seg = r.segments[1]
    assert seg[0].nobs == 47 and seg[1].start == 50 and seg[1].stop == n


def test_default_min_size_and_no_break_on_noise() -> None:
    # REFERENCES.md library trap: min_size >= p + 1 and 15% trimming by default
    rng = np.random.default_rng(3)
    y = rng.standard_normal(200)
    r = change_points(y, cost="l2")
    assert r.params["min_size"] == 30
    assert r.break_indices == ()
    assert r.break_index == -1 and r.break_array.shape == (0,)


def test_given_sigma2_sets_penalty() -> None:
    r = change_points(np.r_[np.zeros(30), np.ones(30)] + 0.01 * np.arange(60) % 0.03, cost="l2", sigma2=4.0)
    assert r.penalty_value == pytest.approx(2 * 4.0 * np.log(60))


def test_check_partition() -> None:
    assert check_partition([3, 7], 10, 3) == (3, 7)
    for bad in ([0, 5], [5, 5], [7, 3], [3, 10]):
        with pytest.raises(ValueError):
            check_partition(bad, 10)
    with pytest.raises(ValueError, match="min_size"):
        check_partition([2], 10, 3)


@pytest.mark.parametrize("kwargs", [
    {"method": "nope"}, {"cost": "rbf"}, {"penalty": -1.0}, {"penalty": "aic"}, {"min_size": 1},
    {"method": "pelt", "max_breaks": 2}, {"method": "dynp", "max_breaks": -1}, {"sigma2": 0.0}])
def test_bad_arguments(kwargs: dict) -> None:
    with pytest.raises(ValueError):
        change_points(np.zeros(40), **kwargs)


def test_l2_rejects_regressors() -> None:
    with pytest.raises(ValueError, match="l2"):
        change_points(np.zeros(40), np.ones((40, 1)), cost="l2")


@pytest.mark.parametrize("case", ["tiny", "constant", "collinear", "nan", "allnan"])
def test_robustness_only_our_exception(case: str) -> None:
    rng = np.random.default_rng(4)
    n = {"tiny": 3}.get(case, 40)
    X = np.column_stack([np.ones(n), rng.standard_normal(n)])
    y = rng.standard_normal(n)
    if case == "constant":
        y = np.full(n, 2.0)
    elif case == "collinear":
        X = np.column_stack([X, X[:, 1]])
    elif case == "nan":
        y[::3] = np.nan
    elif case == "allnan":
        y[:] = np.nan
    try:
        r = change_points(y, X, method="binseg")
    except InsufficientDataError:
        return
    check_partition([b for b in r.break_indices], n)


@pytest.mark.slow
def test_monte_carlo_false_alarms_and_detection() -> None:
    # common practice, no source: BIC penalty rarely finds a change in iid noise, finds a 2-sigma shift
    rng = np.random.default_rng(5)
    M, n = 60, 100
    x = rng.standard_normal((M, n))
    X = np.stack([np.ones((M, n)), x], axis=2)
    e = rng.standard_normal((M, n))
    r0 = change_points(1 + x + e, X)
    assert np.mean([len(b) > 0 for b in r0.break_indices]) <= 0.15
    r1 = change_points(1 + x + e + 2.0 * (np.arange(n) >= 60), X)
    hits = [any(abs(b - 60) <= 3 for b in bs) for bs in r1.break_indices]
    assert np.mean(hits) > 0.8


def test_rank_deficient_segment_is_not_free() -> None:
    # REFERENCES.md library trap (ruptures CostLinear returns 0 for rank-deficient segments): a dummy
    # regressor that is zero before t = 50 must not make early segments cost nothing
    rng = np.random.default_rng(6)
    n = 100
    d = (np.arange(n) >= 50).astype(float)
    X = np.column_stack([np.ones(n), d])
    y = 1 + 2 * d + rng.standard_normal(n)
    ref = rpt.Pelt(model="linear", min_size=15, jump=1).fit(np.column_stack([y, X])).predict(pen=3 * np.log(n))
    assert len(ref) > 1  # the trap: plain ruptures finds spurious changes here
    assert change_points(y, X, sigma2=1.0).break_indices == ()


def test_cumulative_l2_cost_equals_ruptures_costl2() -> None:
    # reference: ruptures 1.1.10 CostL2 (segment sum of squared deviations); invented data
    import ruptures as rpt

    from drift.engine.changepoints import _CumL2

    rng = np.random.default_rng(42)
    sig = 1e4 + rng.normal(size=(120, 1)).cumsum(axis=0)
    ref = rpt.costs.CostL2().fit(sig)
    ours = _CumL2().fit(sig)
    for a, b in [(0, 120), (3, 17), (50, 51), (90, 120), (10, 60)]:
        assert ours.error(a, b) == pytest.approx(ref.error(a, b), rel=1e-9, abs=1e-6)


@pytest.mark.parametrize("sequential_sum", [True, False])
def test_l2_pelt_equals_ruptures_pelt_on_many_series(sequential_sum: bool, monkeypatch: pytest.MonkeyPatch) -> None:
    # reference: ruptures 1.1.10 Pelt(custom_cost=_CumL2(), jump=1).predict(pen): change_points' own l2
    # PELT gives the same breakpoints on invented series of every kind (noise, shifts, values with exact
    # ties, large values), minimum sizes and penalties, and refuses what ruptures refuses; both ways of
    # forming a partition's total (the summed list of costs is what a Python >= 3.12 takes)
    from drift.engine import changepoints
    from drift.engine.changepoints import _CumL2, _pelt_l2

    if not sequential_sum:
        monkeypatch.setattr(changepoints, "_SEQUENTIAL_SUM", False)

    rng = np.random.default_rng(20261203)
    for trial in range(400):
        n = int(rng.integers(6, 90))
        kind = trial % 4
        if kind == 0:
            x = rng.normal(size=n)
        elif kind == 1:
            x = rng.normal(size=n) + np.repeat(rng.normal(scale=3, size=4), -(-n // 4))[:n]
        elif kind == 2:
            x = rng.integers(0, 3, size=n).astype(float)
        else:
            x = np.round(rng.normal(size=n), 1) * 1e6
        ms = int(rng.integers(1, max(2, n // 2) + 1))
        pen = float(rng.choice([0.1, 1.0, 2 * np.log(n), 10.0, 1e3])) * (1e12 if kind == 3 else 1.0)
        sig = x[:, None]
        ref = rpt.Pelt(custom_cost=_CumL2(), min_size=ms, jump=1).fit(sig).predict(pen=pen)
        assert _pelt_l2(sig, pen, ms) == ref, (trial, n, ms, pen)
    with pytest.raises(rpt.exceptions.BadSegmentationParameters):
        _pelt_l2(np.zeros((4, 1)), 1.0, 5)
