"""Simulate the constants of drift's monitor family: the abrupt-shift and variance monitors, and the level
each member of a stream's family runs at so that the family as a whole holds its false-alarm probability.

Writes ``drift/engine/tables/family.py`` (committed). Run from the repository root::

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


LOOKUP_CODE = '''

def _dof_stack(known: Any, by_dof: dict, dof: Any, shape: tuple[int, ...]) -> np.ndarray:
    """Quantile rows (N, tail) interpolated linearly in 1/dof (known scale at 1/dof = 0)."""
    known = np.asarray(known, dtype=float)
    if dof is None:
        return np.broadcast_to(known, (*shape, *known.shape))
    nu = np.broadcast_to(np.asarray(dof, dtype=float), shape)
    if np.any(np.isnan(nu)) or np.any(nu < DOF[0] - 1e-12):
        raise ValueError(f"dof must be >= {DOF[0]} (the smallest tabulated) or inf, got {dof!r}")
    inv_grid = np.concatenate([[0.0], 1.0 / np.asarray(DOF[::-1], dtype=float)])
    stack = np.stack([known] + [np.asarray(by_dof[d], dtype=float) for d in DOF[::-1]])
    with np.errstate(divide="ignore"):
        inv = np.where(np.isinf(nu), 0.0, 1.0 / nu)
    i = np.clip(np.searchsorted(inv_grid, inv, side="right") - 1, 0, len(inv_grid) - 2)
    w = ((inv - inv_grid[i]) / (inv_grid[i + 1] - inv_grid[i]))[..., None, None]
    return (1.0 - w) * stack[i] + w * stack[i + 1]


def _interp_steps(rows: np.ndarray, steps: np.ndarray) -> np.ndarray:
    """Rows (..., N, tail) at ``steps`` (same leading shape), linear in log N. Below the first N the first
    row (conservative: quantiles grow with N); beyond the last a ValueError."""
    if np.any(steps > N_GRID[-1] + 1e-9):
        raise ValueError(f"horizon of {float(np.max(steps)):.0f} steps is beyond the simulated table "
                         f"(max {N_GRID[-1]}); extend tools/simulate_family.py")
    x = np.log(np.clip(steps, N_GRID[0], N_GRID[-1]))
    g = np.log(np.asarray(N_GRID, dtype=float))
    i = np.clip(np.searchsorted(g, x, side="right") - 1, 0, len(g) - 2)
    w = ((x - g[i]) / (g[i + 1] - g[i]))[..., None]
    lo = np.take_along_axis(rows, i[..., None, None], axis=-2)[..., 0, :]
    hi = np.take_along_axis(rows, (i + 1)[..., None, None], axis=-2)[..., 0, :]
    return (1.0 - w) * lo + w * hi


def quantiles(detector: str, steps: Any, dof: Any = None) -> np.ndarray:
    """Quantiles (shape ``steps.shape + (len(TAIL_PROBS),)``) of the maximum of ``detector`` ("shift" or
    "variance") over ``steps`` monitored steps, for a known scale (``dof`` None) or one estimated with
    ``dof`` degrees of freedom (interpolated linearly in 1/dof)."""
    if detector == "shift":
        known, by_dof = SHIFT, SHIFT_DOF
    elif detector == "variance":
        known, by_dof = VARIANCE, VARIANCE_DOF
    else:
        raise ValueError(f"detector must be 'shift' or 'variance', got {detector!r}")
    steps = np.atleast_1d(np.asarray(steps, dtype=float))
    if np.any(~np.isfinite(steps)) or np.any(steps <= 0):
        raise ValueError("steps must be positive and finite")
    return _interp_steps(_dof_stack(known, by_dof, dof, steps.shape), steps)


def critical_value(detector: str, steps: Any, level: float, dof: Any = None) -> np.ndarray:
    """Critical value at false-alarm probability ``level`` over ``steps`` monitored steps; between the
    tabulated tail probabilities interpolated linearly in log(level)."""
    probs = np.asarray(TAIL_PROBS)
    if not (probs.min() - 1e-12 <= level <= probs.max() + 1e-12):
        raise ValueError(f"level must be in [{probs.min()}, {probs.max()}], got {level!r}")
    q = quantiles(detector, steps, dof)
    i = int(np.clip(np.searchsorted(-probs, -level), 1, len(probs) - 1))
    p_hi, p_lo = probs[i - 1], probs[i]
    w = (np.log(p_hi) - np.log(level)) / (np.log(p_hi) - np.log(p_lo))
    return (1.0 - w) * q[..., i - 1] + w * q[..., i]


def pvalue(detector: str, steps: Any, statistic: Any, dof: Any = None) -> np.ndarray:
    """p-value by interpolating log tail probability against the quantiles, clipped to
    [min(TAIL_PROBS), 0.5]; NaN statistics give NaN."""
    stat = np.atleast_1d(np.asarray(statistic, dtype=float))
    q = quantiles(detector, np.broadcast_to(steps, stat.shape), dof)
    logp = np.log(np.asarray(TAIL_PROBS))
    finite = np.isfinite(stat)
    s = np.where(finite, stat, 0.0)
    j = np.clip((q <= s[..., None]).sum(axis=-1), 1, len(TAIL_PROBS) - 1)
    q0 = np.take_along_axis(q, (j - 1)[..., None], axis=-1)[..., 0]
    q1 = np.take_along_axis(q, j[..., None], axis=-1)[..., 0]
    w = np.clip((s - q0) / (q1 - q0), 0.0, 1.0)
    return np.where(finite, np.exp((1.0 - w) * logp[j - 1] + w * logp[j]), np.nan)


def member_level(kind: str, steps: Any, ratio: Any, level: float) -> np.ndarray:
    """Marginal level of each member of a ``kind`` family (see the module docstring) so that the family
    signals with probability ``level`` over ``steps`` monitored steps, ``ratio`` = steps / reference size.

    Interpolated linearly in log N, log H and log level; outside the simulated N and H the nearest
    edge is used (the ratio p / level moves little there), and below the smallest level the smallest
    level's ratio. Never below ``level / members`` (Bonferroni, which holds whatever the dependence).
    """
    if kind not in FAMILY:
        raise ValueError(f"kind must be one of {sorted(FAMILY)}, got {kind!r}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    steps = np.atleast_1d(np.asarray(steps, dtype=float))
    ratio = np.broadcast_to(np.asarray(ratio, dtype=float), steps.shape)
    table = np.asarray(FAMILY[kind], dtype=float)
    lv = np.log(np.asarray(FAMILY_LEVELS))
    x = np.clip(np.log(level), lv[0], lv[-1])
    j = int(np.clip(np.searchsorted(lv, x, side="right") - 1, 0, len(lv) - 2))
    wl = (x - lv[j]) / (lv[j + 1] - lv[j])
    by_level = (1.0 - wl) * table[..., j] + wl * table[..., j + 1]  # (N, H)

    def axis_w(grid: tuple[float, ...], v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        g = np.log(np.asarray(grid, dtype=float))
        xv = np.clip(np.log(np.maximum(v, 1e-12)), g[0], g[-1])
        i = np.clip(np.searchsorted(g, xv, side="right") - 1, 0, len(g) - 2)
        return i, (xv - g[i]) / (g[i + 1] - g[i])

    i, wn = axis_w(FAMILY_N, steps)
    k, wh = axis_w(FAMILY_H, ratio)
    r = ((1 - wn) * (1 - wh) * by_level[i, k] + wn * (1 - wh) * by_level[i + 1, k]
         + (1 - wn) * wh * by_level[i, k + 1] + wn * wh * by_level[i + 1, k + 1])
    return np.maximum(r, 1.0 / len(KINDS[kind])) * level
'''


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=30000, help="replications of the marginal tables")
    ap.add_argument("--family-reps", type=int, default=40000, help="replications of the family tables")
    ap.add_argument("--out", default="drift/engine/tables/family.py")
    args = ap.parse_args()
    t0 = time.time()
    marg = simulate_marginal(args.reps, np.random.default_rng(SEED), np.random.default_rng(SEED + 1))
    fam = simulate_family(args.family_reps, np.random.default_rng(SEED + 2))
    elapsed = time.time() - t0
    parts = [f'''"""Simulated constants of the monitor family: abrupt-shift and variance monitors, per-member levels.

GENERATED by ``tools/simulate_family.py`` -- do not edit by hand; re-run the script instead.

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

from typing import Any

import numpy as np

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
    parts.append(LOOKUP_CODE)
    pathlib.Path(args.out).write_text("".join(parts))
    print(f"wrote {args.out} in {elapsed:.1f} s")


if __name__ == "__main__":
    main()
