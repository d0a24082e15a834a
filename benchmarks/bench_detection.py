"""Detection benchmark: false alarms, detection rates and delays of ``drift check`` on invented scenarios.

Every scenario is a set of invented models of the usual shape: a target driven by a lagged promotion
depth (``promo``, % of the range on promotion, mean 10, AR(1) with phi 0.5, sd 2) and a lagged temperature
(``temp``, 12 + 8 sin(season) + N(0, 3^2): its own weather beyond the season), a linear trend and a seasonal cycle, errors N(0, 3^2):

    y_t = 100 + 0.02 t + 3 cos(2 pi t / P) + 2.0 promo_{t-1} + 0.8 temp_{t-1} + e_t

Weekly: 3 years of reference (156 weeks) then 2 years monitored (104 weeks), changes at week 200 (the first
row of the new regime, 0-based). Monthly: 5 years of reference (60 months) then 2 years monitored
(24 months), changes at month 70 (the same share of the monitored span). Scenarios:

=========  =====================================================================================
iid        no change, iid errors
ar1        no change, AR(1) errors (phi 0.6, innovations N(0, 3^2)), the models say ``errors: ar(1)``
promo-4s   promo effect 2.0 -> 0.8 (the target's mean moves by 1.2 x 10 = 12 = 4 sigma)
promo-1s   promo effect 2.0 -> 1.6 (0.4 x 10 = 4 = 1.3 sigma)
vanish     temperature effect 0.8 -> 0 (the driver stops mattering)
lag        promo acts with lag 3 instead of 1 (the models keep lag 1)
variance   the error variance doubles (9 -> 18)
=========  =====================================================================================

Every model is run through drift as the CLI runs it: the scenario is written as one wide CSV, a YAML
config names the source and the models (default ``preprocess``: linear trend, Fourier season), a fresh
SQLite store is opened, :func:`drift.pipeline.run_ingest` reads the file (``drift ingest``) and
:func:`drift.pipeline.run_check` checks every model as of the day after the last period (``drift check
--no-deliver``); the figures are read from ``outcome.as_json()``, the JSON ``drift check --json`` prints.

Printed per scenario: the share of models told to refit / relag / drop a driver (a hard action), and per
monitor (each ``alarms[].test``, per driver for the effect monitors; warnings are not alarms): the share of
models whose first alarm is at or after the change (detection; for the no-change scenarios, the false-alarm
rate), the median and 90th percentile of the delay from the change to the first alarm date (periods; an
alarm in the week of the change has delay 0), and the share of models whose alarm is dated *before* the
change. ``any`` is the earliest alarm of any test.

In the same run, the same figures for a plain reference monitor (:func:`page_reference`): a two-sided Page
CUSUM (reference value 0.5 sigma) of the recursive residuals of the monitored span, standardised by the
reference-period scale, its threshold simulated for a 5% false-alarm rate over the 2 monitored years. With
``errors: ar(1)`` it monitors the data prewhitened by the AR(1) coefficient of the reference residuals.
For a scenario that moves the target's mean one way (promo-4s, promo-1s, vanish) also that Page CUSUM
told the direction (one-sided, 5 %), and for every scenario that moves the mean (those and lag) the
oracle bound (:func:`oracle_bound`): the share of models that any monitor of the recursive residuals at
5 % can have signalled by each delay, computed from the power of the test told the change's date,
direction and size. A target above the bound is out of reach of every such monitor, drift's included.

A script, not a test: ``tests/test_bench_detection.py`` keeps a small seeded version of the size and power
claims by calling the same scenario code.

Usage::

    python benchmarks/bench_detection.py [--models 200] [--frequency weekly|monthly]
        [--scenarios iid ar1 ...] [--seed N] [--json FILE] [--show FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

SEED = 20261203
SIGMA = 3.0
HARD = ("refit", "relag", "drop-driver")
#: temperature's effect and the sd of its weather beyond the season: with a weaker own part (0.5 x N(0, 2^2))
#: the driver barely improves the forecasts and drift's worth rule told 25 % of no-change models to drop it
TEMP_EFFECT = 0.8
TEMP_SD = 3.0


@dataclass(frozen=True)
class Frequency:
    code: str  # drift's frequency key
    start: str
    n_ref: int
    n_mon: int
    change: int  # index of the first row of the new regime
    season: float  # season length in periods
    step: str  # pandas offset between periods


FREQUENCIES = {
    "weekly": Frequency("W", "2021-01-04", 156, 104, 200, 365.25 / 7, "7D"),
    "monthly": Frequency("M", "2019-01-01", 60, 24, 70, 12.0, "MS"),
}


@dataclass(frozen=True)
class Scenario:
    name: str
    what: str
    promo_after: float = 2.0
    temp_after: float = TEMP_EFFECT
    lag_after: int = 1
    sigma_after: float = SIGMA
    ar: float = 0.0  # AR(1) coefficient of the errors (and the models then say errors: ar(1))

    @property
    def changes(self) -> bool:
        return (self.promo_after, self.temp_after, self.lag_after, self.sigma_after) != (2.0, TEMP_EFFECT, 1, SIGMA)


SCENARIOS = {s.name: s for s in (
    Scenario("iid", "no change, iid errors"),
    Scenario("ar1", "no change, AR(1) errors phi 0.6, errors: ar(1)", ar=0.6),
    Scenario("promo-4s", "promo effect 2.0 -> 0.8 (4 sigma)", promo_after=0.8),
    Scenario("promo-1s", "promo effect 2.0 -> 1.6 (1.3 sigma)", promo_after=1.6),
    Scenario("vanish", "temperature effect 0.8 -> 0", temp_after=0.0),
    Scenario("lag", "promo lag 1 -> 3", lag_after=3),
    Scenario("variance", "error variance doubles", sigma_after=SIGMA * np.sqrt(2.0)),
)}


# ------------------------------------------------------------------------------------------------ data
def simulate(sc: Scenario, n_models: int, freq: Frequency, seed: int = SEED) -> dict[str, np.ndarray]:
    """Invented data of one scenario (seeded by seed, frequency and n_models): arrays (models, periods) ``y``, ``promo``, ``temp`` and the design
    the models use (``X``: constant, trend, 3 Fourier pairs, promo and temperature at lag 1), rows from 1
    (the first row has no lagged drivers in the CSV)."""
    # common random numbers: every scenario draws the same drivers and errors, so scenarios differ only
    # by their change (the no-change pair differs by the AR filter)
    rng = np.random.default_rng([seed, "WM".index(freq.code), n_models])
    pre = 4  # pre-sample periods so that every lag exists
    T = freq.n_ref + freq.n_mon
    tt = np.arange(-pre, T, dtype=float)
    u = np.zeros((n_models, T + pre))
    eps = rng.normal(scale=2.0 * np.sqrt(1 - 0.25), size=u.shape)
    u[:, 0] = rng.normal(scale=2.0, size=n_models)
    for s in range(1, T + pre):  # AR(1) promo depth, vectorised over models
        u[:, s] = 0.5 * u[:, s - 1] + eps[:, s]
    promo = 10.0 + u
    temp = 12.0 + 8.0 * np.sin(2 * np.pi * tt / freq.season) + rng.normal(scale=TEMP_SD, size=u.shape)
    t = np.arange(T)
    after = t >= freq.change
    b_p = np.where(after, sc.promo_after, 2.0)
    b_t = np.where(after, sc.temp_after, TEMP_EFFECT)
    sig = np.where(after, sc.sigma_after, SIGMA)
    lag = np.where(after, sc.lag_after, 1)
    promo_l = promo[:, pre + t - lag]
    temp_l = temp[:, pre + t - 1]
    e = rng.normal(size=(n_models, T + 50)) * SIGMA
    if sc.ar:
        for s in range(1, e.shape[1]):
            e[:, s] += sc.ar * e[:, s - 1]
    e = e[:, 50:] * (sig / SIGMA)
    y = 100.0 + 0.02 * t + 3.0 * np.cos(2 * np.pi * t / freq.season) + b_p * promo_l + b_t * temp_l + e
    cols = [np.ones(T), t.astype(float)]
    for h in (1, 2, 3):
        cols += [np.sin(2 * np.pi * h * t / freq.season), np.cos(2 * np.pi * h * t / freq.season)]
    X = np.concatenate([np.broadcast_to(np.stack(cols, axis=-1), (n_models, T, len(cols))),
                        promo[:, pre + t - 1, None], temp_l[:, :, None]], axis=-1)
    return {"y": y, "promo": promo[:, pre:], "temp": temp[:, pre:], "X": X[:, 1:], "Y": y[:, 1:]}


# ------------------------------------------------------------------------------------------------ reference
PAGE_K = 0.5  # reference value in sigma units: tuned to a one-sigma shift (common practice, no source)


def page_threshold(n_mon: int, dof: int, level: float = 0.05, reps: int = 20000, seed: int = SEED,
                   one_sided: bool = False) -> float:
    """Threshold h of the two-sided (or upper one-sided) Page CUSUM with reference value PAGE_K such that
    under no change P(max over n_mon steps of max(S+, S-) > h) = level; the scale estimate's
    chi-square(dof) error is simulated with it."""
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(reps, n_mon)) / np.sqrt(rng.chisquare(dof, size=(reps, 1)) / dof)
    return float(np.quantile(_page_first(z, np.inf, one_sided)[1], 1 - level))


def _page_first(z: np.ndarray, h: float, one_sided: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """(first index with max(S+, S-) > h or -1, running maximum of max(S+, S-)) per row of z; one-sided:
    S+ only."""
    sp = np.zeros(z.shape[0])
    sm = np.zeros(z.shape[0])
    first = np.full(z.shape[0], -1)
    top = np.zeros(z.shape[0])
    for s in range(z.shape[1]):
        sp = np.maximum(0.0, sp + np.nan_to_num(z[:, s]) - PAGE_K)
        if not one_sided:
            sm = np.maximum(0.0, sm - np.nan_to_num(z[:, s]) - PAGE_K)
        cur = np.maximum(sp, sm)
        first = np.where((first < 0) & (cur > h), s, first)
        top = np.maximum(top, cur)
    return first, top


def _ar1_reference(Y: np.ndarray, X: np.ndarray, b: np.ndarray) -> np.ndarray:
    """AR(1) coefficient of the reference errors per model: the phi at which the expected lag-1
    autocorrelation of the least-squares residuals, E[r'Sr] / E[r'r] = tr(MSM V) / tr(M V) (M the residual
    maker, S the symmetric lag-one matrix, V the AR(1) correlation matrix), equals the observed one. The
    plain residual autocorrelation is biased down by the trend and season columns (0.50 for 0.6 here)."""
    n = Y.shape[1]
    r = Y - np.einsum("mti,mi->mt", X, b)
    rho = np.sum(r[:, 1:] * r[:, :-1], axis=1) / np.sum(r * r, axis=1)
    M = np.eye(n) - X @ np.linalg.solve(np.einsum("mti,mtj->mij", X, X), np.swapaxes(X, 1, 2))
    SM = np.zeros_like(M)  # S @ M without the n x n product: S averages the rows above and below
    SM[:, 1:] += M[:, :-1] / 2
    SM[:, :-1] += M[:, 1:] / 2
    MSM = M @ SM
    grid = np.linspace(-0.95, 0.95, 96)
    V = grid[:, None, None] ** np.abs(np.subtract.outer(np.arange(n), np.arange(n)))[None]
    V = V.reshape(len(grid), -1).T
    g = (MSM.reshape(len(M), -1) @ V) / (M.reshape(len(M), -1) @ V)  # (models, grid), increasing in phi
    return np.array([np.interp(rho[i], g[i], grid) for i in range(len(rho))])


def _reference_z(Y: np.ndarray, X: np.ndarray, m: int, ar: bool = False) -> tuple[np.ndarray, int]:
    """Standardised recursive residuals of rows m.. (scale from the reference fit of rows < m), batched over
    models, and the scale's degrees of freedom. With ``ar``: data prewhitened by the reference residuals'
    AR(1) coefficient first (the residuals then start one row later)."""
    XtX = np.einsum("mti,mtj->mij", X[:, :m], X[:, :m])
    b = np.linalg.solve(XtX, np.einsum("mti,mt->mi", X[:, :m], Y[:, :m])[..., None])[..., 0]
    if ar:
        phi = _ar1_reference(Y[:, :m], X[:, :m], b)
        Y = Y[:, 1:] - phi[:, None] * Y[:, :-1]
        X = X[:, 1:] - phi[:, None, None] * X[:, :-1]
        m -= 1
        XtX = np.einsum("mti,mtj->mij", X[:, :m], X[:, :m])
        b = np.linalg.solve(XtX, np.einsum("mti,mt->mi", X[:, :m], Y[:, :m])[..., None])[..., 0]
    k = X.shape[2]
    r = Y[:, :m] - np.einsum("mti,mi->mt", X[:, :m], b)
    s = np.sqrt(np.sum(r * r, axis=1) / (m - k))
    P = np.linalg.inv(XtX)
    z = np.empty((Y.shape[0], Y.shape[1] - m))
    for j, t in enumerate(range(m, Y.shape[1])):  # recursive residuals by rank-one updates, all models at once
        x = X[:, t]
        Px = np.einsum("mij,mj->mi", P, x)
        f = 1.0 + np.einsum("mi,mi->m", x, Px)
        err = Y[:, t] - np.einsum("mi,mi->m", x, b)
        z[:, j] = err / np.sqrt(f) / s
        b = b + Px * (err / f)[:, None]
        P = P - np.einsum("mi,mj->mij", Px, Px) / f[:, None, None]
    return z, m - k


def page_reference(Y: np.ndarray, X: np.ndarray, m: int, ar: bool = False, level: float = 0.05,
                   direction: int = 0) -> np.ndarray:
    """First alarm row (index into Y's columns, -1 for none) of the plain reference monitor: a two-sided
    Page CUSUM of the standardised recursive residuals of rows m.., scale from the reference fit (rows
    < m), batched over models. With ``ar``: data prewhitened by the reference residuals' lag-1
    autocorrelation first. ``direction`` +1 / -1: the one-sided Page CUSUM told the direction of the
    change (upward / downward), its threshold simulated for ``level`` one-sided."""
    z, dof = _reference_z(Y, X, m, ar)
    if direction:
        h = page_threshold(z.shape[1], dof, level, one_sided=True)
        first = _page_first(direction * z, h, one_sided=True)[0]
    else:
        h = page_threshold(z.shape[1], dof, level)
        first = _page_first(z, h)[0]
    return np.where(first >= 0, first + m + (1 if ar else 0), -1)


def oracle_bound(Y_change: np.ndarray, Y_base: np.ndarray, X: np.ndarray, change: int,
                 level: float = 0.05, sigma: float = SIGMA) -> np.ndarray:
    """Upper bound, per delay d = 0, 1, ... after the change row, on the share of models that *any* monitor
    of the recursive residuals (drift's and the reference's) can have signalled by then at false-alarm
    probability ``level``: the power of the one-sided test of the change told its date, its direction and
    its size, with the error scale known.

    ``Y_change - Y_base`` is the scenario's change of the target's mean given the drivers (common random
    numbers: the same drivers and errors), ``s``. Told all that, the most powerful test among those
    unaffected by the level of the coefficients (y -> y + X g; recursive residuals are) of "no change"
    against "the mean moved by s" on the rows up to ``change + d`` is the one-sided test of s's
    coefficient in the regression on X (Neyman-Pearson on the residuals of X; Lehmann & Romano 2005,
    ch. 6, most powerful invariant tests); its power is ``Phi(|M s| / sigma - z_level)``, M the residual
    maker of X over those rows. A monitor must also hold its level at every earlier row, which only
    lowers its chance, so no monitor's P(alarm by d) exceeds this.
    Returns the (D,) mean over the models."""
    from scipy import stats

    s = Y_change - Y_base
    za = stats.norm.isf(level)
    out = []
    for end in range(change + 1, Y_change.shape[1] + 1):
        Xa, sa = X[:, :end], s[:, :end]
        b = np.linalg.solve(np.einsum("mti,mtj->mij", Xa, Xa), np.einsum("mti,mt->mi", Xa, sa)[..., None])[..., 0]
        r = sa - np.einsum("mti,mi->mt", Xa, b)
        lam = np.sqrt(np.sum(r * r, axis=1)) / sigma
        out.append(float(np.mean(stats.norm.cdf(lam - za))))
    return np.array(out)


# ------------------------------------------------------------------------------------------------ drift
def write_inputs(folder: Path, data: dict[str, dict[str, np.ndarray]], freq: Frequency) -> Path:
    """One wide CSV of every scenario's series and the YAML config naming them; returns the config path."""
    T = freq.n_ref + freq.n_mon
    periods = pd.date_range(freq.start, periods=T, freq=freq.step)
    cols: dict[str, Any] = {"period": [p.date().isoformat() for p in periods]}
    models = []
    ref_end = periods[freq.n_ref - 1].date().isoformat()
    for name, d in data.items():
        errors = "ar(1)" if SCENARIOS[name].ar else "ols"
        for i in range(d["y"].shape[0]):
            mid = f"{name}-{i:04d}"
            cols[f"{mid}.y"] = np.round(d["y"][i], 4)
            cols[f"{mid}.promo"] = np.round(d["promo"][i], 4)
            cols[f"{mid}.temp"] = np.round(d["temp"][i], 4)
            models.append(
                f"  - name: {mid}\n    target: {mid}.y\n    frequency: {freq.code}\n    errors: {errors}\n"
                f"    drivers:\n      - {{series: {mid}.promo, lag: 1}}\n      - {{series: {mid}.temp, lag: 1}}\n"
                f"    reference: {{start: {freq.start}, end: {ref_end}}}\n")
    (folder / "data").mkdir(exist_ok=True)
    pd.DataFrame(cols).to_csv(folder / "data" / "scenarios.csv", index=False)
    cfg = folder / "drift.yaml"
    cfg.write_text(
        "# invented scenarios of benchmarks/bench_detection.py\n"
        f"store: sqlite:///{folder / 'drift.db'}\n"
        "sources:\n  - name: scenarios\n    kind: csv\n    path: data/scenarios.csv\n    period_column: period\n"
        "models:\n" + "".join(models), encoding="utf-8")
    return cfg


def run_drift(data: dict[str, dict[str, np.ndarray]], freq: Frequency) -> tuple[list[dict[str, Any]], dict]:
    """Ingest and check every model as ``drift ingest`` and ``drift check --no-deliver --json`` would;
    returns the JSON's model entries and timings."""
    from drift.config import load_config
    from drift.pipeline import run_check, run_ingest
    from drift.store import open_store

    T = freq.n_ref + freq.n_mon
    last = pd.Timestamp(freq.start) + (T - 1) * pd.tseries.frequencies.to_offset(freq.step)
    as_of = (last + pd.tseries.frequencies.to_offset(freq.step)).date()  # the day the last period has ended
    timing = {}
    with tempfile.TemporaryDirectory() as folder:
        cfg = load_config(write_inputs(Path(folder), data, freq))
        store = open_store(cfg.store_url())
        try:
            t0 = time.perf_counter()
            run_ingest(cfg, store, progress=False)
            timing["ingest_s"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            outcome = run_check(cfg, store, as_of=as_of, deliver=False)
            timing["check_s"] = time.perf_counter() - t0
        finally:
            store.dispose()
    return json.loads(json.dumps(outcome.as_json(), default=str))["models"], timing


# ------------------------------------------------------------------------------------------------ figures
def _row(rows: list[list[int]], change: int | None) -> dict[str, Any]:
    """Figures of one monitor from each model's alarm rows (an empty list: no alarm). Without a change:
    the share with any alarm. With one: detected = an alarm at or after the change, delay = the first such
    alarm's row minus the change row, early = an alarm dated before the change."""
    n = len(rows)
    alarm = float(np.mean([bool(r) for r in rows])) if n else 0.0
    if change is None:
        return {"alarm": alarm, "detect": None, "median": None, "p90": None, "early": None, "n": n}
    delay = np.array([min(x for x in r if x >= change) - change for r in rows if any(x >= change for x in r)])
    return {"alarm": alarm, "detect": delay.size / max(n, 1), "delays": sorted(delay.tolist()),
            "early": float(np.mean([any(x < change for x in r) for r in rows])) if n else 0.0,
            "median": float(np.median(delay)) if delay.size else None,
            "p90": float(np.quantile(delay, 0.9)) if delay.size else None, "n": n}


def drift_figures(entries: list[dict[str, Any]], freq: Frequency, change: int | None
                  ) -> tuple[dict[str, Any], dict[str, dict[str, Any]]]:
    """(model-level shares, per-monitor figures) from ``drift check --json`` entries of one scenario.
    Monitors are keyed by ``alarms[].test`` (and the driver of an effect monitor); warnings are left out;
    ``any`` pools every test's alarms."""
    periods = pd.date_range(freq.start, periods=freq.n_ref + freq.n_mon, freq=freq.step)
    index = {p.date().isoformat(): i for i, p in enumerate(periods)}
    n = len(entries)
    verdicts: dict[str, int] = {}
    hard = refit = 0
    rows: dict[str, list[list[int]]] = {"any": [[] for _ in range(n)]}
    dated: list[int] = []  # the break's date (a refit's or relag's ``since``) minus the change, in periods
    for i, e in enumerate(entries):
        verdicts[e["verdict"]] = verdicts.get(e["verdict"], 0) + 1
        hard += any(a["action"] in HARD for a in e["actions"])
        refit += any(a["action"] == "refit" for a in e["actions"])
        since = next((a["since"] for a in e["actions"] if a["action"] in ("refit", "relag") and a.get("since")),
                     None)
        if since is not None and change is not None:
            dated.append(index[since] - change)
        for a in e["alarms"]:
            if a.get("warning") or not a.get("date"):
                continue
            key = a["test"] + (f" ({a['driver'].split('.')[-1]})" if a.get("driver") else "")
            rows.setdefault(key, [[] for _ in range(n)])[i].append(index[a["date"]])
            rows["any"][i].append(index[a["date"]])
    figures = {k: _row(rows[k], change) for k in ["any", *sorted(k for k in rows if k != "any")]}
    dating = None
    if dated:
        err = np.array(dated)
        dating = {"n": int(err.size), "median": float(np.median(err)), "p10": float(np.quantile(err, 0.1)),
                  "p90": float(np.quantile(err, 0.9)), "mean_abs": float(np.mean(np.abs(err)))}
    return {"hard": hard / max(n, 1), "refit": refit / max(n, 1), "verdicts": verdicts, "n": n,
            "dating": dating}, figures


#: issue 9's targets: (scenario, figure, bound, "max" or "min"), judged on the point estimate (its 95 %
#: interval over the models is printed beside it, so that a miss within sampling error reads as one); delays in weeks, for monthly models the same
#: calendar time rounded up to whole months (3 weeks -> 1 month, 12 weeks -> 3 months)
TARGETS = (
    ("iid", "hard", 0.05, "max"),
    ("ar1", "hard", 0.10, "max"),
    ("promo-4s", "refit", 0.95, "min"),
    ("promo-4s", "median", 3, "max"),
    ("promo-1s", "refit", 0.85, "min"),
    ("promo-1s", "median", 12, "max"),
)
#: alarms dated before the change: none beyond the nominal rate (5 %)
EARLY_MAX = 0.05


def _interval(share: float, n: int) -> tuple[str, float, float]:
    """The 95 % Clopper-Pearson interval of a share of n models (how far sampling alone moves it): its
    text, low and high."""
    from scipy import stats

    ci = stats.binomtest(round(share * n), n).proportion_ci(0.95)
    return f" (95 % interval {100 * ci.low:.1f}-{100 * ci.high:.1f} %)", float(ci.low), float(ci.high)


def targets(res: dict[str, Any]) -> list[tuple[str, str, bool]]:
    """(what, measured, met) for each target whose scenario was run."""
    out = []
    sc = res["scenarios"]
    unit = "weeks" if res["frequency"] == "weekly" else "months"
    for name, fig, bound, kind in TARGETS:
        if name not in sc:
            continue
        if fig == "median" and res["frequency"] == "monthly":
            bound = int(np.ceil(bound * 7 / 30.4375))
        v = sc[name]["monitors"]["any"]["median"] if fig == "median" else sc[name]["drift"][fig]
        shown = _num(v) + f" {unit}" if fig == "median" else _pct(v)
        want = (f"{'<=' if kind == 'max' else '>='} "
                + (f"{bound} {unit}" if fig == "median" else f"{100 * bound:.0f} %"))
        ok = v is not None and (v <= bound if kind == "max" else v >= bound)
        if fig != "median" and v is not None:
            text, lo, hi = _interval(v, sc[name]["drift"]["n"])
            shown += text
            if not ok and (lo <= bound if kind == "max" else hi >= bound):
                shown += ", a miss within sampling error"
        label = {"hard": "hard action", "refit": "refit", "median": "median delay (any alarm)"}[fig]
        orc = sc[name].get("oracle") if not ok else None
        if orc and fig == "median":
            within = orc["by_delay"][bound] if bound < len(orc["by_delay"]) else orc["detect"]
            shown += (f" (oracle bound: any monitor of these residuals at 5 % signals within {bound} {unit} in at "
                      f"most {_pct(within)} of the models, a median of at least {_num(orc['median'])} {unit})")
        elif orc and fig == "refit":
            shown += f" (oracle bound on detection by the end: {_pct(orc['detect'])})"
        out.append((f"{name}: {label} {want}", shown, ok))
    bad = {name: r["drift"]["errors"] for name, r in sc.items() if r["drift"]["errors"]}
    out.append(("every model checked (no error entries)",
                ", ".join(f"{k} {v}" for k, v in bad.items()) or "0 errors", not bad))
    for name, r in sc.items():
        if r["change"] is not None:
            v = r["monitors"]["any"]["early"]
            out.append((f"{name}: alarms dated before the change <= {100 * EARLY_MAX:.0f} %",
                        _pct(v) + _interval(v, r["drift"]["n"])[0], v <= EARLY_MAX))
    return out


# ------------------------------------------------------------------------------------------------ run
def run(scenarios: list[str], n_models: int, frequency: str, seed: int = SEED) -> dict[str, Any]:
    """Simulate, check with drift and with the reference monitor; the figures per scenario."""
    freq = FREQUENCIES[frequency]
    data = {s: simulate(SCENARIOS[s], n_models, freq, seed) for s in scenarios}
    entries, timing = run_drift(data, freq)
    by_scenario: dict[str, list[dict[str, Any]]] = {s: [] for s in scenarios}
    for e in entries:
        by_scenario[e["name"].rsplit("-", 1)[0]].append(e)
    out: dict[str, Any] = {"frequency": frequency, "models": n_models, "seed": seed, "timing": timing,
                           "scenarios": {}}
    for s in scenarios:
        sc = SCENARIOS[s]
        change = freq.change if sc.changes else None
        errors = [e for e in by_scenario[s] if e["verdict"] == "error"]
        summary, rows = drift_figures(by_scenario[s], freq, change)
        summary["errors"] = len(errors)
        t0 = time.perf_counter()
        ref_first = page_reference(data[s]["Y"], data[s]["X"], freq.n_ref - 1, ar=bool(sc.ar))
        ref_rows = [[int(f) + 1] if f >= 0 else [] for f in ref_first]  # rows of Y start at period 1
        timing[f"reference_{s}_s"] = time.perf_counter() - t0
        out["scenarios"][s] = {"what": sc.what, "change": change, "drift": summary, "monitors": rows,
                               "reference": _row(ref_rows, change)}
        if change is not None and sc.sigma_after == SIGMA and not sc.ar:
            out["scenarios"][s].update(bounds(data[s], simulate(SCENARIOS["iid"], n_models, freq, seed), freq))
    return out


def bounds(d: dict[str, np.ndarray], base: dict[str, np.ndarray], freq: Frequency) -> dict[str, Any]:
    """For a scenario that moves the target's mean: the oracle bound (:func:`oracle_bound`, at 5 %) and,
    where the mean moves one way, the reference Page CUSUM told that direction (one-sided, 5 %)."""
    change = freq.change - 1  # rows of Y start at period 1
    by_delay = oracle_bound(d["Y"], base["Y"], d["X"], change)

    def first(q: float) -> int | None:
        hit = np.flatnonzero(by_delay >= q)
        return int(hit[0]) if hit.size else None

    out: dict[str, Any] = {"oracle": {"by_delay": by_delay.tolist(), "detect": float(by_delay[-1]),
                                      "median": first(0.5), "p90": first(0.9)}}
    shift = float(np.mean((d["Y"] - base["Y"])[:, change:])) / SIGMA
    if abs(shift) >= 0.25:
        one = page_reference(d["Y"], d["X"], freq.n_ref - 1, direction=int(np.sign(shift)))
        out["reference_one_sided"] = _row([[int(f) + 1] if f >= 0 else [] for f in one], freq.change)
    return out


# ------------------------------------------------------------------------------------------------ what is reachable
def _page_path(z: np.ndarray, kappa: float, one_sided: bool = False) -> np.ndarray:
    """max(C+, C-) (or C+ alone) of the Page CUSUM with reference value kappa at every step, rows of z."""
    up, dn, out = np.zeros(len(z)), np.zeros(len(z)), np.empty_like(z)
    for s in range(z.shape[1]):
        up = np.maximum(0.0, up + z[:, s] - kappa)
        dn = dn if one_sided else np.maximum(0.0, dn - z[:, s] - kappa)
        out[:, s] = np.maximum(up, dn)
    return out


def _csw_path(z: np.ndarray, m: int) -> np.ndarray:
    """S_n^2 / n - ln(n / m): the recursive-CUSUM monitor's a^2 at which its boundary is touched."""
    n = m + np.arange(1, z.shape[1] + 1)
    return np.cumsum(z, axis=1) ** 2 / n - np.log(n / m)


#: residual monitors compared by :func:`reachable` (name, members, one-sided); the members are drift's
#: residual stream (csw, abrupt shift kappa 0.5, variance kappa 0.25) or single Page CUSUMs
COMPOSITIONS = (
    ("drift's residual members (csw + shift + variance, joint)", ("csw", "shift", "variance"), False),
    ("csw + shift (no variance member), joint", ("csw", "shift"), False),
    ("Page CUSUM kappa 0.5 alone", ("shift",), False),
    ("Page CUSUM kappa 0.25 alone", ("shift25",), False),
    ("Page CUSUM kappa 0.5 told the direction", ("shift",), True),
)


def reachable(scenario: str, n_models: int, frequency: str, seed: int = SEED, reps: int = 100_000,
              budgets: tuple[float, ...] = (1 - 0.95 ** 0.7, 0.05)) -> list[dict[str, Any]]:
    """Detection of monitors of the recursive residuals (:data:`COMPOSITIONS`) on a scenario's own draws,
    at each false-alarm budget over the monitored span (drift's residual stream gets 1 - 0.95^0.7 = 3.5 %
    of its 5 %). Thresholds from ``reps`` null paths (iid N(0, 1) over an estimated scale, the residuals'
    exact null); members of a composition run at one common marginal level whose family holds the budget
    (simulated jointly, as ``tools/simulate_family.py`` does). Standalone: no drift check is run."""
    freq = FREQUENCIES[frequency]
    m = freq.n_ref - 1
    d = simulate(SCENARIOS[scenario], n_models, freq, seed)
    z1, dof = _reference_z(d["Y"], d["X"], m)
    tau = freq.change - 1 - m
    shift = float(np.mean((d["Y"] - simulate(SCENARIOS["iid"], n_models, freq, seed)["Y"])[:, freq.change - 1:]))
    rng = np.random.default_rng([seed, 99])
    z0 = rng.normal(size=(reps, z1.shape[1])) / np.sqrt(rng.chisquare(dof, size=(reps, 1)) / dof)
    target = 12 if frequency == "weekly" else 3

    def paths(z: np.ndarray, member: str, one: bool) -> np.ndarray:
        zz = z * (np.sign(shift) or 1.0) if one else z
        return {"csw": lambda: _csw_path(zz, m), "shift": lambda: _page_path(zz, 0.5, one),
                "shift25": lambda: _page_path(zz, 0.25, one),
                "variance": lambda: _page_path((zz * zz - 1) / np.sqrt(2.0), 0.25)}[member]()

    out = []
    for name, members, one in COMPOSITIONS:
        null = {k: paths(z0, k, one).max(axis=1) for k in members}
        alt = {k: paths(z1, k, one) for k in members}
        # each null path's smallest marginal p-value over the members (ranks), for the joint level
        pmin = np.min([1.0 - (np.argsort(np.argsort(v)) + 0.5) / reps for v in null.values()], axis=0)
        for budget in budgets:
            p = float(np.quantile(pmin, budget))
            first = np.full(n_models, z1.shape[1])
            for k in members:
                hit = alt[k] > np.quantile(null[k], 1.0 - p)
                first = np.minimum(first, np.where(hit.any(axis=1), hit.argmax(axis=1), z1.shape[1]))
            found = (first >= tau) & (first < z1.shape[1])
            delay = first[found] - tau
            out.append({"monitor": name, "budget": budget, "member_level": p, "detect": float(found.mean()),
                        "median": float(np.median(delay)) if delay.size else None,
                        "within": float(np.mean(found & (first - tau <= target))),
                        "early": float(np.mean(first < tau)), "target": target})
    return out


def _pct(x: float | None) -> str:
    if x is None:
        return "-"
    return f"{100 * x:.1f} %" if 0 < x < 0.1 else f"{100 * x:.0f} %"


def _num(x: float | None) -> str:
    return "-" if x is None else f"{x:g}"


def markdown(res: dict[str, Any]) -> str:
    unit = "weeks" if res["frequency"] == "weekly" else "months"
    lines = [(f"| scenario ({res['models']} models, {res['frequency']}) | hard action | monitor | alarm | "
              f"detected | median delay ({unit}) | p90 delay | dated before change |"),
             "|---|---:|---|---:|---:|---:|---:|---:|"]
    for s, r in res["scenarios"].items():
        head = f"{s}: {r['what']}"
        hard = (_pct(r["drift"]["hard"]) + f" (refit {_pct(r['drift']['refit'])})"
                + (f" ({r['drift']['errors']} errors)" if r["drift"]["errors"] else ""))
        mons = [(k, v) for k, v in r["monitors"].items()] + [("reference Page CUSUM", r["reference"])]
        if r.get("reference_one_sided"):
            mons.append(("reference Page CUSUM told the direction", r["reference_one_sided"]))
        for j, (k, v) in enumerate(mons):
            lines.append(f"| {head if j == 0 else ''} | {hard if j == 0 else ''} | {k} | {_pct(v['alarm'])} | "
                         f"{_pct(v['detect'])} | {_num(v['median'])} | {_num(v['p90'])} | {_pct(v['early'])} |")
        if r.get("oracle"):
            o = r["oracle"]
            lines.append(f"|  |  | oracle bound (told date, direction, size) | - | <= {_pct(o['detect'])} | "
                         f">= {_num(o['median'])} | >= {_num(o['p90'])} | - |")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=int, default=200, help="models per scenario (default 200)")
    ap.add_argument("--frequency", choices=list(FREQUENCIES), default="weekly")
    ap.add_argument("--scenarios", nargs="+", choices=list(SCENARIOS), default=list(SCENARIOS))
    ap.add_argument("--seed", type=int, default=SEED)
    ap.add_argument("--json", type=Path, default=None, help="also write the figures to this file")
    ap.add_argument("--show", type=Path, default=None, help="print the tables of a --json file, run nothing")
    ap.add_argument("--reachable", metavar="SCENARIO", default=None,
                    help="only compare monitors of the recursive residuals on this scenario's draws at drift's "
                         "residual-stream budget and at 5 %% (standalone, no drift check; see reachable())")
    args = ap.parse_args(argv)
    if args.reachable:
        unit = "weeks" if args.frequency == "weekly" else "months"
        print(f"| monitor ({args.models} models, {args.frequency}, {args.reachable}) | false-alarm budget | "
              f"member level | detected | median delay ({unit}) | detected within target | dated before change |")
        print("|---|---:|---:|---:|---:|---:|---:|")
        for r in reachable(args.reachable, args.models, args.frequency, args.seed):
            print(f"| {r['monitor']} | {100 * r['budget']:.1f} % | {100 * r['member_level']:.2f} % | "
                  f"{_pct(r['detect'])} | {_num(r['median'])} | {_pct(r['within'])} (<= {r['target']}) | "
                  f"{_pct(r['early'])} |")
        return
    if args.show:
        res = json.loads(args.show.read_text(encoding="utf-8"))
    else:
        t0 = time.perf_counter()
        res = run(args.scenarios, args.models, args.frequency, args.seed)
        res["wall_s"] = time.perf_counter() - t0
        res["machine"] = (f"{platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
                          f"load {os.getloadavg()[0]:.1f}, {time.strftime('%Y-%m-%d %H:%M')}")
    print(markdown(res))
    print()
    for what, shown, ok in targets(res):
        print(f"target {what}: {'met' if ok else 'NOT met'}, {shown}")
    for s, r in res["scenarios"].items():
        print(f"{s}: verdicts {r['drift']['verdicts']}")
    unit = "weeks" if res["frequency"] == "weekly" else "months"
    for s, r in res["scenarios"].items():
        dt = r["drift"].get("dating")
        if dt:  # how far the date of the break quoted in a refit or relag ("changed around", "since") is off
            print(f"{s}: break dated (since - change, {unit}) median {_num(dt['median'])}, p10 {_num(dt['p10'])}, "
                  f"p90 {_num(dt['p90'])}, mean |error| {dt['mean_abs']:.1f}, over {dt['n']} models")
    print(f"ingest {res['timing']['ingest_s']:.1f} s, check {res['timing']['check_s']:.1f} s, "
          f"total {res['wall_s']:.1f} s; {res['machine']}", file=sys.stderr)
    if args.json:
        args.json.write_text(json.dumps(res, indent=1, default=float), encoding="utf-8")


if __name__ == "__main__":
    main()
