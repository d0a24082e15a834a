"""Dating benchmark: change-point search and unknown-date break tests, per flagged model.

These run only on the models the screening pass flags, so they are timed per model. Compared with a plain
ruptures Pelt call with its default settings (model "l2", min_size 2, jump 5) on the same series.
Invented data: 260 weeks, intercept + 3 AR(1) drivers, a coefficient shift at week 180 (seed 20261201).

    python benchmarks/bench_dating.py [--models 50]

A script, not a test: timings depend on the machine.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import ruptures as rpt

from drift import engine


def data(M: int, T: int = 260, k: int = 4, seed: int = 20261201) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    X = np.ones((M, T, k))
    for j in range(1, k):
        e = rng.normal(size=(M, T))
        x = np.zeros((M, T))
        for t in range(1, T):
            x[:, t] = 0.6 * x[:, t - 1] + e[:, t]
        X[:, :, j] = x
    beta = rng.normal(size=(M, k))
    shift = np.where(np.arange(T) >= 180, 1.0, 0.0)
    y = np.einsum("mtk,mk->mt", X, beta) + shift[None, :] * X[:, :, 1] + rng.normal(size=(M, T))
    return y, X


def timed(fn, repeat: int = 1) -> float:
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", type=int, default=50)
    args = ap.parse_args()
    M = args.models
    y, X = data(M)
    w = engine.recursive_residuals(y, X)
    rows = [
        ("change_points, linear cost (regression), pelt, jump=1", lambda: engine.change_points(y, X)),
        ("change_points, l2 cost on recursive residuals, pelt, jump=1",
         lambda: engine.change_points(np.nan_to_num(w[:, 4:]), cost="l2")),
        ("sup_f (Andrews 1993, 15% trimming), batched", lambda: engine.sup_f(y, X)),
        ("chow at a known date, batched", lambda: engine.chow(y, X, 180)),
        ("ruptures Pelt defaults (l2, min_size 2, jump 5) on y",
         lambda: [rpt.Pelt().fit(y[i]).predict(pen=2 * np.var(np.diff(y[i])) * np.log(y.shape[1]))
                  for i in range(M)]),
    ]
    print(f"{M} flagged models x {y.shape[1]} weeks x {X.shape[2]} regressors")
    for name, fn in rows:
        t = timed(fn)
        print(f"  {name:<64} {t:8.3f} s  {1000 * t / M:8.2f} ms/model")


if __name__ == "__main__":
    main()
