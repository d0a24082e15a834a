"""Simulate the critical values of drift's sequential monitoring detectors and the Trigg signal quantiles.

Writes ``drift/engine/tables/monitoring_data.py`` (committed; data only, the lookups are hand-written in
``drift/engine/tables/monitoring.py``). Run from the repository root::

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




def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=40000)
    ap.add_argument("--m", type=int, default=250, help="discretisation: steps per unit of monitoring time")
    ap.add_argument("--out", default="drift/engine/tables/monitoring_data.py")
    args = ap.parse_args()
    rng = np.random.default_rng(SEED)
    t0 = time.time()
    mon = simulate_monitoring(args.reps, args.m, rng, scale_rng=np.random.default_rng(SCALE_SEED))
    trigg_series, trigg_len, trigg_burn = 200, 20000, 500
    trigg = simulate_trigg(trigg_series, trigg_len, trigg_burn, rng)
    elapsed = time.time() - t0

    parts = [f'''"""Simulated critical values for sequential monitoring and Trigg tracking-signal limits.

GENERATED by ``tools/simulate_monitoring.py`` -- do not edit by hand; re-run the script instead. Data only:
the lookups are hand-written in :mod:`drift.engine.tables.monitoring`.

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
    text = "".join(parts).replace("    [\n", "    [\n")
    pathlib.Path(args.out).write_text(text)
    print(f"wrote {args.out} in {elapsed:.1f} s")


if __name__ == "__main__":
    main()
