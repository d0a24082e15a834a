"""Published constants of the CUSUM family (drift.engine.tables: bde, edgerton_wells, ploberger_kramer)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from drift.engine.tables import bde
from drift.engine.tables import edgerton_wells as ew
from drift.engine.tables import ploberger_kramer as pk


# source: Brown, Durbin & Evans (1975), JRSS B 37(2), section 2.3; recomputed from the defining equation
@pytest.mark.parametrize("level, a", [(0.10, 0.850), (0.05, 0.948), (0.01, 1.143)])
def test_bde_constants_recomputed(level: float, a: float) -> None:
    assert bde.CUSUM_A[level] == a
    assert bde.solve_a(level) == pytest.approx(a, abs=5e-4)
    assert float(bde.crossing_probability(a)) == pytest.approx(level, rel=0.01)
    assert bde.cusum_a(level) == a


def test_bde_lookup_beyond_table_and_errors() -> None:
    # common practice, no source: other levels come from the equation itself
    a = bde.cusum_a(0.2)
    assert float(bde.crossing_probability(a)) == pytest.approx(0.2, rel=1e-10)
    assert float(bde.crossing_probability(0.0)) == 1.0  # capped to [0, 1]
    assert np.isnan(bde.crossing_probability(np.nan))
    for bad in (0.0, 1.0, -0.1):
        with pytest.raises(ValueError, match="level"):
            bde.solve_a(bad)


# source: REFERENCES.md [S] (statsmodels 0.15.0 recursive_ls._cusum_squares_scalars, Edgerton & Wells 1994)
def test_edgerton_wells_coefficients_and_formula() -> None:
    from statsmodels.regression.recursive_ls import _cusum_squares_scalars

    for i, lvl in enumerate([0.10, 0.05, 0.025, 0.01, 0.005]):
        np.testing.assert_array_equal(ew.EW_COEFFICIENTS[lvl], _cusum_squares_scalars[:, i])
        # leading coefficient is the one-sided Smirnov quantile sqrt(-ln(alpha)/2) (computed)
        assert ew.EW_COEFFICIENTS[lvl][0] == pytest.approx(np.sqrt(-np.log(lvl) / 2), abs=1e-7)
    n = 48.5  # T - k = 99
    c1, c2, c3 = ew.EW_COEFFICIENTS[0.025]
    assert float(ew.c0(n, 0.05)) == pytest.approx(c1 / n**0.5 + c2 / n + c3 / n**1.5, rel=1e-15)
    assert float(ew.c0(n, 0.025, sided=1)) == float(ew.c0(n, 0.05, sided=2))
    assert np.isnan(ew.c0(1.5, 0.05))  # below MIN_N the approximation is refused
    with pytest.raises(ValueError, match="level"):
        ew.c0(10.0, 0.03)
    with pytest.raises(ValueError, match="sided"):
        ew.c0(10.0, 0.05, sided=3)


# source: Durbin (1969), Biometrika 56(1), table value n = 99, 5% two-sided: 0.12823 (REFERENCES.md [S])
def test_edgerton_wells_close_to_durbin_table() -> None:
    assert float(ew.c0(99.0, 0.05)) == pytest.approx(0.12823, abs=1e-3)


# documented rule (edgerton_wells.pvalue Notes), no published source
def test_edgerton_wells_pvalue_rule() -> None:
    n = ew.ew_n(np.array([20, 77, 250]))
    for lvl in (0.20, 0.10, 0.05, 0.02, 0.01):
        np.testing.assert_allclose(ew.pvalue(ew.c0(n, lvl), n), lvl, rtol=1e-12)
    d = np.linspace(0.0, 0.8, 801)
    for nn in n:
        p = ew.pvalue(d, nn)
        assert (np.diff(p) <= 1e-15).all()  # monotone
        assert p[0] == 1.0 and p[-1] < 1e-5
        for lvl in (0.20, 0.01):  # continuous at the table's edges
            edge = float(ew.c0(nn, lvl))
            lo, hi = ew.pvalue(np.array([edge - 1e-9, edge + 1e-9]), nn)
            assert abs(lo - hi) < 1e-6
    assert np.isnan(ew.pvalue(0.1, 1.0)) and np.isnan(ew.pvalue(np.nan, 30.0))


# source: Ploberger & Kramer (1992), Econometrica 60(2); quantiles via scipy.stats.kstwobign
@pytest.mark.parametrize("level, c", [(0.10, 1.2238), (0.05, 1.3581), (0.01, 1.6276)])
def test_ploberger_kramer_quantiles(level: float, c: float) -> None:
    assert pk.OLS_CUSUM_CRITICAL[level] == c
    assert pk.critical_value(level) == pytest.approx(c, abs=5e-5)
    assert float(pk.pvalue(pk.critical_value(level))) == pytest.approx(level, rel=1e-10)
    assert float(pk.pvalue(c)) == pytest.approx(float(stats.kstwobign.sf(c)))
    with pytest.raises(ValueError, match="level"):
        pk.critical_value(1.0)
