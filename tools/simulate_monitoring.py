"""Simulate the critical values of drift's sequential monitoring detectors and the Trigg signal quantiles.

Writes ``drift/engine/tables/monitoring.py`` (committed). Run from the repository root::

    python tools/simulate_monitoring.py            # full run (about a minute on 2 cores)
    python tools/simulate_monitoring.py --reps 2000 --out /tmp/m.py   # quick smoke run

What is simulated
-----------------
Under the null the monitored recursive residuals are iid N(0, sigma^2), so the standardised partial sums
``S_k / sqrt(m)`` (k = monitored steps, m = reference size) behave like a Brownian motion ``W(t)``,
``t = k/m``. Each replication draws ``H_max * m`` iid N(0, 1) increments (sigma known: the asymptotic
case) and records, for every horizon ``H`` in the grid, the maximum over ``k <= H m`` of

- CSW finite horizon: ``S_k^2 / n - ln(n / m)`` with ``n = m + k`` (the a^2 at which the Chu,
  Stinchcombe & White 1996 boundary ``sqrt(n [a^2 + ln(n/m)])`` is first touched);
- MOSUM(h): ``|S_k - S_{max(k - L, 0)}| / sqrt(L)``, ``L = round(h m)`` (window of the last L monitored
  residuals; while fewer than L are available the missing part counts as zero);
- Page(gamma): ``max_{0<=j<=k} |S_k - S_j| / (sqrt(m) w(t))`` with
  ``w(t) = sqrt(1 + t) (t / (1 + t))^gamma`` (the Brownian-motion analogue of Fremdt's 2015 weight).

Quantiles of these maxima over replications are the critical values for "a false alarm anywhere within the
horizon" at each tail probability.

Estimated scale (``*_DOF`` tables). In use the partial sums are divided by a scale estimated on the
reference period, independent of the monitored residuals: for iid normal errors ``sigma-hat^2 / sigma^2``
is exactly chi^2_nu / nu with nu = m - k (the reference RSS is a sum of m - k squared recursive residuals,
independent of the later ones; Brown, Durbin & Evans 1975). Each replication therefore also gets a scale
``s = sqrt(chi^2_nu / nu)`` (stratified: the chi^2_nu quantiles at (i + 0.5)/reps in a random order, drawn
from a second generator so the known-sigma tables are unchanged) and the same maxima are recorded with the
path divided by s: mosum and page statistics scale as 1/s, the csw statistic is recomputed on the scaled
path. This is the sequential analogue of replacing the normal by Student's t. The Trigg (1964) table holds stationary quantiles of ``|T_t|`` for iid
N(0, 1) errors, pooled over times after a burn-in.
"""

from __future__ import annotations

import argparse
import pathlib
import time

import numpy as np
from scipy import signal

SEED = 20240611
HORIZONS = (0.25, 0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 6.0)
TAIL_PROBS = (0.50, 0.30, 0.20, 0.15, 0.10, 0.075, 0.05, 0.025, 0.01, 0.005, 0.0025, 0.001)
MOSUM_H = (0.1, 0.25, 0.5, 1.0)
PAGE_GAMMA = (0.0, 0.25, 0.45)
TRIGG_ALPHA = (0.05, 0.1, 0.2, 0.3)
TRIGG_LEVELS = (0.10, 0.05, 0.01)
#: Degrees of freedom of the estimated scale for the ``*_DOF`` tables (interpolated in 1/nu; nu = inf is
#: the known-sigma table).
SCALE_SEED = SEED + 1
DOF = (2, 3, 4, 6, 8, 12, 16, 24, 32, 48, 64, 96, 128, 256, 512)


def _scale_draws(reps: int, rng: np.random.Generator) -> np.ndarray:
    """(len(DOF), reps) stratified draws of sqrt(chi^2_nu / nu), each row in its own random order."""
    from scipy import stats

    u = (np.arange(reps) + 0.5) / reps
    return np.stack([np.sqrt(stats.chi2.ppf(u, nu) / nu)[rng.permutation(reps)] for nu in DOF])


