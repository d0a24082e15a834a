"""False-alarm rates of monitoring after prewhitening by an estimated AR(1) error model.

Mimics the check's pipeline on invented weekly data: OLS on the m reference rows, residuals,
``fit_error_model(resid, "ar(1)")``, ``prewhiten``, ``monitor(..., horizon=2.0)`` for csw, page and
mosum; k = 10 regressors (constant, trend, 3 annual Fourier pairs, 2 AR(1) drivers with phi 0.5),
AR(1) errors. Three variants:

- ``before``: least-squares phi, asymptotic known-scale tables (``bias_correction=False``,
  ``scale_dof=None``): the behaviour before the estimated-scale options existed;
- ``defaults``: the calls exactly as written (no ``X``, no ``error_model``): constant-only bias correction
  and sigma-hat degrees of freedom only;
- ``full``: ``fit_error_model(..., X=reference rows)`` and ``monitor(..., error_model=em)``.

Run from the repository root: ``python tools/size_arma_monitoring.py --reps 2000`` (seeded; prints a table).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from drift.engine.arma import fit_error_model, prewhiten
from drift.engine.monitor import monitor

SEED = 20240701
WEEKS_PER_YEAR = 52.18


def weekly_design(rng: np.random.Generator, M: int, T: int) -> np.ndarray:
    """(M, T, 10): constant, trend, 3 annual Fourier pairs, two AR(1) drivers (phi 0.5)."""
    t = np.arange(T)
    cols = [np.ones(T), t / T]
    for j in (1, 2, 3):
        cols += [np.sin(2 * np.pi * j * t / WEEKS_PER_YEAR), np.cos(2 * np.pi * j * t / WEEKS_PER_YEAR)]
    base = np.broadcast_to(np.stack(cols, axis=1), (M, T, len(cols)))
    d = rng.standard_normal((M, T, 2))
    for i in range(1, T):
        d[:, i] += 0.5 * d[:, i - 1]
    return np.concatenate([base, d], axis=2)


def ar1_errors(rng: np.random.Generator, M: int, T: int, phi: float, burn: int = 50) -> np.ndarray:
    u = rng.standard_normal((M, T + burn))
    for i in range(1, T + burn):
        u[:, i] += phi * u[:, i - 1]
    return u[:, burn:]


def simulate(phi: float, m: int, reps: int, seed: int, variant: str, horizon: float = 2.0,
             shift: float = 0.0) -> dict[str, float]:
    """Alarm rates per detector/level (and the check's csw-or-page union at 0.025 each)."""
    rng = np.random.default_rng(seed)
    T = m + round(horizon * m)
    X = weekly_design(rng, reps, T)
    y = X @ np.array([1.0, 0.5, 0.3, -0.2, 0.1, 0.1, 0.0, 0.0, 1.0, -1.0]) + ar1_errors(rng, reps, T, phi)
    if shift:
        y[:, m + (T - m) // 2:] += shift  # level shift half way through the monitored span
    Xr, yr = X[:, :m], y[:, :m]
    b = np.linalg.solve(np.einsum("mti,mtj->mij", Xr, Xr), np.einsum("mti,mt->mi", Xr, yr)[..., None])[..., 0]
    resid = yr - np.einsum("mtk,mk->mt", Xr, b)
    if variant == "before":
        em = fit_error_model(resid, "ar(1)", bias_correction=False)
        kw: dict = {"scale_dof": None}
    elif variant == "defaults":
        em = fit_error_model(resid, "ar(1)")
        kw = {}
    else:
        em = fit_error_model(resid, "ar(1)", X=Xr)
        kw = {"error_model": em}
    yt, Xt = prewhiten(y, X, em)
    out: dict[str, float] = {"phi_hat": float(np.nanmean(em.ar[:, 0]))}
    hits = {}
    for det in ("csw", "page", "mosum"):
        for lv in (0.025, 0.05):
            r = monitor(yt, Xt, m, horizon=horizon, detector=det, level=lv, **kw)
            hits[det, lv] = r.alarm_index >= 0
            out[f"{det}@{lv}"] = float(hits[det, lv].mean())
    out["check"] = float((hits["csw", 0.025] | hits["page", 0.025]).mean())
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=2000)
    ap.add_argument("--variants", default="before,defaults,full")
    ap.add_argument("--shift", type=float, default=0.0, help="level shift (power) instead of the null")
    args = ap.parse_args()
    cols = ["phi_hat", "csw@0.05", "page@0.05", "mosum@0.05", "csw@0.025", "page@0.025", "check"]
    print(f"seed {SEED}, {args.reps} replications per cell, horizon 2, k = 10, shift {args.shift}")
    print("variant   m    phi  " + "  ".join(f"{c:>10}" for c in cols))
    for variant in args.variants.split(","):
        for m in (100, 156):
            for i, phi in enumerate((0.0, 0.3, 0.5, 0.7)):
                t0 = time.time()
                o = simulate(phi, m, args.reps, SEED + 10 * m + i, variant, shift=args.shift)
                print(f"{variant:9} {m:3d}  {phi:.1f}  " + "  ".join(f"{o[c]:10.3f}" for c in cols)
                      + f"   ({time.time() - t0:.0f} s)", flush=True)


if __name__ == "__main__":
    main()
