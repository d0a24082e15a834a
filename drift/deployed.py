"""The model that is really deployed: production coefficients given in the config (``deployed:``).

Without them drift monitors its own re-estimate of the model. A team's production model was often fitted
elsewhere (a regression with ARMA errors in a forecasting package, a regularised fit, another window), so
its coefficients differ. With ``deployed:`` drift replays *those* coefficients at each forecast origin:
the as-deployed one-step error of period t is exactly

    e_t = y_t − x_t' b                         (no error model), or
    e_t = [θ(L)^{-1} φ(L)] (y − X b)_t         (with ``errors: {ar: [...], ma: [...]}``),

where x_t is drift's design row (:func:`drift.panel.build_design`: the drivers as known at the origin)
and the ARMA filter is the conditional one of :func:`drift.engine.prewhiten` (zero pre-sample values,
started at the first period of the reference: its first p values are missing and the MA part settles
within a few periods). These errors feed the check's accuracy block, its forecast chart and Trigg's
tracking signal; the per-driver ``coef_reference`` and the reference lines of the coefficient charts
show the deployed values. The monitors still watch drift's own recursive fit: they test whether the
*relationship* moved, and they are calibrated for an estimated reference fit.

Column names (the keys of ``deployed.coefficients``), in design order:

- ``const``; ``trend`` (``preprocess.trend: linear``), the column ``t / n_ref``: t counts periods from the
  reference start (0 at the first period), n_ref is the number of reference periods;
- ``sin1``, ``cos1``, ``sin2``, ... (``method: fourier``, ``harmonics`` pairs): ``sin(2π j t / s)``,
  ``cos(2π j t / s)`` with s the season length in periods (``auto``: 365.25/7 weekly, 12 monthly, 4
  quarterly, 7 daily); ``sin{j}`` is absent when 2j = s;
- ``season1`` ... (``method: dummies``): 1 in the periods at that calendar position (position 0 is the
  base);
- each driver by its series name (its lag is the config's);
- each target lag as ``<target>[L<j>]``.

Every column of the model needs a coefficient (give 0 for a term the production model does not have); a
name that is not a column is a config error. The coefficients belong to one monitoring epoch (``epoch``,
default 1: the config as written); after ``drift accept`` starts a new epoch they no longer apply until
the config gives the new production coefficients with that epoch's number.
"""

from __future__ import annotations

import difflib
from typing import Any

import numpy as np

from drift.config import ModelConfig

#: the column names drift gives to deterministic terms (documented in the module docstring)
DETERMINISTIC = ("const", "trend", "sin<j>", "cos<j>", "season<j>")


def expected_terms(model: ModelConfig) -> tuple[list[str], list[str]]:
    """(names that must have a coefficient, names that may) for the model's design.

    Season dummies are optional: a calendar position never seen in the reference period has no column.
    """
    from drift.panel import _season_length

    must = ["const"]
    may: list[str] = []
    pp = model.preprocess
    if pp.trend == "linear":
        must.append("trend")
    s = _season_length(model)
    if s is not None and pp.method == "fourier":
        for j in range(1, min(pp.harmonics, int(np.floor(s / 2))) + 1):
            if 2 * j != s:
                must.append(f"sin{j}")
            must.append(f"cos{j}")
    elif s is not None and pp.method == "dummies":
        if pp.season == "auto":
            si = {"W": 52, "M": 12, "Q": 4, "D": 7}[model.frequency]
        else:
            si = int(pp.season)
        may += [f"season{j}" for j in range(1, si)]
    must += [d.series for d in model.drivers]
    must += [f"{model.target}[L{j}]" for j in model.target_lags]
    return must, may


def check_terms(model: ModelConfig) -> str | None:
    """What is wrong with the names of ``model.deployed.coefficients`` (None when nothing)."""
    if model.deployed is None:
        return None
    must, may = expected_terms(model)
    given = list(model.deployed.coefficients)
    unknown = [g for g in given if g not in must and g not in may]
    if unknown:
        hints = []
        for u in unknown:
            close = difflib.get_close_matches(u, must + may, n=1, cutoff=0.6)
            hints.append(f"'{u}'" + (f" (did you mean '{close[0]}'?)" if close else ""))
        return (f"{', '.join(hints)} {'is not a column' if len(unknown) == 1 else 'are not columns'} of model "
                f"'{model.name}'; its columns: {', '.join(must + may)}")
    missing = [m for m in must if m not in model.deployed.coefficients]
    if missing:
        return (f"no deployed coefficient for {', '.join(missing)} of model '{model.name}': every column needs "
                "one (give 0 for a term the production model does not have)")
    return None


def coefficient_vector(model: ModelConfig, epoch: int, design: Any) -> np.ndarray | None:
    """The deployed coefficients in the order of ``design.columns``, when the config gives them for
    ``epoch``; None otherwise. A driver column is looked up by its series, others by their column name."""
    dep = model.deployed
    if dep is None or dep.epoch != epoch:
        return None
    by_col = {j: s for s, j in design.driver_columns.items()}
    names = [by_col.get(j, c) for j, c in enumerate(design.columns)]
    missing = [n for n in names if n not in dep.coefficients]
    if missing:  # the config check guarantees the fixed columns; a driver dropped by an epoch cannot be here
        raise ValueError(f"model '{model.name}': no deployed coefficient for {', '.join(missing)}")
    return np.array([dep.coefficients[n] for n in names], dtype=float)


def as_deployed_errors(model: ModelConfig, y: np.ndarray, X: np.ndarray, coef: np.ndarray) -> np.ndarray:
    """One-step errors of the deployed model replayed with its coefficients: ``y − X b``, filtered by the
    deployed ARMA error model when the config gives one (module docstring). NaN where a value is missing."""
    with np.errstate(invalid="ignore"):
        u = np.asarray(y, float) - np.asarray(X, float) @ np.asarray(coef, float)
    errs = model.deployed.errors if model.deployed is not None else None
    if errs is None or not (errs.ar or errs.ma):
        return u
    from drift.engine import prewhiten
    from drift.engine.arma import ErrorModel

    em = ErrorModel(ar=np.array([errs.ar], float).reshape(1, -1), ma=np.array([errs.ma], float).reshape(1, -1),
                    sigma2=np.array([np.nan]), nobs=np.array([0]), method="given", squeeze=True)
    e, _ = prewhiten(u, np.zeros((u.size, 1)), em)
    return np.asarray(e, float)