def simulate_monitoring(reps: int, m: int, rng: np.random.Generator, chunk: int = 500,
                        scale_rng: np.random.Generator | None = None) -> dict:
    hmax = max(HORIZONS)
    n_steps = int(round(hmax * m))
    k = np.arange(1, n_steps + 1)
    checkpoints = [int(round(h * m)) for h in HORIZONS]
    n = m + k
    log_ratio = np.log(n / m)
    t = k / m
    out: dict[str, np.ndarray] = {
        "csw": np.empty((reps, len(HORIZONS))),
        **{f"mosum{h}": np.empty((reps, len(HORIZONS))) for h in MOSUM_H},
        **{f"page{g}": np.empty((reps, len(HORIZONS))) for g in PAGE_GAMMA},
    }
    scales = _scale_draws(reps, scale_rng if scale_rng is not None else np.random.default_rng(SEED + 1))
    csw_dof = {nu: np.empty((reps, len(HORIZONS))) for nu in DOF}

    def record(name: str, stat: np.ndarray, lo: int, hi: int) -> None:
        run = np.maximum.accumulate(stat, axis=1)
        out[name][lo:hi] = run[:, [c - 1 for c in checkpoints]]

    for lo in range(0, reps, chunk):
        hi = min(reps, lo + chunk)
        s = np.cumsum(rng.standard_normal((hi - lo, n_steps)), axis=1)
        record("csw", s * s / n - log_ratio, lo, hi)
        s2n = s * s / n
        for i, nu in enumerate(DOF):
            sc2 = scales[i, lo:hi, None] ** 2
            csw_dof[nu][lo:hi] = np.maximum.accumulate(s2n / sc2 - log_ratio, axis=1)[:, [c - 1 for c in checkpoints]]
        s0 = np.concatenate([np.zeros((hi - lo, 1)), s], axis=1)  # S_0 = 0
        for h in MOSUM_H:
            L = int(round(h * m))
            lagged = s0[:, np.maximum(k - L, 0)]
            record(f"mosum{h}", np.abs(s - lagged) / np.sqrt(L), lo, hi)
        run_min = np.minimum.accumulate(s0, axis=1)[:, 1:]
        run_max = np.maximum.accumulate(s0, axis=1)[:, 1:]
        page = np.maximum(s - run_min, run_max - s) / np.sqrt(m)
        for g in PAGE_GAMMA:
            w = np.sqrt(1.0 + t) * (t / (1.0 + t)) ** g
            record(f"page{g}", page / w, lo, hi)
    q = 1.0 - np.asarray(TAIL_PROBS)
    tables = {name: np.quantile(v, q, axis=0).T for name, v in out.items()}  # (horizon, tail)
    for i, nu in enumerate(DOF):
        tables[f"csw|{nu}"] = np.quantile(csw_dof[nu], q, axis=0).T
        for name, v in out.items():  # mosum/page maxima scale as 1/s
            if name != "csw":
                tables[f"{name}|{nu}"] = np.quantile(v / scales[i][:, None], q, axis=0).T
    return tables


def simulate_trigg(series: int, length: int, burn: int, rng: np.random.Generator) -> dict:
    e = rng.standard_normal((series, burn + length))
    table = {}
    for a in TRIGG_ALPHA:
        b, den = [a], [1.0, -(1.0 - a)]
        smooth = signal.lfilter(b, den, e, axis=1)
        mad = signal.lfilter(b, den, np.abs(e), axis=1, zi=np.full((series, 1), (1 - a) * np.sqrt(2 / np.pi)))[0]
        tr = np.abs(smooth[:, burn:] / mad[:, burn:]).ravel()
        table[a] = {lvl: float(np.quantile(tr, 1.0 - lvl)) for lvl in TRIGG_LEVELS}
    return table


def _fmt_rows(arr: np.ndarray) -> str:
    return "[\n" + "".join("        [" + ", ".join(f"{x:.4f}" for x in row) + "],\n" for row in arr) + "    ]"


