"""h-step as-deployed replay: what the deployed model would have forecast h periods ahead, at each origin.

The one-step replay is the recursive fit itself (its one-step forecast errors, :mod:`drift.engine.recursive`).
For a horizon ``h > 1`` the forecast of period ``t`` is made at the start of period ``t − h + 1``:

    ŷ_t = x_t^{(t−h+1)}' b_{t−h}

where ``x_t^{(t−h+1)}`` is the design row built from the data available at that origin
(:func:`drift.panel.build_design` with ``horizon=h``) and ``b_{t−h}`` the recursive (expanding-window)
coefficients from the rows whose targets were known by then. A ``lagged`` driver with a lag shorter than
the horizon plus its delay is not yet measured at the origin, so such rows cannot be forecast and are left
out (they would need a forecast of the driver: use ``form: forecast``). Regression-with-ARMA-error models
are replayed for the regression part only.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from drift.config import Config, ModelConfig
from drift.panel import Design, build_design


def h_step_errors(cfg: Config, model: ModelConfig, obs: pd.DataFrame, as_of: Any, design: Design,
                  coef: np.ndarray, horizon: int) -> np.ndarray:
    """h-step forecast errors aligned to ``design.periods`` (NaN where no forecast could be made).

    Parameters
    ----------
    design : the one-step design (its ``y`` is the actual).
    coef : (n, k) recursive coefficients of the one-step fit (row t uses data up to t).
    horizon : h >= 1; h = 1 gives the one-step errors of the frozen-per-origin coefficients.
    """
    if horizon < 1:
        raise ValueError(f"horizon must be >= 1, got {horizon}")
    dh = build_design(cfg, model, obs, pd.Timestamp(as_of), horizon=horizon)
    n = min(dh.n, design.n)
    err = np.full(design.n, np.nan)
    if n <= horizon:
        return err
    b = np.asarray(coef, float)[: n - horizon]  # b_{t-h} for t = h .. n-1
    x = dh.X[horizon:n]
    with np.errstate(invalid="ignore"):
        fc = np.einsum("tk,tk->t", x, b)
    err[horizon:n] = design.y[horizon:n] - fc
    return err
