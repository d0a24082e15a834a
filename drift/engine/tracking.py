"""Forecast-error tracking signals (batched over models, one pass over time).

Two classic demand-planning monitors of a forecast's bias, both fed with forecast errors
``e_t = actual - forecast``:

- :func:`tracking_signal`: cumulative error divided by the mean absolute deviation (MAD). Investigate when
  ``|TS| > limit`` (4 is the usual default; up to 8 for low-value items).
- :func:`trigg_signal`: Trigg's (1964) smoothed error divided by the smoothed MAD, always in [-1, 1].

References
----------
Brown, R. G. (1959). Statistical Forecasting for Inventory Control. McGraw-Hill (the cumulative-error /
MAD tracking signal; the +-4 rule is common practice).
Trigg, D. W. (1964). Monitoring a forecasting system. Operational Research Quarterly 15(3), 271-274.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from drift.engine.tables import monitoring as mon_table
from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray

#: Expected |e| of a N(0, sigma^2) error is sigma * sqrt(2/pi): the MAD of normal errors (sigma ~ 1.25 MAD).
_NORMAL_MAD_FACTOR = float(np.sqrt(2.0 / np.pi))


@dataclass(frozen=True)
class TrackingResult:
    """Path of a tracking signal and where it fired.

    Attributes
    ----------
    signal : (M, T) signal path (NaN where the error is missing, or before the warm-up ends).
    mad : (M, T) the MAD used at each time.
    first_signal : (M,) first index with ``|signal| > limit``; -1 if none.
    signals : (M, T) bool, every time the signal fired.
    limit : the threshold used (float).
    method : name of the signal.
    params : parameters actually used.
    """

    signal: Any
    mad: Any
    first_signal: Any
    signals: Any
    limit: float
    method: str
    params: dict

    def standing_since(self) -> Any:
        """Where the crossing that stands at the last non-missing time began: the first index of the run of
        times, ending with the last non-missing one, at which ``|signal| > limit`` (missing times neither
        break nor start the run); -1 when the signal is within its limit at its last non-missing time.

        The signal at a time is what a check run then would have seen, so this is the first check of the
        standing signal. ``first_signal`` is the first crossing ever, which for a per-time limit (a
        stationary quantile, not a horizon's) is bound to come, on a long enough stable stream, long before
        any crossing that stands today."""
        sig = np.atleast_2d(self.signal)
        fired = np.atleast_2d(self.signals)
        M, T = sig.shape
        ok = np.isfinite(sig)
        cols = np.broadcast_to(np.arange(T), (M, T))
        last_ok = np.where(ok, cols, -1).max(axis=1)
        last_calm = np.where(ok & ~fired, cols, -1).max(axis=1)
        start = np.where(ok & (cols > last_calm[:, None]), cols, T).min(axis=1)
        standing = (last_ok >= 0) & fired[np.arange(M), np.maximum(last_ok, 0)]
        out = np.where(standing, start, -1).astype(np.int64)
        return int(out[0]) if np.ndim(self.signal) == 1 else out


def _as_errors(errors: Any) -> tuple[FloatArray, bool]:
    e = np.asarray(errors, dtype=float)
    if e.ndim not in (1, 2):
        raise ValueError(f"errors must be 1-D (T,) or 2-D (M, T), got shape {e.shape}")
    if np.any(np.isinf(e)):
        raise ValueError("errors must not contain infinities (use NaN for missing values)")
    if e.ndim == 1:
        return e[None, :], True
    return e, False


def _check_alpha(alpha: float) -> float:
    if not isinstance(alpha, (int, float)) or not 0.0 < float(alpha) <= 1.0:
        raise ValueError(f"alpha must be in (0, 1], got {alpha!r}")
    return float(alpha)


def _initial_mad(e: FloatArray, mad0: Any, n_init: int, what: str) -> FloatArray:
    """Initial MAD: given, or the mean |e| of the first n_init non-missing errors (warm-up)."""
    M = e.shape[0]
    if mad0 is not None:
        m0 = np.broadcast_to(np.asarray(mad0, dtype=float), (M,)).copy()
        if np.any(~np.isfinite(m0)) or np.any(m0 <= 0):
            raise ValueError("mad0 must be positive and finite")
        return m0
    ok = np.isfinite(e)
    rank = np.cumsum(ok, axis=1)
    first = ok & (rank <= n_init)
    cnt = first.sum(axis=1)
    if np.any(cnt < n_init):
        raise InsufficientDataError(f"{what} warm-up", n_init, int(cnt.min()),
                                    hint="pass mad0 (e.g. from the reference period) to skip the warm-up")
    m0 = np.where(first, np.abs(np.where(ok, e, 0.0)), 0.0).sum(axis=1) / cnt
    if np.any(m0 <= 0):
        raise InsufficientDataError(f"{what} (all warm-up errors are zero)", n_init, 0,
                                    hint="pass mad0 explicitly")
    return m0


def tracking_signal(errors: Any, *, alpha: float = 0.1, window: int | None = None, limit: float = 4.0,
                    mad0: Any = None, warmup: int | None = None) -> TrackingResult:
    """Cumulative forecast error over MAD, with a reset after each signal.

    Parameters
    ----------
    errors : (T,) or (M, T) forecast errors ``actual - forecast`` from the start of the monitoring period
        (index 0 = first monitored period). NaN = missing period (skipped: no update, signal NaN).
    alpha : smoothing constant of the exponential MAD (used when ``window`` is None).
    window : if given, the MAD is the mean |e| over the last ``window`` non-missing errors (at least 1).
    limit : threshold for ``|TS|``; 4 is the usual rule.
    mad0 : initial MAD (scalar or (M,)), e.g. from the reference period. If None, the mean |e| of the
        first ``warmup`` errors seeds it and the signal starts after them.
    warmup : warm-up length when ``mad0`` is None; default ``round(2/alpha - 1)`` (the EWMA's
        equivalent window) or ``window``.

    Returns
    -------
    TrackingResult (squeezed to 1-D paths and int first_signal for 1-D input).

    Raises
    ------
    ValueError : bad alpha, window, limit, mad0 or shapes.
    InsufficientDataError : fewer non-missing errors than the warm-up needs, or a zero warm-up MAD.

    Notes
    -----
    Reset convention: the cumulative sum :math:`C_t = \\sum e` restarts at 0 at the start of the
    monitoring period and again right after each signal (so a persistent bias fires repeatedly, about
    every ``limit * MAD / bias`` periods, instead of staying above the limit forever).
    :math:`TS_t = C_t / MAD_t` with
    :math:`MAD_t = \\alpha|e_t| + (1-\\alpha) MAD_{t-1}` (or the rolling mean). Without a reset the
    cumulative error of unbiased forecasts is a random walk and would eventually cross any fixed limit.
    For normal errors :math:`\\sigma \\approx 1.25\\,MAD`.

    The +-4 rule is a practitioner's "investigate" rule, not a calibrated false-alarm rate: between resets
    :math:`C_t` of unbiased iid normal errors is a random walk that leaves +-4 MAD (about +-3.2 sigma) after
    roughly :math:`(3.2 + 0.58)^2 \\approx 14` periods on average (0.58 sigma: the mean overshoot), so
    it fires about once every 15 periods (measured: 15.0 over 2,000 x 400 simulated periods, alpha = 0.1).
    Use it to rank models by bias, and the sequential monitors (:mod:`drift.engine.monitor`) for evidence.
    """
    e, squeeze = _as_errors(errors)
    M, T = e.shape
    alpha = _check_alpha(alpha)
    if window is not None and (not isinstance(window, (int, np.integer)) or window < 1):
        raise ValueError(f"window must be a positive integer or None, got {window!r}")
    if not isinstance(limit, (int, float)) or not limit > 0:
        raise ValueError(f"limit must be positive, got {limit!r}")
    if warmup is None:
        warmup = int(window) if window is not None else max(1, round(2.0 / alpha - 1.0))
    elif not isinstance(warmup, (int, np.integer)) or warmup < 1:
        raise ValueError(f"warmup must be a positive integer, got {warmup!r}")
    mad = _initial_mad(e, mad0, warmup, "tracking signal")
    ok = np.isfinite(e)
    start = np.zeros(M, dtype=np.int64)
    if mad0 is None:  # the signal starts after the warm-up errors
        rank = np.cumsum(ok, axis=1)
        start = np.argmax(rank >= warmup, axis=1) + 1

    ts = np.full((M, T), np.nan)
    mads = np.full((M, T), np.nan)
    fired = np.zeros((M, T), dtype=bool)
    csum = np.zeros(M)
    if window is not None:
        ring = np.zeros((M, int(window)))
        ring[:] = mad[:, None]  # the warm-up level fills the window initially
        pos = np.zeros(M, dtype=np.int64)
        rows = np.arange(M)
    for t in range(T):
        act = ok[:, t] & (t >= start)
        et = np.where(act, e[:, t], 0.0)
        if window is None:
            mad = np.where(act, alpha * np.abs(et) + (1.0 - alpha) * mad, mad)
        else:
            ring[rows, pos] = np.where(act, np.abs(et), ring[rows, pos])
            pos = np.where(act, (pos + 1) % int(window), pos)
            mad = ring.mean(axis=1)
        csum = csum + et
        with np.errstate(invalid="ignore", divide="ignore"):
            s = csum / mad
        hit = act & (np.abs(s) > limit)
        ts[:, t] = np.where(act, s, np.nan)
        mads[:, t] = np.where(act, mad, np.nan)
        fired[:, t] = hit
        csum = np.where(hit, 0.0, csum)  # reset after a signal
    first = np.where(fired.any(axis=1), fired.argmax(axis=1), -1).astype(np.int64)
    params = {"alpha": alpha, "window": window, "limit": float(limit), "warmup": warmup if mad0 is None else 0,
              "reset": "at start and after each signal"}
    if squeeze:
        return TrackingResult(ts[0], mads[0], int(first[0]), fired[0], float(limit),
                              "Tracking signal (cumulative error / MAD)", params)
    return TrackingResult(ts, mads, first, fired, float(limit), "Tracking signal (cumulative error / MAD)",
                          params)


def trigg_signal(errors: Any, alpha: float = 0.1, *, limit: float | None = None, level: float = 0.05,
                 mad0: Any = None) -> TrackingResult:
    """Trigg's (1964) smoothed-error tracking signal, :math:`T_t = E_t / MAD_t \\in [-1, 1]`.

    Parameters
    ----------
    errors : (T,) or (M, T) forecast errors; NaN = missing period (skipped, no update).
    alpha : smoothing constant for both the error and the MAD.
    limit : threshold for ``|T|``. If None it is the tabulated stationary (1 - level) quantile of |T| for
        iid normal errors (:mod:`drift.engine.tables.monitoring`, simulated; alpha in 0.05, 0.1, 0.2, 0.3).
    level : tail probability of the tabulated limit (0.10, 0.05, 0.01) when ``limit`` is None. It is the
        probability that |T| exceeds the limit *at a given time* in steady state, not over a horizon.
    mad0 : initial MAD (scalar or (M,)); default :math:`\\sqrt{2/\\pi}` times the standard deviation of
        the non-missing errors, i.e. the MAD of normal errors of that spread (computed from the whole
        input: pass the reference-period MAD in production).

    Returns
    -------
    TrackingResult (``first_signal``: first index with ``|T| > limit``).

    Raises
    ------
    ValueError : bad alpha, limit, level, mad0 or shapes; an alpha without a tabulated limit.
    InsufficientDataError : fewer than 2 non-missing errors (default mad0), or all errors zero.

    Notes
    -----
    :math:`E_t = \\alpha e_t + (1-\\alpha)E_{t-1}`, :math:`MAD_t = \\alpha|e_t| + (1-\\alpha)MAD_{t-1}`,
    :math:`E_0 = 0`. By the triangle inequality :math:`|E_t| \\le MAD_t` whenever
    :math:`|E_0| \\le MAD_0`, so :math:`|T_t| \\le 1`.
    """
    e, squeeze = _as_errors(errors)
    M, T = e.shape
    alpha = _check_alpha(alpha)
    if limit is None:
        limit = mon_table.trigg_limit(alpha, level)
    elif not isinstance(limit, (int, float)) or not 0 < limit <= 1:
        raise ValueError(f"limit must be in (0, 1] for the Trigg signal, got {limit!r}")
    ok = np.isfinite(e)
    if mad0 is None:
        cnt = ok.sum(axis=1)
        if np.any(cnt < 2):
            raise InsufficientDataError("Trigg signal (default mad0)", 2, int(cnt.min()))
        with np.errstate(invalid="ignore"):
            sd = np.nanstd(e, axis=1)
        if np.any(sd <= 0):
            raise InsufficientDataError("Trigg signal (errors have no spread)", 2, 0, hint="pass mad0")
        mad = _NORMAL_MAD_FACTOR * sd
    else:
        mad = _initial_mad(e, mad0, 1, "Trigg signal")
    sm = np.zeros(M)
    out = np.full((M, T), np.nan)
    mads = np.full((M, T), np.nan)
    for t in range(T):
        act = ok[:, t]
        et = np.where(act, e[:, t], 0.0)
        sm = np.where(act, alpha * et + (1 - alpha) * sm, sm)
        mad = np.where(act, alpha * np.abs(et) + (1 - alpha) * mad, mad)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[:, t] = np.where(act, np.clip(sm / mad, -1.0, 1.0), np.nan)  # clip: rounding only
        mads[:, t] = np.where(act, mad, np.nan)
    fired = np.where(np.isfinite(out), np.abs(out) > limit, False)
    first = np.where(fired.any(axis=1), fired.argmax(axis=1), -1).astype(np.int64)
    params = {"alpha": alpha, "limit": float(limit), "level": level}
    name = "Trigg tracking signal (smoothed error / smoothed MAD)"
    if squeeze:
        return TrackingResult(out[0], mads[0], int(first[0]), fired[0], float(limit), name, params)
    return TrackingResult(out, mads, first, fired, float(limit), name, params)
