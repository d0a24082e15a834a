"""Accuracy of the as-deployed forecasts.

Takes a model's design and its one-step errors; gives the ``accuracy`` block of the payload: MAE, RMSE,
MASE and bias of the model and of the seasonal-naive baseline scored on the same periods, on one MASE
scale from the reference period. Used by :mod:`drift.checking.screening` (drift's recursive fit) and
:mod:`drift.checking.production` (the production model's own errors).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from drift.panel import Design


def _seasonal_naive(y: np.ndarray, s: float | None) -> np.ndarray:
    lag = round(s) if s else 1
    out = np.full_like(y, np.nan)
    out[lag:] = y[:-lag]
    return out


def _mase_scale(d: Design, *, dates: list[str] | None = None, base: np.ndarray | None = None
                ) -> dict[str, Any] | None:
    """The MASE denominator: the mean absolute seasonal-naive error (one season back) over the reference
    period, with the span and count it covers; None when it cannot be formed or is zero.

    ``dates``: the design's periods as ISO dates and ``base`` its seasonal-naive forecasts, when the caller
    has them already."""
    if base is None:
        base = _seasonal_naive(d.y, d.season_length)
    err = np.abs(d.y[: d.n_ref] - base[: d.n_ref])
    ok = np.flatnonzero(np.isfinite(err))
    if ok.size == 0:
        return None
    mae = float(err[ok].mean())
    if mae <= 0:
        return None
    first, last = int(ok[0]), int(ok[-1])
    if dates is None:
        start, end = d.periods[first].date().isoformat(), d.periods[last].date().isoformat()
    else:
        start, end = dates[first], dates[last]
    return {"mae": round(mae, 4), "n": int(ok.size), "start": start, "end": end}


def _accuracy_block(d: Design, err: np.ndarray, mon: np.ndarray, window: int, *,
                    dates: list[str] | None = None) -> dict[str, Any]:
    """The as-deployed accuracy of one model: its one-step errors ``err`` and those of the seasonal-naive
    baseline scored on the *same* periods (the last ``window`` rows of the monitored span ``mon`` where the
    model has an error), MASE of both on one scale (:func:`_mase_scale`), and the window as used.

    ``dates``: the design's periods as ISO dates, when the caller has them already."""
    base = _seasonal_naive(d.y, d.season_length)
    e_model = np.where(mon, err, np.nan)[-window:]
    scored = np.isfinite(e_model)
    e_base = np.where(scored, (d.y - base)[-window:], np.nan)
    scale = _mase_scale(d, dates=dates, base=base)
    s = scale["mae"] if scale else None
    rows = np.flatnonzero(scored) + (d.n - min(window, d.n))
    if rows.size:
        first, last = int(rows[0]), int(rows[-1])
        start, end = ((d.periods[first].date().isoformat(), d.periods[last].date().isoformat()) if dates is None
                      else (dates[first], dates[last]))
    else:
        start = end = None
    return {"model": _accuracy(e_model, s), "baseline": _accuracy(e_base, s),
            "window": int(min(window, int(np.count_nonzero(mon)))), "start": start, "end": end, "scale": scale}


def _accuracy(err: np.ndarray, scale: float | None) -> dict[str, Any]:
    e = err[np.isfinite(err)]
    n = e.size
    if n == 0:
        return {"mae": None, "rmse": None, "mase": None, "bias": None, "n": 0}
    # sums divided by the count: what np.mean computes (the same pairwise sum), without its overhead
    mae = float(np.abs(e).sum()) / n
    return {"mae": round(mae, 4), "rmse": round(math.sqrt(float((e * e).sum()) / n), 4),
            "mase": round(mae / scale, 4) if scale else None, "bias": round(float(e.sum()) / n, 4),
            "n": int(n)}
