"""Simulate the constants of drift's monitor family: the abrupt-shift and variance monitors, and the level
each member of a stream's family runs at so that the family as a whole holds its false-alarm probability.

Writes ``drift/engine/tables/family_data.py`` (committed; data only, the lookups are hand-written in
``drift/engine/tables/family.py``). Run from the repository root::

    python tools/simulate_family.py                       # full run (a few minutes on 2 cores)
    python tools/simulate_family.py --reps 2000 --family-reps 2000 --out /tmp/f.py   # quick smoke run

What is simulated
-----------------
Under the null the monitored recursive residuals standardised by the reference scale are iid N(0, 1)
(Brown, Durbin & Evans 1975); with the scale estimated on the reference sample they are divided by an
independent ``s = sqrt(chi^2_nu / nu)``. Horizons here are counted in monitored *steps* ``N`` (the two new
detectors react within a few steps, whatever the reference size).

- ``shift``: two-sided Page CUSUM with reference value ``kappa`` (Page 1954):
  ``C+_k = max(0, C+_(k-1) + z_k - kappa)``, ``C-_k = max(0, C-_(k-1) - z_k - kappa)``, statistic
  ``max(C+_k, C-_k)``; ``SHIFT`` / ``SHIFT_DOF[nu]`` hold the quantiles of its maximum over N steps.
- ``variance``: the same two-sided recursion on ``q_k = (z_k^2 - 1) / sqrt(2)`` (an increase or a decrease
  of the error variance) with reference value ``kappa_v``; ``VARIANCE`` / ``VARIANCE_DOF[nu]``. The squares
  are far from normal, and an estimated scale shifts every q, so the dof tables matter most here.
- ``FAMILY[kind]``: the members of one stream are monitored on the same residuals and are strongly
  dependent. A family signals when any member crosses; every member runs at the same marginal level
  ``p``. For each horizon ``N`` and ratio ``H = N / m`` the members' maxima are simulated *jointly* on the
  same draws (csw ``max S_k^2/n - ln(n/m)``, page ``max_(j<=k)|S_k - S_j| / sqrt(m (1 + k/m))``, mosum
  ``|S_k - S_(k-L)|/sqrt(L)`` with L = round(m/4), shift, variance), each turned into its marginal p-value
  by its rank, and ``p`` is the ``alpha`` quantile of the smallest member p-value: the family's
  false-alarm probability over the N steps is then ``alpha``. The table holds ``p / alpha`` (1 would mean
  no loss, ``1 / members`` is Bonferroni). Known scale (a common estimated scale only makes the members
  more dependent, so this is slightly conservative).

Kinds: ``residual`` = csw + shift + variance on the recursive residuals; ``effect-page`` /
``effect-csw`` / ``effect-mosum`` = that detector + shift on one driver's score-weighted residuals.
"""

from __future__ import annotations

import argparse
import pathlib
import time

import numpy as np

SEED = 20261203
N_GRID = (8, 13, 26, 52, 104, 156, 260, 520, 1040)
FAMILY_N = (13, 26, 52, 104, 156, 260, 520)
FAMILY_H = (0.25, 0.5, 1.0, 2.0, 4.0)
TAIL_PROBS = (0.5, 0.3, 0.2, 0.15, 0.1, 0.075, 0.05, 0.025, 0.01, 0.005, 0.0025, 0.001)
DOF = (2, 3, 4, 6, 8, 12, 16, 32, 64, 128, 256, 512)
FAMILY_LEVELS = (0.001, 0.0025, 0.005, 0.01, 0.02, 0.035, 0.05, 0.1, 0.2)
SHIFT_KAPPA = 0.5
VARIANCE_KAPPA = 0.25
KINDS = {"residual": ("csw", "shift", "variance"), "effect-page": ("page", "shift"),
         "effect-csw": ("csw", "shift"), "effect-mosum": ("mosum", "shift")}


def page_k(x: np.ndarray, kappa: float) -> np.ndarray:
    """Two-sided Page CUSUM with reference value kappa of the increments x (rows), vectorised over time:
    the recursion max(0, C + x - kappa) equals A_k - min(0, min_(j<=k) A_j) with A the partial sums of
    x - kappa."""
    k = np.arange(1, x.shape[1] + 1)
    s = np.cumsum(x, axis=1)
    a = s - kappa * k
    b = -s - kappa * k
    up = a - np.minimum(np.minimum.accumulate(a, axis=1), 0.0)
    dn = b - np.minimum(np.minimum.accumulate(b, axis=1), 0.0)
    return np.maximum(up, dn)


