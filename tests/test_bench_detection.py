"""Size and power claims of benchmarks/bench_detection.py, small and seeded, through the same scenario code.

Invented scenarios (see the benchmark's docstring). A rate is checked with a one-sided exact binomial test
at 1 %: a false-alarm share is rejected only when it is significantly above its bound, a detection rate
only when it is significantly below its target (common practice, no source), so the tests hold for any
seed while the benchmark's figures stay the measured ones.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

_PATH = Path(__file__).resolve().parents[1] / "benchmarks" / "bench_detection.py"


def _bench():
    name = "bench_detection"
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, _PATH)
        assert spec is not None and spec.loader is not None
        mod = importlib.util.module_from_spec(spec)
        sys.modules[name] = mod
        spec.loader.exec_module(mod)
    return sys.modules[name]


def _not_above(k: int, n: int, p: float) -> bool:
    return stats.binomtest(k, n, p, alternative="greater").pvalue > 0.01


def _not_below(k: int, n: int, p: float) -> bool:
    return stats.binomtest(k, n, p, alternative="less").pvalue > 0.01


@pytest.mark.parametrize("frequency", ["weekly", "monthly"])
def test_reference_page_cusum_holds_its_level(frequency: str) -> None:
    # Under no change the standardised recursive residuals are iid N(0, sigma^2) (Brown, Durbin & Evans
    # 1975), so the threshold simulated on iid normals with a chi-square scale must give 5 % on the full
    # pipeline of invented models (estimated coefficients and scale, trend, season, two drivers).
    b = _bench()
    freq = b.FREQUENCIES[frequency]
    d = b.simulate(b.SCENARIOS["iid"], 2000, freq)
    first = b.page_reference(d["Y"], d["X"], freq.n_ref - 1)
    k = int((first >= 0).sum())
    assert _not_above(k, 2000, 0.05) and _not_below(k, 2000, 0.05), k


def test_reference_page_cusum_detects_the_4_sigma_shift_within_days() -> None:
    # the yardstick of issue 9: a plain Page CUSUM finds the 4-sigma promo shift within a few weeks
    b = _bench()
    freq = b.FREQUENCIES["weekly"]
    d = b.simulate(b.SCENARIOS["promo-4s"], 300, freq, seed=8)
    first = b.page_reference(d["Y"], d["X"], freq.n_ref - 1) + 1  # rows of Y start at period 1
    delay = first[first >= freq.change] - freq.change
    assert delay.size >= 0.95 * 300
    assert np.median(delay) <= 3


def test_scenarios_shape_and_changes() -> None:
    # the invented scenarios are what the docstring says: the 4-sigma shift moves the target's mean by
    # 1.2 x E[promo] = 12 = 4 x 3, the variance scenario doubles the error variance after the change
    b = _bench()
    freq = b.FREQUENCIES["weekly"]
    base = b.simulate(b.SCENARIOS["iid"], 400, freq, seed=9)
    assert base["y"].shape == (400, freq.n_ref + freq.n_mon)
    assert base["promo"].mean() == pytest.approx(10.0, abs=0.1)
    shifted = b.simulate(b.SCENARIOS["promo-4s"], 400, freq, seed=9)
    after = slice(freq.change, None)
    gap = (base["y"][:, after] - shifted["y"][:, after]).mean()
    assert gap == pytest.approx(12.0, rel=0.02)
    assert np.allclose(base["y"][:, : freq.change], shifted["y"][:, : freq.change])  # common random numbers
    var = b.simulate(b.SCENARIOS["variance"], 400, freq, seed=9)
    extra = (var["y"] - base["y"])[:, after]  # the errors scaled by sqrt(2) - 1
    assert extra.std() == pytest.approx((np.sqrt(2) - 1) * 3.0, rel=0.02)


@pytest.mark.slow
def test_drift_size_and_power_on_the_weekly_scenarios() -> None:
    # The check run as the CLI runs it (store, ingest, check) on 40 invented weekly models per scenario,
    # against the targets of issue 9: no change -> hard actions within 5 % (iid) and 10 % (AR(1) errors
    # with errors: ar(1)); the 4-sigma promo shift -> refit >= 95 %, first alarm within 3 weeks for at
    # least half the models (median <= 3, a sign test); the 1.3-sigma shift -> refit >= 85 %, median
    # delay <= 12 weeks; alarms dated before the change within the nominal 5 %.
    b = _bench()
    n = 40
    res = b.run(["iid", "ar1", "promo-4s", "promo-1s"], n, "weekly", seed=11)
    sc = res["scenarios"]
    hard = {s: round(sc[s]["drift"]["hard"] * n) for s in sc}
    refit = {s: round(sc[s]["drift"]["refit"] * n) for s in sc}
    assert all(sc[s]["drift"]["errors"] == 0 for s in sc)
    assert _not_above(hard["iid"], n, 0.05), hard
    assert _not_above(hard["ar1"], n, 0.10), hard
    assert _not_below(refit["promo-4s"], n, 0.95), refit
    assert _not_below(refit["promo-1s"], n, 0.85), refit
    for s, weeks in (("promo-4s", 3), ("promo-1s", 12)):
        anyr = sc[s]["monitors"]["any"]
        within = sum(1 for d in anyr["delays"] if d <= weeks)
        assert _not_below(within, n, 0.5), (s, anyr["delays"])
        assert _not_above(round(anyr["early"] * n), n, 0.05), (s, anyr["early"])
    # the reference monitor of the same run holds its level
    assert _not_above(round(sc["iid"]["reference"]["alarm"] * n), n, 0.05)


@pytest.mark.slow
def test_drift_size_on_the_monthly_scenarios() -> None:
    # monthly models (5 years of reference, 2 monitored), 40 per scenario: every model is checked (an
    # AR(1) error model leaves few scale degrees of freedom here) and the no-change bounds hold
    b = _bench()
    n = 40
    sc = b.run(["iid", "ar1"], n, "monthly", seed=12)["scenarios"]
    assert all(sc[s]["drift"]["errors"] == 0 for s in sc), {s: sc[s]["drift"]["errors"] for s in sc}
    assert _not_above(round(sc["iid"]["drift"]["hard"] * n), n, 0.05)
    assert _not_above(round(sc["ar1"]["drift"]["hard"] * n), n, 0.10)


def test_oracle_bound_is_the_power_of_the_two_sample_test() -> None:
    # Known answer (the one-sided two-sample z-test, common practice, no source): with a constant as the
    # only regressor and the mean moving by delta at row c of n, |M s| = delta sqrt(c (n - c) / n), so the
    # bound after d periods is Phi(delta sqrt(c (d + 1) / (c + d + 1)) / sigma - z_0.05).
    b = _bench()
    n_models, c, n, delta = 3, 40, 52, 2.0
    X = np.ones((n_models, n, 1))
    base = np.zeros((n_models, n))
    moved = np.where(np.arange(n) >= c, -delta, 0.0) * np.ones((n_models, 1))
    got = b.oracle_bound(moved, base, X, c, level=0.05, sigma=3.0)
    k = np.arange(1, n - c + 1)
    want = stats.norm.cdf(delta * np.sqrt(c * k / (c + k)) / 3.0 - stats.norm.isf(0.05))
    assert got == pytest.approx(want, rel=1e-10)


def test_oracle_bound_is_the_power_of_the_test_told_the_date() -> None:
    # Monte Carlo (seeded): the one-sided test of the change's coefficient in the regression on the
    # scenario's own design, told the date, rejects at the rate the bound gives (monthly 1.3-sigma shift,
    # three months after the change; errors N(0, 3^2) with the scale known, as in the bound)
    b = _bench()
    freq = b.FREQUENCIES["monthly"]
    d = b.simulate(b.SCENARIOS["promo-1s"], 20, freq, seed=5)
    base = b.simulate(b.SCENARIOS["iid"], 20, freq, seed=5)
    c = freq.change - 1
    bound = b.oracle_bound(d["Y"], base["Y"], d["X"], c)[3]
    rng = np.random.default_rng(6)
    end = c + 4
    X, s = d["X"][:, :end], (d["Y"] - base["Y"])[:, :end]
    hits = 0
    reps = 400
    for i in range(X.shape[0]):
        Z = np.column_stack([X[i], s[i]])
        y = s[i] + rng.normal(scale=3.0, size=(reps, end))  # X b drops out of the test: b = 0 here
        coef = np.linalg.lstsq(Z, y.T, rcond=None)[0][-1]  # the change's coefficient (1 under the change)
        se = 3.0 * np.sqrt(np.linalg.inv(Z.T @ Z)[-1, -1])
        hits += int(np.sum(coef / se > stats.norm.isf(0.05)))
    k, n = hits, reps * X.shape[0]
    assert _not_above(k, n, bound) and _not_below(k, n, bound), (k / n, bound)


@pytest.mark.parametrize("direction", [1, -1])
def test_reference_page_cusum_told_the_direction_holds_its_level(direction: int) -> None:
    # one-sided version of the reference monitor: 5 % under no change on the full pipeline of invented
    # monthly models (Brown, Durbin & Evans 1975: the standardised recursive residuals are iid)
    b = _bench()
    freq = b.FREQUENCIES["monthly"]
    d = b.simulate(b.SCENARIOS["iid"], 2000, freq, seed=13)
    first = b.page_reference(d["Y"], d["X"], freq.n_ref - 1, direction=direction)
    k = int((first >= 0).sum())
    assert _not_above(k, 2000, 0.05) and _not_below(k, 2000, 0.05), k


def test_reachable_members_share_the_budget_between_bonferroni_and_none() -> None:
    # a composition's common member level lies between the Bonferroni share (budget / members, which
    # holds whatever the dependence: Bonferroni's inequality) and the budget itself; a single monitor
    # gets the budget (invented monthly scenario, seeded, few null paths)
    b = _bench()
    rows = b.reachable("promo-1s", 20, "monthly", seed=3, reps=4000, budgets=(0.05,))
    for r, (_name, members, _one) in zip(rows, b.COMPOSITIONS):
        assert 0.05 / len(members) - 1e-3 <= r["member_level"] <= 0.05 + 1e-3, r  # ranks of 4,000 paths
        if len(members) == 1:
            assert r["member_level"] == pytest.approx(0.05, abs=1e-3)
        assert 0.0 <= r["within"] <= r["detect"] <= 1.0
