"""Screening benchmark: the recursive / CUSUM / rolling pass over a large batch of models.

Times ``recursive_fit + cusum + cusum_squares + rolling_coefficients`` (and ``monitor`` when
``drift.engine.monitor`` is importable) on M models x n weeks x k regressors, compares with a per-model
loop over statsmodels ``RecursiveLS`` + ``RollingOLS`` on a subset (scaled up to M), and reports peak
memory. A script, not a test: timings depend on the machine.

Usage::

    python benchmarks/bench_screening.py [--models 10000] [--weeks 260] [--k 4] [--window 52] [--subset 50]
"""

from __future__ import annotations

import argparse
import importlib
import resource
import sys
import time
import tracemalloc
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np

from drift.engine.cusum import cusum, cusum_squares
from drift.engine.recursive import recursive_fit
from drift.engine.rolling import rolling_coefficients


def make_data(M: int, n: int, k: int, seed: int = 20240601) -> tuple[np.ndarray, np.ndarray]:
    """Intercept + (k-1) AR(1) drivers; a quarter of the models get a coefficient shift at 60%."""
    rng = np.random.default_rng(seed)
    X = np.empty((M, n, k))
    X[:, :, 0] = 1.0
    e = rng.normal(size=(M, n, k - 1))
    for t in range(1, n):
        e[:, t] += 0.6 * e[:, t - 1]
    X[:, :, 1:] = e
    beta = rng.normal(size=(M, k))
    y = np.einsum("mtk,mk->mt", X, beta) + rng.normal(size=(M, n))
    shifted = rng.random(M) < 0.25
    brk = int(0.6 * n)
    y[shifted, brk:] += X[shifted, brk:, 1] * 1.0
    return y, X


def _monitor() -> Callable[..., Any] | None:
    try:
        mod = importlib.import_module("drift.engine.monitor")
    except ImportError:
        return None
    return getattr(mod, "monitor", None)


def engine_pass(y: np.ndarray, X: np.ndarray, window: int, monitor: Callable[..., Any] | None) -> dict[str, float]:
    times: dict[str, float] = {}
    t0 = time.perf_counter()
    fit = recursive_fit(y, X)
    t1 = time.perf_counter()
    cusum(fit.resid, k=fit.k)
    cusum_squares(fit.resid, k=fit.k)
    t2 = time.perf_counter()
    rolling_coefficients(y, X, window)
    t3 = time.perf_counter()
    times.update(recursive_fit=t1 - t0, cusum_both=t2 - t1, rolling=t3 - t2)
    if monitor is not None:
        monitor(y, X, y.shape[1] // 2)
        times["monitor"] = time.perf_counter() - t3
    times["total"] = sum(times.values())
    return times


def statsmodels_pass(y: np.ndarray, X: np.ndarray, window: int) -> float:
    import statsmodels.api as sm
    from statsmodels.regression.rolling import RollingOLS

    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for m in range(y.shape[0]):
            res = sm.RecursiveLS(y[m], X[m]).fit()
            _ = res.cusum, res.cusum_squares, res.resid_recursive
            roll = RollingOLS(y[m], X[m], window=window).fit()
            _ = roll.params, roll.bse
    return time.perf_counter() - t0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", type=int, default=10_000)
    ap.add_argument("--weeks", type=int, default=260)
    ap.add_argument("--k", type=int, default=4)
    ap.add_argument("--window", type=int, default=52)
    ap.add_argument("--subset", type=int, default=50)
    ap.add_argument("--repeat", type=int, default=3, help="engine passes; the best is reported")
    a = ap.parse_args(argv)

    y, X = make_data(a.models, a.weeks, a.k)
    monitor = _monitor()
    print(f"data: {a.models} models x {a.weeks} weeks x {a.k} regressors; window {a.window}")
    print(f"monitor: {'included' if monitor is not None else 'drift.engine.monitor not available, skipped'}")

    engine_pass(y[:64], X[:64], a.window, monitor)  # warm-up (imports, scipy tables)
    best: dict[str, float] | None = None
    for _ in range(a.repeat):
        t = engine_pass(y, X, a.window, monitor)
        if best is None or t["total"] < best["total"]:
            best = t
    assert best is not None
    for name, sec in best.items():
        print(f"  engine {name:<15s} {sec:8.3f} s")

    tracemalloc.start()
    engine_pass(y, X, a.window, monitor)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux
    inputs = (y.nbytes + X.nbytes) / 2**20
    print(f"  peak memory allocated by one engine pass (tracemalloc): {peak / 2**20:8.1f} MiB")
    print(f"  peak resident set size of the process (getrusage, incl. {inputs:.0f} MiB inputs): {rss:8.1f} MiB")

    sub = min(a.subset, a.models)
    t_sm = statsmodels_pass(y[:sub], X[:sub], a.window)
    scaled = t_sm * a.models / sub
    ref = best["total"] - best.get("monitor", 0.0)
    print(f"  statsmodels loop (RecursiveLS + RollingOLS) on {sub} models: {t_sm:.3f} s -> "
          f"{scaled:.1f} s scaled to {a.models}")
    print(f"  speed-up over statsmodels (same work, monitor excluded): {scaled / ref:.0f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