def _scale_draws(reps: int, rng: np.random.Generator) -> np.ndarray:
    from scipy import stats

    u = (np.arange(reps) + 0.5) / reps
    return np.stack([np.sqrt(stats.chi2.ppf(u, nu) / nu)[rng.permutation(reps)] for nu in DOF])


def simulate_marginal(reps: int, rng: np.random.Generator, scale_rng: np.random.Generator,
                      chunk: int = 2000) -> dict[str, np.ndarray]:
    nmax = max(N_GRID)
    cps = [n - 1 for n in N_GRID]
    scales = _scale_draws(reps, scale_rng)
    out = {f"{d}|{nu}": np.empty((reps, len(N_GRID))) for d in ("shift", "variance") for nu in ("inf", *DOF)}
    for lo in range(0, reps, chunk):
        hi = min(reps, lo + chunk)
        z = rng.standard_normal((hi - lo, nmax))
        for j, nu in enumerate(("inf", *DOF)):
            zz = z if nu == "inf" else z / scales[j - 1, lo:hi, None]
            out[f"shift|{nu}"][lo:hi] = np.maximum.accumulate(page_k(zz, SHIFT_KAPPA), axis=1)[:, cps]
            q = (zz * zz - 1.0) / np.sqrt(2.0)
            out[f"variance|{nu}"][lo:hi] = np.maximum.accumulate(page_k(q, VARIANCE_KAPPA), axis=1)[:, cps]
    qs = 1.0 - np.asarray(TAIL_PROBS)
    return {k: np.quantile(v, qs, axis=0).T for k, v in out.items()}  # (N, tail)


def _pvalues(stat: np.ndarray) -> np.ndarray:
    """Marginal p-value of each replication's statistic by its rank among the replications."""
    order = np.argsort(-stat, kind="stable")
    p = np.empty_like(stat)
    p[order] = (np.arange(stat.size) + 1.0) / stat.size
    return p


def simulate_family(reps: int, rng: np.random.Generator, chunk: int = 4000) -> dict[str, np.ndarray]:
    """FAMILY[kind] arrays (len(FAMILY_N), len(FAMILY_H), len(FAMILY_LEVELS)) of p / alpha."""
    out = {kind: np.empty((len(FAMILY_N), len(FAMILY_H), len(FAMILY_LEVELS))) for kind in KINDS}
    for a, N in enumerate(FAMILY_N):
        k = np.arange(1, N + 1)
        stats: dict[str, np.ndarray] = {}
        per_h = {h: {d: np.empty(reps) for d in ("csw", "page", "mosum")} for h in FAMILY_H}
        stats["shift"] = np.empty(reps)
        stats["variance"] = np.empty(reps)
        for lo in range(0, reps, chunk):
            hi = min(reps, lo + chunk)
            z = rng.standard_normal((hi - lo, N))
            stats["shift"][lo:hi] = page_k(z, SHIFT_KAPPA).max(axis=1)
            stats["variance"][lo:hi] = page_k((z * z - 1.0) / np.sqrt(2.0), VARIANCE_KAPPA).max(axis=1)
            s = np.cumsum(z, axis=1)
            s0 = np.concatenate([np.zeros((hi - lo, 1)), s], axis=1)
            rng_ = np.maximum(s - np.minimum.accumulate(s0, axis=1)[:, 1:],
                              np.maximum.accumulate(s0, axis=1)[:, 1:] - s)
            for h in FAMILY_H:
                m = N / h
                n = m + k
                per_h[h]["csw"][lo:hi] = (s * s / n - np.log(n / m)).max(axis=1)
                per_h[h]["page"][lo:hi] = (rng_ / np.sqrt(m * (1.0 + k / m))).max(axis=1)
                L = max(1, round(0.25 * m))
                lagged = s0[:, np.maximum(k - L, 0)]
                per_h[h]["mosum"][lo:hi] = (np.abs(s - lagged) / np.sqrt(L)).max(axis=1)
        p_shared = {d: _pvalues(stats[d]) for d in ("shift", "variance")}
        for b, h in enumerate(FAMILY_H):
            pv = {**p_shared, **{d: _pvalues(v) for d, v in per_h[h].items()}}
            for kind, members in KINDS.items():
                pmin = np.min(np.stack([pv[d] for d in members]), axis=0)
                out[kind][a, b] = np.quantile(pmin, FAMILY_LEVELS) / np.asarray(FAMILY_LEVELS)
    return out


