"""Critical values and p-values of the Nyblom (1989) / Hansen (1992) L_c parameter-stability statistic.

Published table
---------------
Asymptotic critical values of the joint L_c with m tested parameters, i.e. quantiles of
``int_0^1 ||B_m(r)||^2 dr`` (B_m an m-dimensional Brownian bridge); Nyblom, J. (1989), "Testing for the
constancy of parameters over time", *JASA* 84(405), 223-230, and Hansen, B. E. (1992), "Testing for
parameter instability in linear models", *Journal of Policy Modeling* 14(4), 517-533 (Table 1).
The values below (m = 1..5) were confirmed by numerical (Imhof) inversion of the characteristic
function, as recorded in the team's REFERENCES.md.

Simulated table
---------------
For m > 5 critical values, and for all p-values, :mod:`drift.engine.tables.nyblom_sim` (written by
``tools/simulate_break_tables.py``; seeded Karhunen-Loeve series simulation).

Lookup rules: m must be 1..nyblom_sim.MAX_M (else ``ValueError``); p-values interpolate ``ln(prob)``
linearly in the statistic between tabulated quantiles, extrapolate it linearly above the largest
(prob 0.001), and interpolate linearly towards (0, 1) below the smallest (prob 0.99) -- see
:func:`drift.engine.tables.andrews.tail_pvalue`.
"""

from __future__ import annotations

import numpy as np

from drift.engine.tables import nyblom_sim
from drift.engine.tables.andrews import tail_pvalue

# REFERENCES.md [C, Imhof inversion]: level -> {m: critical value}
LC: dict[float, dict[int, float]] = {
    0.10: {1: 0.3473, 2: 0.6070, 3: 0.8412, 4: 1.0631, 5: 1.2777},
    0.05: {1: 0.4614, 2: 0.7475, 3: 1.0002, 4: 1.2373, 5: 1.4651},
    0.01: {1: 0.7435, 2: 1.0737, 3: 1.3586, 4: 1.6226, 5: 1.8740},
}


def _check(m: int) -> None:
    if not isinstance(m, (int, np.integer)) or not 1 <= m <= nyblom_sim.MAX_M:
        raise ValueError(f"m (number of tested parameters) must be an integer in 1..{nyblom_sim.MAX_M}, got {m!r}")


def critical_values(m: int, levels: tuple[float, ...] = (0.10, 0.05, 0.01)) -> dict[float, float]:
    """L_c critical values keyed by level: published for m <= 5, simulated otherwise."""
    _check(m)
    out = {}
    for lv in levels:
        if lv in LC and m in LC[lv]:
            out[lv] = LC[lv][int(m)]
            continue
        idx = [i for i, pr in enumerate(nyblom_sim.PROBS) if abs(pr - lv) < 1e-12]
        if not idx:
            raise ValueError(f"levels must be among {nyblom_sim.PROBS}, got {lv!r}")
        out[lv] = float(nyblom_sim.QUANTILES[m - 1][idx[0]])
    return out


def pvalue(x: np.ndarray, m: int) -> np.ndarray:
    """Approximate asymptotic p-value(s) of L_c with m tested parameters (simulated table)."""
    _check(m)
    return tail_pvalue(x, np.asarray(nyblom_sim.QUANTILES[m - 1], dtype=float), nyblom_sim.PROBS)
