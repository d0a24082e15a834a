"""Critical values and approximate p-values of the unknown-date (sup / ave / exp Wald) break tests.

Published table
---------------
Andrews, D. W. K. (1993), "Tests for parameter instability and structural change with unknown change
point", *Econometrica* 61(4), 821-856, Table 1 (asymptotic critical values of sup-Wald/LM/LR), with the
corrections of Andrews, D. W. K. (2003), "Tests for parameter instability and structural change with
unknown change point: a corrigendum", *Econometrica* 71(1), 395-397; values for symmetric 15% trimming
(pi0 = 0.15) and p = 1..5 tested coefficients on the chi-square (Wald) scale, as tabulated by Stock &
Watson (2003), *Introduction to Econometrics*, and recorded in the team's REFERENCES.md.

Simulated table
---------------
Everything else (ave- and exp-Wald of Andrews & Ploberger 1994, other p, other trimming, and all
p-values) comes from :mod:`drift.engine.tables.supf_sim`, written by ``tools/simulate_break_tables.py``
(seeded Brownian-bridge simulation; see that module's docstring for seed, replications and steps).

Lookup rules (beyond the tables' edges)
---------------------------------------
* ``p`` must be 1..MAX_P of the simulated table; larger ``p`` raises ``ValueError``.
* ``trim`` between simulated grid points is interpolated linearly in ``ln(lambda)``,
  ``lambda = (1 - pi0)^2 / pi0^2`` (Andrews 1993 shows the limit depends on pi0 only through lambda);
  ``trim`` outside [TRIMS[0], TRIMS[-1]] raises ``ValueError``.
* p-values interpolate ``ln(prob)`` linearly in the statistic between tabulated quantiles; above the
  largest tabulated quantile (prob 0.001) ``ln(prob)`` is extrapolated linearly from the last two points
  (an exponential tail, the shape of a chi-square tail); below the smallest (prob 0.99) the p-value is
  interpolated linearly between (0, 1) and that point.
"""

from __future__ import annotations

import math

import numpy as np

from drift.engine.tables import supf_sim

# Andrews (1993) Table 1 / Andrews (2003) corrigendum: sup-Wald, pi0 = 0.15, chi-square scale.
SUP_WALD_15: dict[float, dict[int, float]] = {
    0.10: {1: 7.12, 2: 10.00, 3: 12.27, 4: 14.36, 5: 16.30},
    0.05: {1: 8.68, 2: 11.72, 3: 14.13, 4: 16.36, 5: 18.30},
    0.01: {1: 12.16, 2: 15.56, 3: 18.06, 4: 20.48, 5: 22.65},
}
PUBLISHED_TRIM = 0.15

STATS = ("sup", "ave", "exp")


def _check(stat: str, p: int, trim: float) -> None:
    if stat not in STATS:
        raise ValueError(f"stat must be one of {STATS}, got {stat!r}")
    if not isinstance(p, (int, np.integer)) or not 1 <= p <= supf_sim.MAX_P:
        raise ValueError(f"p (number of tested coefficients) must be an integer in 1..{supf_sim.MAX_P}, got {p!r}")
    lo, hi = supf_sim.TRIMS[0], supf_sim.TRIMS[-1]
    if not lo - 1e-12 <= trim <= hi + 1e-12:
        raise ValueError(f"trim must be in [{lo}, {hi}] (range of the simulated table), got {trim!r}")


def _lnlam(trim: float) -> float:
    return math.log((1.0 - trim) ** 2 / trim**2)


def simulated_quantiles(stat: str, p: int, trim: float) -> np.ndarray:
    """Simulated upper-tail quantiles at ``supf_sim.PROBS`` for one (stat, p, trim), interpolated in trim."""
    _check(stat, p, trim)
    trims = supf_sim.TRIMS
    table = supf_sim.QUANTILES[stat]
    for t in trims:
        if abs(t - trim) < 1e-9:
            return np.asarray(table[t][p - 1], dtype=float)
    j = int(np.searchsorted(trims, trim))
    t0, t1 = trims[j - 1], trims[j]
    w = (_lnlam(trim) - _lnlam(t0)) / (_lnlam(t1) - _lnlam(t0))
    return (1 - w) * np.asarray(table[t0][p - 1], dtype=float) + w * np.asarray(table[t1][p - 1], dtype=float)


def critical_values(p: int, trim: float = 0.15, stat: str = "sup",
                    levels: tuple[float, ...] = (0.10, 0.05, 0.01)) -> dict[float, float]:
    """Critical values (chi-square scale) keyed by level.

    Andrews (1993/2003) Table 1 for ``stat="sup"``, ``trim=0.15``, ``p <= 5``; the simulated table
    otherwise (levels must be among ``supf_sim.PROBS``).
    """
    _check(stat, p, trim)
    if (stat == "sup" and abs(trim - PUBLISHED_TRIM) < 1e-9 and p in SUP_WALD_15[0.05]
            and all(lv in SUP_WALD_15 for lv in levels)):
        return {lv: SUP_WALD_15[lv][int(p)] for lv in levels}
    q = simulated_quantiles(stat, p, trim)
    out = {}
    for lv in levels:
        matches = [i for i, pr in enumerate(supf_sim.PROBS) if abs(pr - lv) < 1e-12]
        if not matches:
            raise ValueError(f"levels must be among {supf_sim.PROBS}, got {lv!r}")
        out[lv] = float(q[matches[0]])
    return out


def tail_pvalue(x: np.ndarray, quantiles: np.ndarray, probs: tuple[float, ...]) -> np.ndarray:
    """p-value of statistic(s) ``x`` from upper-tail ``quantiles`` at ``probs`` (see module rules).

    NaN in, NaN out; ``+inf`` gives 0.
    """
    x = np.asarray(x, dtype=float)
    q = np.asarray(quantiles, dtype=float)
    lp = np.log(np.asarray(probs, dtype=float))
    out = np.full(x.shape, np.nan)
    fin = np.isfinite(x)
    xf = x[fin]
    res = np.interp(xf, q, lp)
    slope = (lp[-1] - lp[-2]) / (q[-1] - q[-2])
    above = xf > q[-1]
    res[above] = lp[-1] + slope * (xf[above] - q[-1])
    pv = np.exp(res)
    below = xf < q[0]
    pv[below] = 1.0 - (1.0 - probs[0]) * np.clip(xf[below], 0.0, None) / q[0]
    out[fin] = pv
    out[np.isposinf(x)] = 0.0
    return out


def pvalue(x: np.ndarray, p: int, trim: float = 0.15, stat: str = "sup") -> np.ndarray:
    """Approximate asymptotic p-value(s) of a sup/ave/exp-Wald statistic (chi-square scale)."""
    return tail_pvalue(x, simulated_quantiles(stat, p, trim), supf_sim.PROBS)