LOOKUP_CODE = '''

def _row(table: dict, key: float, name: str) -> Any:
    for k, v in table.items():
        if abs(k - key) < 1e-12:
            return v
    raise ValueError(f"{name} must be one of {sorted(table)}, got {key!r}")


def _interp_horizon(rows: Any, horizon: Any) -> np.ndarray:
    """Rows of quantiles (len(HORIZONS), len(TAIL_PROBS)) interpolated linearly at each horizon.

    Below the smallest tabulated horizon the smallest horizon's row is used (conservative: critical values
    grow with the horizon). Above the largest a ValueError is raised.
    """
    horizon = np.atleast_1d(np.asarray(horizon, dtype=float))
    if np.any(~np.isfinite(horizon)) or np.any(horizon <= 0):
        raise ValueError("horizon must be positive and finite")
    if np.any(horizon > HORIZONS[-1] + 1e-12):
        raise ValueError(
            f"horizon {float(horizon.max()):.3g} is beyond the simulated table (max {HORIZONS[-1]}); "
            "extend tools/simulate_monitoring.py or monitor in shorter spans"
        )
    hz = np.asarray(HORIZONS)
    rows = np.asarray(rows, dtype=float)
    return np.stack([np.interp(horizon, hz, rows[:, j]) for j in range(rows.shape[1])], axis=-1)


def _check_dof(dof: Any, shape: tuple[int, ...]) -> np.ndarray | None:
    if dof is None:
        return None
    nu = np.broadcast_to(np.asarray(dof, dtype=float), shape)
    if np.any(np.isnan(nu)) or np.any(nu < DOF[0] - 1e-12):
        raise ValueError(f"dof must be >= {DOF[0]} (the smallest tabulated) or inf, got {dof!r}")
    return nu


def quantiles(detector: str, param: float, horizon: Any, dof: Any = None) -> np.ndarray:
    """Tabulated quantiles, shape ``horizon.shape + (len(TAIL_PROBS),)``, at each horizon and scale dof.

    ``dof`` None (or inf): known scale (``CSW_FINITE`` / ``MOSUM`` / ``PAGE``). Otherwise the ``*_DOF``
    tables, interpolated linearly in 1/dof between the tabulated ``DOF`` and the known-scale table at
    1/dof = 0 (the quantiles are close to linear in 1/dof, as Student's t quantiles are). A dof below
    ``DOF[0]`` raises ValueError.
    """
    known, by_dof = _table(detector, param)
    horizon = np.atleast_1d(np.asarray(horizon, dtype=float))
    base = _interp_horizon(known, horizon)
    nu = _check_dof(dof, horizon.shape)
    if nu is None:
        return base
    inv_grid = np.concatenate([[0.0], 1.0 / np.asarray(DOF[::-1], dtype=float)])
    stack = np.stack([base] + [_interp_horizon(by_dof[d], horizon) for d in DOF[::-1]])
    with np.errstate(divide="ignore"):
        inv = np.where(np.isinf(nu), 0.0, 1.0 / nu)
    i = np.clip(np.searchsorted(inv_grid, inv, side="right") - 1, 0, len(inv_grid) - 2)
    w = ((inv - inv_grid[i]) / (inv_grid[i + 1] - inv_grid[i]))[..., None]
    lo = np.take_along_axis(stack, i[None, ..., None], axis=0)[0]
    hi = np.take_along_axis(stack, (i + 1)[None, ..., None], axis=0)[0]
    return (1.0 - w) * lo + w * hi


def critical_value(detector: str, param: float, horizon: Any, level: float, dof: Any = None) -> np.ndarray:
    """Critical value of ``detector`` ("mosum": param = window fraction h; "page": param = gamma; "csw":
    param ignored, returns the finite-horizon a^2) at false-alarm probability ``level`` over ``horizon``,
    for a known scale (``dof`` None) or a scale estimated with ``dof`` degrees of freedom.

    ``level`` is any probability in [min(TAIL_PROBS), max(TAIL_PROBS)]; between tabulated tail
    probabilities the quantile is interpolated linearly in log(level) (the tail is close to exponential, so
    this is accurate to the table's own Monte Carlo error; e.g. a Bonferroni share 0.05 / 4). Horizons are
    interpolated linearly (see :func:`_interp_horizon` for the edges), dof linearly in 1/dof (see
    :func:`quantiles`). Returns an array shaped like ``horizon``.
    """
    probs = np.asarray(TAIL_PROBS)
    if not (probs.min() - 1e-12 <= level <= probs.max() + 1e-12):
        raise ValueError(f"level must be in [{probs.min()}, {probs.max()}], got {level!r}")
    q = quantiles(detector, param, horizon, dof)
    j = [i for i, p in enumerate(TAIL_PROBS) if abs(p - level) < 1e-12]
    if j:
        return q[..., j[0]]
    # TAIL_PROBS decrease: find the segment [hi, lo] of probabilities around level
    i = int(np.searchsorted(-probs, -level))  # first index with prob < level
    p_hi, p_lo = probs[i - 1], probs[i]
    w = (np.log(p_hi) - np.log(level)) / (np.log(p_hi) - np.log(p_lo))
    return (1.0 - w) * q[..., i - 1] + w * q[..., i]


def pvalue(detector: str, param: float, horizon: Any, statistic: Any, dof: Any = None) -> np.ndarray:
    """Approximate p-value by interpolating log tail probability against the tabulated quantiles.

    Clipped to the tabulated range: a statistic below the median quantile gets 0.5 (read "p >= 0.5"), one
    beyond the last quantile gets 0.005 (read "p <= 0.005"). NaN statistics give NaN. Vectorised.
    """
    stat = np.atleast_1d(np.asarray(statistic, dtype=float))
    q = quantiles(detector, param, np.broadcast_to(horizon, stat.shape), dof)
    logp = np.log(np.asarray(TAIL_PROBS))
    finite = np.isfinite(stat)
    s = np.where(finite, stat, 0.0)
    j = np.clip((q <= s[..., None]).sum(axis=-1), 1, len(TAIL_PROBS) - 1)  # segment [j - 1, j]
    q0 = np.take_along_axis(q, (j - 1)[..., None], axis=-1)[..., 0]
    q1 = np.take_along_axis(q, j[..., None], axis=-1)[..., 0]
    w = np.clip((s - q0) / (q1 - q0), 0.0, 1.0)
    out = np.exp((1.0 - w) * logp[j - 1] + w * logp[j])
    return np.where(finite, out, np.nan)


def _table(detector: str, param: float) -> tuple[Any, dict]:
    if detector == "mosum":
        name = "mosum window fraction h"
        return _row(MOSUM, param, name), _row(MOSUM_DOF, param, name)
    if detector == "page":
        return _row(PAGE, param, "page gamma"), _row(PAGE_DOF, param, "page gamma")
    if detector == "csw":
        return CSW_FINITE, CSW_FINITE_DOF
    raise ValueError(f"detector must be 'mosum', 'page' or 'csw', got {detector!r}")


def trigg_limit(alpha: float, level: float) -> float:
    """Stationary (1 - level) quantile of |T| for iid normal errors and smoothing ``alpha``.

    Only tabulated ``alpha`` and ``level`` are available (ValueError otherwise).
    """
    row: dict[float, float] | None = None
    for a, v in TRIGG.items():
        if abs(a - alpha) < 1e-12:
            row = v
    if row is None:
        raise ValueError(f"alpha must be one of {sorted(TRIGG)} for a tabulated Trigg limit, got {alpha!r}")
    for lvl, val in row.items():
        if abs(lvl - level) < 1e-12:
            return float(val)
    raise ValueError(f"level must be one of {sorted(row)}, got {level!r}")
'''


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=40000)
    ap.add_argument("--m", type=int, default=250, help="discretisation: steps per unit of monitoring time")
    ap.add_argument("--out", default="drift/engine/tables/monitoring.py")
    args = ap.parse_args()
    rng = np.random.default_rng(SEED)
    t0 = time.time()
    mon = simulate_monitoring(args.reps, args.m, rng, scale_rng=np.random.default_rng(SCALE_SEED))
    trigg_series, trigg_len, trigg_burn = 200, 20000, 500
    trigg = simulate_trigg(trigg_series, trigg_len, trigg_burn, rng)
    elapsed = time.time() - t0

    parts = [f'''"""Simulated critical values for sequential monitoring and Trigg tracking-signal limits.

GENERATED by ``tools/simulate_monitoring.py`` -- do not edit by hand; re-run the script instead.

Simulation record: seed {SEED}, {args.reps} replications, discretisation m = {args.m} steps per unit of
monitoring time (horizon 1 = as many monitored observations as the reference sample), sigma known,
iid N(0, 1) increments; {elapsed:.0f} s. Critical values are the (1 - p) quantiles of the maximum of each
detector's statistic over the whole horizon, i.e. they hold the false-alarm probability p over the
monitoring span. A finer discretisation than a user's m makes them slightly conservative for that m.

Detectors (statistics on recursive residuals standardised by sigma; t = k/m, k monitored steps):

- ``CSW_FINITE``: max_k S_k^2/n - ln(n/m), n = m + k: the finite-horizon a^2 for the boundary of
  Chu, C.-S. J., Stinchcombe, M. and White, H. (1996), Monitoring structural change, Econometrica 64(5),
  1045-1065 (their infinite-horizon constant, :mod:`drift.engine.tables.csw`, is conservative here).
- ``MOSUM[h]``: max_k |S_k - S_(k-L)| / sqrt(L), L = round(h m), moving sums in the spirit of
  Leisch, F., Hornik, K. and Kuan, C.-M. (2000), Monitoring structural changes with the generalized
  fluctuation test, Econometric Theory 16(6), 835-854, and Zeileis, A., Leisch, F., Kleiber, C. and
  Hornik, K. (2005), Monitoring structural change in dynamic econometric models, J. Applied Econometrics
  20(1), 99-121, with a constant boundary.
- ``PAGE[gamma]``: max_k max_(j<=k) |S_k - S_j| / (sqrt(m) w(t)), w(t) = sqrt(1+t) (t/(1+t))^gamma: a
  Page-type CUSUM after Fremdt, S. (2015), Page's sequential procedure for change-point detection in time
  series regression, J. Time Series Analysis 36(6) (weight adapted to a Brownian-motion limit).
- ``TRIGG[alpha][level]``: stationary (1 - level) quantiles of |T|, T = smoothed error / smoothed MAD,
  Trigg, D. W. (1964), Monitoring a forecasting system, Operational Research Quarterly 15(3), 271-274;
  {trigg_series} series x {trigg_len} steps after a burn-in of {trigg_burn}, iid N(0, 1) errors.

- ``CSW_FINITE_DOF[nu]``, ``MOSUM_DOF[h][nu]``, ``PAGE_DOF[gamma][nu]``: the same maxima with the path
  divided by an independent estimated scale s = sqrt(chi^2_nu / nu) (stratified draws, seed
  {SCALE_SEED}, one per replication): the sequential analogue of Student's t. For iid normal errors and
  sigma-hat^2 = RSS / (m - k) on the reference sample, nu = m - k is exact: the reference RSS is a sum of
  m - k squared recursive residuals, independent of the monitored ones (Brown, R. L., Durbin, J. and
  Evans, J. M. (1975), Techniques for testing the constancy of regression relationships over time,
  JRSS B 37(2), 149-192). With prewhitened errors nu is an effective dof (see drift.engine.monitor).

Arrays are indexed [horizon][tail probability] over ``HORIZONS`` x ``TAIL_PROBS``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

SEED = {SEED}
REPLICATIONS = {args.reps}
DISCRETISATION = {args.m}
SCALE_SEED = {SCALE_SEED}
HORIZONS = {HORIZONS!r}
TAIL_PROBS = {TAIL_PROBS!r}
DOF = {DOF!r}

CSW_FINITE = {_fmt_rows(mon["csw"])}

MOSUM = {{
''']
    for h in MOSUM_H:
        parts.append(f"    {h!r}: {_fmt_rows(mon[f'mosum{h}'])},\n")
    parts.append("}\n\nPAGE = {\n")
    for g in PAGE_GAMMA:
        parts.append(f"    {g!r}: {_fmt_rows(mon[f'page{g}'])},\n")
    parts.append("}\n\nCSW_FINITE_DOF = {\n")
    for nu in DOF:
        parts.append(f"    {nu!r}: {_fmt_rows(mon[f'csw|{nu}'])},\n")
    for name, keys, label in (("MOSUM_DOF", MOSUM_H, "mosum"), ("PAGE_DOF", PAGE_GAMMA, "page")):
        parts.append(f"}}\n\n{name} = {{\n")
        for key in keys:
            parts.append(f"    {key!r}: {{\n")
            for nu in DOF:
                parts.append(f"        {nu!r}: {_fmt_rows(mon[f'{label}{key}|{nu}'])},\n".replace("\n    ", "\n        "))
            parts.append("    },\n")
    parts.append("}\n\nTRIGG = {\n")
    for a, row in trigg.items():
        parts.append(f"    {a!r}: {{" + ", ".join(f"{lvl!r}: {v:.4f}" for lvl, v in row.items()) + "},\n")
    parts.append("}\n")
    parts.append(LOOKUP_CODE)
    text = "".join(parts).replace("    [\n", "    [\n")
    pathlib.Path(args.out).write_text(text)
    print(f"wrote {args.out} in {elapsed:.1f} s")


if __name__ == "__main__":
    main()
