"""Tests of drift.engine.worth: Diebold-Mariano / HLN and Clark-West."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from drift.engine.worth import clark_west, diebold_mariano
from drift.exceptions import InsufficientDataError


@pytest.mark.parametrize("n, h, factor", [(52, 1, 0.99034), (52, 4, 0.93264)])
def test_hln_factor(n: int, h: int, factor: float) -> None:
    # Harvey, Leybourne & Newbold (1997) eq. 9; factor values [C] in REFERENCES.md.
    rng = np.random.default_rng(0)
    e1, e2 = rng.standard_normal((2, n))
    with_hln = diebold_mariano(e1, e2, h=h, hln=True)
    plain = diebold_mariano(e1, e2, h=h, hln=False)
    assert math.sqrt((n + 1 - 2 * h + h * (h - 1) / n) / n) == pytest.approx(factor, abs=1e-5)
    if not plain.params["newey_west_fallback"]:
        assert with_hln.statistic / plain.statistic == pytest.approx(factor, abs=1e-5)


def test_dm_worked_example_by_hand() -> None:
    # Diebold & Mariano (1995) with HLN (1997) eq. 9, arithmetic written out for a 6-period example, h = 2.
    e1 = np.array([1.0, 2.0, 1.5, 0.5, -1.0, 2.0])
    e2 = np.array([0.5, -1.0, 1.0, 0.5, -0.5, 1.0])
    # squared-loss differential d = e1^2 - e2^2
    d = [1.0 - 0.25, 4.0 - 1.0, 2.25 - 1.0, 0.25 - 0.25, 1.0 - 0.25, 4.0 - 1.0]  # 0.75, 3, 1.25, 0, 0.75, 3
    n = 6
    dbar = sum(d) / n  # 8.75 / 6
    dev = [x - dbar for x in d]
    g0 = sum(x * x for x in dev) / n
    g1 = sum(dev[t] * dev[t - 1] for t in range(1, n)) / n
    V = g0 + 2 * g1  # positive here (else the test would use the Newey-West fallback)
    assert V > 0
    dm = dbar / math.sqrt(V / n)
    h = 2
    dm_star = dm * math.sqrt((n + 1 - 2 * h + h * (h - 1) / n) / n)
    p = 2 * stats.t.sf(abs(dm_star), df=n - 1)
    r = diebold_mariano(e1, e2, h=2)
    assert r.statistic == pytest.approx(dm_star, rel=1e-12)
    assert r.pvalue == pytest.approx(p, rel=1e-10)
    assert r.nobs == 6
    assert r.params["long_run_variance"] == pytest.approx(V)


def test_cw_worked_example_by_hand() -> None:
    # Clark & West (2007): f = e1^2 - [e2^2 - (f1 - f2)^2], CW = sqrt(P) mean(f) / sqrt(V); h = 1.
    y = np.array([1.0, 2.0, 0.0, -1.0, 3.0])
    f1 = np.array([0.0, 0.0, 0.0, 0.0, 0.0])  # restricted (no driver)
    f2 = np.array([0.5, 1.5, 0.5, -0.5, 2.0])  # with the driver
    e1 = y - f1  # 1, 2, 0, -1, 3
    e2 = y - f2  # 0.5, 0.5, -0.5, -0.5, 1
    adj = (f1 - f2) ** 2  # 0.25, 2.25, 0.25, 0.25, 4
    f = e1**2 - (e2**2 - adj)  # 1-0.25+0.25, 4-0.25+2.25, 0-0.25+0.25, 1-0.25+0.25, 9-1+4
    assert list(f) == [1.0, 6.0, 0.0, 1.0, 12.0]
    P = 5
    fbar = 20.0 / P  # 4
    V = sum((x - fbar) ** 2 for x in f) / P  # (9 + 4 + 16 + 9 + 64) / 5 = 20.4
    cw = math.sqrt(P) * fbar / math.sqrt(V)
    r = clark_west(y, f1, f2)
    assert V == pytest.approx(20.4)
    assert r.statistic == pytest.approx(cw, rel=1e-12)
    assert r.pvalue == pytest.approx(stats.norm.sf(cw))
    # one-sided normal critical values 1.282 / 1.645 / 2.326 (Clark & West 2007; normal quantiles)
    assert r.critical_values[0.10] == pytest.approx(1.2816, abs=1e-4)
    assert r.critical_values[0.05] == pytest.approx(1.6449, abs=1e-4)
    assert r.critical_values[0.01] == pytest.approx(2.3263, abs=1e-4)


def test_cw_newey_west_h3() -> None:
    # Newey & West (1987) Bartlett weights with h - 1 = 2 lags, computed independently.
    rng = np.random.default_rng(1)
    y, f1, f2 = rng.standard_normal((3, 40))
    f = (y - f1) ** 2 - ((y - f2) ** 2 - (f1 - f2) ** 2)
    dc = f - f.mean()
    g = [np.sum(dc[j:] * dc[: 40 - j]) / 40 for j in range(3)]
    V = g[0] + 2 * ((1 - 1 / 3) * g[1] + (1 - 2 / 3) * g[2])
    assert clark_west(y, f1, f2, h=3).statistic == pytest.approx(np.sqrt(40) * f.mean() / np.sqrt(V))


def test_batched_nan_tolerant_matches_loop() -> None:
    # Oracle: batch with NaN vs per-model calls on the complete pairs (common practice, no source).
    rng = np.random.default_rng(2)
    e1, e2 = rng.standard_normal((2, 4, 60))
    e1[1, 5] = np.nan
    e2[2, 10:13] = np.nan
    rb = diebold_mariano(e1, e2, h=1)
    for i in range(4):
        ok = np.isfinite(e1[i]) & np.isfinite(e2[i])
        ri = diebold_mariano(e1[i][ok], e2[i][ok], h=1)
        assert rb.statistic[i] == pytest.approx(ri.statistic)
        assert rb.nobs[i] == ok.sum()
    y, f1, f2 = rng.standard_normal((3, 4, 60))
    f2[3, 0] = np.nan
    cb = clark_west(y, f1, f2)
    ok = np.isfinite(f2[3])
    assert cb.statistic[3] == pytest.approx(clark_west(y[3][ok], f1[3][ok], f2[3][ok]).statistic)


@pytest.mark.slow
def test_dm_undersized_for_nested_models_cw_not() -> None:
    # Clark & West (2007): plain DM is undersized under nested models; CW is close to nominal.
    # Seeded simulation, invented data: y iid, restricted forecast 0, unrestricted = OLS on a useless driver
    # estimated on a rolling window of 40 (recursive forecasts over P = 100).
    rng = np.random.default_rng(3)
    M, R, P = 2000, 40, 100
    T = R + P
    x = rng.standard_normal((M, T))
    y = rng.standard_normal((M, T))
    f2 = np.empty((M, P))
    for i, t in enumerate(range(R, T)):  # loop over time, vectorised over models
        xs, ys = x[:, t - R: t], y[:, t - R: t]
        beta = np.sum(xs * ys, axis=1) / np.sum(xs * xs, axis=1)
        f2[:, i] = beta * x[:, t]
    yy = y[:, R:]
    f1 = np.zeros((M, P))
    dm = diebold_mariano(yy - f1, yy - f2, alternative="greater")
    cw = clark_west(yy, f1, f2)
    dm_size = np.mean(dm.pvalue < 0.05)
    cw_size = np.mean(cw.pvalue < 0.05)
    assert dm_size < 0.03
    assert 0.02 < cw_size < 0.09


@pytest.mark.parametrize("case", ["tiny", "constant", "all_nan"])
def test_degenerate_inputs(case: str) -> None:
    if case == "tiny":
        e1, e2 = np.array([1.0, 2.0]), np.array([0.0, 1.0])
        with pytest.raises(InsufficientDataError):
            diebold_mariano(e1, e2)
        with pytest.raises(InsufficientDataError):
            clark_west(e1, e2, e1)
    elif case == "constant":
        e = np.ones(20)
        r = diebold_mariano(e, e)
        assert r.statistic == 0.0 and r.pvalue == pytest.approx(1.0)
        c = clark_west(e, e, e)
        assert c.statistic == 0.0
    else:
        e = np.full(20, np.nan)
        with pytest.raises(InsufficientDataError):
            diebold_mariano(e, e)


def test_bad_arguments() -> None:
    e = np.zeros(10)
    with pytest.raises(ValueError, match="h"):
        diebold_mariano(e, e, h=0)
    with pytest.raises(ValueError, match="loss"):
        diebold_mariano(e, e, loss="huber")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="shape"):
        clark_west(e, e, np.zeros(9))
