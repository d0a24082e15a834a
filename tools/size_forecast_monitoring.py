"""False-alarm rates of the monitors of logged production forecast errors (drift.deployed).

Invented errors of h-step forecasts: MA(h − 1) with the weights of an AR(1) process's h-step forecast
errors (psi_j = 0.6^j), Gaussian; a baseline of m periods, then 2 m monitored periods (``horizon=2``),
page detector, each monitor at 2.5% (the check's ``level / 2`` at the default 5%). Two ways of allowing
for the h − 1 overlap:

- ``non-overlapping`` (what drift ships, :func:`drift.deployed.monitor_forecast_errors`): the monitors see
  every h-th error only, which are independent under MA(h − 1);
- ``prewhitened``: an MA(h − 1) filter estimated on the baseline (Hannan–Rissanen,
  ``fit_error_model``), the monitors on the filtered errors with the filter's estimation error passed as
  ``error_model``; the scale monitor on the square roots of the absolute innovations.

Run from the repository root: ``python tools/size_forecast_monitoring.py --reps 2000`` (seeded; prints a
table of the rates: mean monitor, scale monitor, either).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from drift.deployed import monitor_forecast_errors
from drift.engine.arma import fit_error_model, prewhiten
from drift.engine.monitor import monitor

SEED = 20261203
LEVEL = 0.025


def errors(rng: np.random.Generator, M: int, T: int, h: int) -> np.ndarray:
    psi = 0.6 ** np.arange(h)
    s = rng.standard_normal((M, T + h))
    return sum(psi[j] * s[:, h - 1 - j: h - 1 - j + T] for j in range(h))  # type: ignore[return-value]


def shipped(E: np.ndarray, m: int, h: int) -> np.ndarray:
    M = E.shape[0]
    out = monitor_forecast_errors(E, np.zeros(M, int), np.full(M, m), h, level=LEVEL, horizon=2.0,
                                  detector="page", recent_window=52)
    return np.array([[r["alarm_row"] >= 0 for r in o["monitors"]] for o in out])


def prewhitened(E: np.ndarray, m: int, h: int) -> np.ndarray:
    M, T = E.shape
    rows = np.arange(T)[None, :]
    mu = E[:, :m].mean(axis=1)
    ones = np.ones((M, T, 1))
    em = None
    if h > 1:
        em = fit_error_model(np.where(rows < m, E - mu[:, None], np.nan), (0, h - 1))
        Y, X = prewhiten(E, ones, em)
    else:
        Y, X = E, ones
    r1 = monitor(Y, X, np.full(M, m), horizon=2.0, detector="page", level=LEVEL, error_model=em)
    spread = np.sqrt(np.abs(Y - X[:, :, 0] * mu[:, None]))
    r2 = monitor(spread, ones, np.full(M, m), horizon=2.0, detector="page", level=LEVEL, error_model=em)
    return np.stack([np.atleast_1d(r1.alarm_index) >= 0, np.atleast_1d(r2.alarm_index) >= 0], axis=1)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=2000)
    args = ap.parse_args()
    print(f"seed {SEED}, {args.reps} replications per cell, level {LEVEL} per monitor, horizon 2, page")
    print(f"{'h':>3} {'m':>4}  {'non-overlapping: mean scale either':>36}  {'prewhitened: mean scale either':>32}")
    for h in (1, 2, 4, 8):
        for m in (52, 104, 156):
            rng = np.random.default_rng([SEED, h, m])
            E = errors(rng, args.reps, 3 * m, h)
            t0 = time.time()
            a = shipped(E, m, h) if (m // h) >= 13 else None
            b = prewhitened(E, m, h)

            def fmt(x: np.ndarray | None) -> str:
                if x is None:
                    return f"{'(baseline too short)':>36}"
                return f"{x[:, 0].mean():>12.3f} {x[:, 1].mean():>6.3f} {x.any(axis=1).mean():>6.3f}"

            print(f"{h:>3} {m:>4}  {fmt(a):>36}  {fmt(b):>32}   ({time.time() - t0:.1f} s)", flush=True)


if __name__ == "__main__":
    main()