def _fmt(arr: np.ndarray, indent: str = "    ") -> str:
    if arr.ndim == 1:
        return "[" + ", ".join(f"{x:.4f}" for x in arr) + "]"
    inner = indent + "    "
    return "[\n" + "".join(inner + _fmt(row, inner) + ",\n" for row in arr) + indent + "]"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=30000, help="replications of the marginal tables")
    ap.add_argument("--family-reps", type=int, default=40000, help="replications of the family tables")
    ap.add_argument("--out", default="drift/engine/tables/family_data.py")
    args = ap.parse_args()
    t0 = time.time()
    marg = simulate_marginal(args.reps, np.random.default_rng(SEED), np.random.default_rng(SEED + 1))
    fam = simulate_family(args.family_reps, np.random.default_rng(SEED + 2))
    elapsed = time.time() - t0
    parts = [f'''"""Simulated constants of the monitor family: abrupt-shift and variance monitors, per-member levels.

GENERATED by ``tools/simulate_family.py`` -- do not edit by hand; re-run the script instead. Data only: the
lookups are :mod:`drift.engine.tables.family`.

Simulation record: seeds {SEED} (marginal maxima, {args.reps} replications; estimated scales stratified,
seed {SEED + 1}) and {SEED + 2} (family, {args.family_reps} replications), iid N(0, 1) increments, horizons
counted in monitored steps; {elapsed:.0f} s.

- ``SHIFT`` [N][tail]: quantiles of the maximum over N steps of the two-sided Page CUSUM with reference
  value ``SHIFT_KAPPA`` (Page, E. S. (1954), Continuous inspection schemes, Biometrika 41(1/2), 100-115)
  of the standardised recursive residuals; ``SHIFT_DOF[nu]`` with the residuals divided by an independent
  ``sqrt(chi^2_nu / nu)`` (the scale estimated on the reference sample; Brown, Durbin & Evans 1975).
- ``VARIANCE`` / ``VARIANCE_DOF[nu]``: the same for ``q = (z^2 - 1) / sqrt(2)`` with reference value
  ``VARIANCE_KAPPA`` (a sequential CUSUM of squares against the reference scale).
- ``FAMILY[kind]`` [N][H][level]: ``p / level``, the marginal level p at which every member of a stream's
  family runs so that the family (members simulated jointly on the same draws) signals with probability
  ``level`` within N steps; H = N / m. Members per kind in ``KINDS``.
"""

from __future__ import annotations

SEED = {SEED}
REPLICATIONS = {args.reps}
FAMILY_REPLICATIONS = {args.family_reps}
N_GRID = {N_GRID!r}
TAIL_PROBS = {TAIL_PROBS!r}
DOF = {DOF!r}
SHIFT_KAPPA = {SHIFT_KAPPA!r}
VARIANCE_KAPPA = {VARIANCE_KAPPA!r}
FAMILY_N = {FAMILY_N!r}
FAMILY_H = {FAMILY_H!r}
FAMILY_LEVELS = {FAMILY_LEVELS!r}
KINDS = {KINDS!r}

SHIFT = {_fmt(marg["shift|inf"])}

VARIANCE = {_fmt(marg["variance|inf"])}

''']
    for name, det in (("SHIFT_DOF", "shift"), ("VARIANCE_DOF", "variance")):
        parts.append(f"{name} = {{\n")
        for nu in DOF:
            parts.append(f"    {nu!r}: {_fmt(marg[f'{det}|{nu}'], '    ')},\n")
        parts.append("}\n\n")
    parts.append("FAMILY = {\n")
    for kind, arr in fam.items():
        parts.append(f"    {kind!r}: {_fmt(arr, '    ')},\n")
    parts.append("}\n")
    pathlib.Path(args.out).write_text("".join(parts))
    print(f"wrote {args.out} in {elapsed:.1f} s")


if __name__ == "__main__":
    main()
