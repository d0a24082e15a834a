"""As-of design matrices: for one model, exactly the data that existed at each forecast origin.

Conventions
-----------
- Row ``t`` of a design describes target period ``t``. Its *forecast origin* is the moment the one-step
  forecast for ``t`` is made: the start of period ``t`` (00:00 UTC of its first day). For an ``h``-step
  design the origin is the start of period ``t − h + 1``.
- ``lagged`` driver with lag ``L``: the value for period ``t − L``, latest vintage with
  ``available_at <= origin``.
- ``forecast`` driver: the latest forecast *of* period ``t − L`` issued at or before the origin (vintages
  keyed by ``issued_at``; usable from ``max(issued_at, available_at)``). Values without an issue time are
  treated as known in advance.
- ``known`` driver: known in advance (a planned calendar): the latest plan made by the origin, or, when the
  store holds no plan from before the origin, the first plan stored (a calendar loaded today describes
  the past as it was planned).
- The target ``y_t`` is the latest vintage known at the check's ``as_of``.
- Trend and seasonality (the "two-step" treatment) enter as deterministic columns of the monitored
  regression and are therefore estimated recursively, only on data up to each origin; by Frisch–Waugh–Lovell
  the driver coefficients equal those of a regression on detrended, deseasonalised series. With
  ``method: stl`` the seasonal profile is estimated on the reference period only (statsmodels STL) and
  subtracted from target and drivers; the trend stays a column.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import timedelta
from typing import Any

import numpy as np
import pandas as pd

from drift.config import Config, ModelConfig, next_period, period_start
from drift.exceptions import InsufficientDataError

#: mean periods per year for the annual season when ``season: auto``
ANNUAL = {"D": 7.0, "W": 365.25 / 7.0, "M": 12.0, "Q": 4.0}


@dataclass(frozen=True)
class Design:
    """The regression of one model, as it could have been run at each origin.

    Attributes
    ----------
    periods : target periods (rows), period-start timestamps.
    y : (n,) target.
    X : (n, k) regressors: deterministic columns first, then drivers, then target lags.
    columns : names of the k columns.
    driver_columns : driver series -> column index in X.
    n_ref : number of rows in the reference period (the first ``n_ref`` rows).
    deterministic : indices of the deterministic columns.
    lags : driver series -> lag used.
    """

    model: str
    periods: pd.DatetimeIndex
    y: np.ndarray
    X: np.ndarray
    columns: list[str]
    driver_columns: dict[str, int]
    n_ref: int
    deterministic: list[int]
    lags: dict[str, int] = field(default_factory=dict)
    season_length: float | None = None

    @property
    def n(self) -> int:
        return len(self.periods)

    @property
    def k(self) -> int:
        return self.X.shape[1]


def week_anchor(model: ModelConfig) -> int:
    """Weekday on which the model's weeks start (that of its reference start)."""
    return model.reference.start.weekday()


def period_index(model: ModelConfig, start: pd.Timestamp, end: pd.Timestamp) -> pd.DatetimeIndex:
    """Period starts from ``start`` to ``end`` inclusive, on the model's frequency."""
    f = model.frequency
    first = period_start(start, f, week_anchor=week_anchor(model))
    step = {"D": "D", "W": "7D", "M": "MS", "Q": "QS"}[f]  # ``first`` is a period start: on the grid
    return pd.date_range(first, pd.Timestamp(end), freq=step)


def _origins(periods: pd.DatetimeIndex, horizon: int, freq: str) -> pd.DatetimeIndex:
    """Forecast origin (UTC) of each target period for an h-step forecast."""
    return shift_periods(periods, freq, horizon - 1).tz_localize("UTC")


def shift_periods(periods: pd.DatetimeIndex, freq: str, lag: int) -> pd.DatetimeIndex:
    """Period starts ``lag`` periods earlier (later for a negative lag)."""
    if lag == 0:
        return periods
    if freq in ("D", "W"):
        step = pd.Timedelta(days=1 if freq == "D" else 7)
        return periods - lag * step
    months = lag * (1 if freq == "M" else 3)
    return pd.DatetimeIndex(periods) - pd.DateOffset(months=months)  # period starts are first days


_SHIFT = np.int64(2**32)  # period code * 2^32 + seconds: one sortable int64 key per (period, time)


def as_ns(values: Any) -> np.ndarray:
    """datetime-like values -> int64 nanoseconds (UTC for aware ones; NaT -> min int64)."""
    idx = pd.DatetimeIndex(values)
    if idx.tz is not None:
        idx = idx.tz_convert("UTC").tz_localize(None)
    return np.asarray(idx.as_unit("ns").asi8)


def _keys(codes: np.ndarray, t_ns: np.ndarray, base: int, *, up: bool) -> np.ndarray:
    """(period code, time) -> int64 keys; times rounded to whole seconds, ``up`` for availability times and
    down for origins, so rounding can only make a value *later* (never reads the future)."""
    sec = (t_ns - base) / 1e9
    sec = np.ceil(sec) if up else np.floor(sec)
    return codes.astype(np.int64) * _SHIFT + np.clip(sec, 0, float(_SHIFT - 1)).astype(np.int64)


def values_as_of(vintages: pd.DataFrame, periods: pd.DatetimeIndex, origins: pd.DatetimeIndex,
                 form: str = "lagged") -> np.ndarray:
    """Value of each requested period as known at the matching origin.

    Parameters
    ----------
    vintages : rows of one series with columns period, issued_at, value, available_at.
    periods, origins : equal-length requests.
    form : "lagged" (available_at <= origin), "forecast" (latest issue by the origin) or "known".

    Notes
    -----
    Vectorised as one sorted search: vintages are keyed by (period, usable-from time) and each request by
    (period, origin); the last key at or before the request's key with the same period is the vintage in
    force. Times are compared in whole seconds, availability rounded up and origins down.
    """
    n = len(periods)
    out = np.full(n, np.nan)
    if vintages.empty or n == 0:
        return out
    v = vintages
    usable = as_ns(v["available_at"])
    has_issue = form == "forecast" and bool(v["issued_at"].notna().any())
    if has_issue:
        # a forecast is usable from its issue (and not before the store says it was available)
        issued = as_ns(v["issued_at"].fillna(v["available_at"]))
        usable = np.maximum(issued, usable)
    vp = as_ns(v["period"])
    uniq = np.unique(vp)
    vcode = np.searchsorted(uniq, vp)
    rp = as_ns(periods)
    rcode = np.searchsorted(uniq, rp)
    found = (rcode < uniq.size) & (uniq[np.minimum(rcode, uniq.size - 1)] == rp)
    base = int(min(usable.min(), as_ns(origins).min())) - 10**9
    vkey = _keys(vcode, usable, base, up=True)
    order = np.argsort(vkey, kind="stable")
    vkey_s = vkey[order]
    vals = v["value"].to_numpy(dtype=float)[order]
    rkey = _keys(rcode, as_ns(origins), base, up=False)
    pos = np.searchsorted(vkey_s, rkey, side="right") - 1
    ok = found & (pos >= 0)
    ok[ok] &= (vkey_s[pos[ok]] // _SHIFT) == rcode[ok]
    out[ok] = vals[pos[ok]]
    if form in ("known", "forecast"):
        missing = np.isnan(out) & found
        if missing.any():
            plain = np.ones(len(v), bool) if not has_issue else v["issued_at"].isna().to_numpy()
            # the first plan stored for each period (earliest usable-from among the plain values)
            cand = np.flatnonzero(plain)
            if cand.size:
                c_order = cand[np.lexsort((usable[cand], vcode[cand]))]
                first_code, first_at = np.unique(vcode[c_order], return_index=True)
                first_val = v["value"].to_numpy(dtype=float)[c_order[first_at]]
                k = np.searchsorted(first_code, rcode[missing])
                hit = (k < first_code.size) & (first_code[np.minimum(k, first_code.size - 1)] == rcode[missing])
                fill = np.full(int(missing.sum()), np.nan)
                fill[hit] = first_val[k[hit]]
                out[np.flatnonzero(missing)] = fill
    return out


def latest_values(vintages: pd.DataFrame, periods: pd.DatetimeIndex) -> np.ndarray:
    """Latest known vintage of each period (the 'final' data): the one with the latest available_at."""
    out = np.full(len(periods), np.nan)
    if vintages.empty or len(periods) == 0:
        return out
    vp = as_ns(vintages["period"])
    at = as_ns(vintages["available_at"])
    order = np.lexsort((np.arange(len(vp)), at, vp))  # by period, then time, then row order
    vp_s = vp[order]
    last = np.r_[vp_s[1:] != vp_s[:-1], True]  # last row of each period
    per = vp_s[last]
    val = vintages["value"].to_numpy(dtype=float)[order][last]
    rp = as_ns(periods)
    k = np.searchsorted(per, rp)
    hit = (k < per.size) & (per[np.minimum(k, per.size - 1)] == rp)
    out[hit] = val[k[hit]]
    return out


def deterministic_columns(model: ModelConfig, periods: pd.DatetimeIndex,
                          n_ref: int) -> tuple[np.ndarray, list[str]]:
    """Constant, linear trend and seasonal columns for the model's periods.

    The trend is ``(t - t0) / n_ref`` (scaled so its column is O(1) on the reference period).
    """
    n = len(periods)
    t = np.arange(n, dtype=float)
    cols = [np.ones(n)]
    names = ["const"]
    pp = model.preprocess
    if pp.trend == "linear":
        cols.append(t / max(n_ref, 1))
        names.append("trend")
    s = _season_length(model)
    if s is not None and pp.method == "fourier":
        h = min(pp.harmonics, int(np.floor(s / 2)))
        for j in range(1, h + 1):
            ang = 2.0 * np.pi * j * t / s
            if 2 * j != s:  # sin vanishes at the Nyquist harmonic of an even integer season
                cols.append(np.sin(ang))
                names.append(f"sin{j}")
            cols.append(np.cos(ang))
            names.append(f"cos{j}")
    elif s is not None and pp.method == "dummies":
        pos, si = season_position(model, periods)
        for j in range(1, si):
            col = (pos == j).astype(float)
            if col[:n_ref].any():  # a position never seen in the reference period cannot be estimated
                cols.append(col)
                names.append(f"season{j}")
    return np.column_stack(cols), names


def season_position(model: ModelConfig, periods: pd.DatetimeIndex) -> tuple[np.ndarray, int]:
    """Calendar position of each period within the season, and the number of positions.

    ``season: auto`` follows the calendar, so that a season of 365.25 days does not drift against a
    fixed cycle: weekly data by ISO week of the year (week 53 counted with week 52), monthly by month,
    quarterly by quarter, daily by weekday. An explicit integer season is a plain cycle of that length.
    """
    if model.preprocess.season != "auto":
        si = int(model.preprocess.season)
        return np.arange(len(periods)) % si, si
    f = model.frequency
    if f == "W":
        wk = np.asarray(pd.DatetimeIndex(periods).isocalendar().week, dtype=int)
        return np.minimum(wk, 52) - 1, 52
    if f == "M":
        return np.asarray(periods.month) - 1, 12
    if f == "Q":
        return np.asarray(periods.quarter) - 1, 4
    return np.asarray(periods.weekday), 7


def _season_length(model: ModelConfig) -> float | None:
    if model.preprocess.season == "none":
        return None
    if model.preprocess.season == "auto":
        return ANNUAL[model.frequency]
    return float(model.preprocess.season)


def _stl_profile(values: np.ndarray, n_ref: int, s: float, pos: np.ndarray, npos: int) -> np.ndarray:
    """Seasonal component estimated by STL on the reference rows, averaged by calendar position
    (:func:`season_position`) and carried forward by position (no look-ahead)."""
    from statsmodels.tsa.seasonal import STL

    si = int(round(s))
    ref = pd.Series(values[:n_ref]).interpolate(limit_direction="both").to_numpy()
    if n_ref < 2 * si + 1 or not np.isfinite(ref).all():
        raise InsufficientDataError("STL seasonal adjustment", 2 * si + 1, int(np.isfinite(ref).sum()),
                                    "use method: fourier or a longer reference period")
    seasonal = STL(ref, period=si, robust=True).fit().seasonal
    sums = np.bincount(pos[:n_ref], weights=seasonal, minlength=npos)
    counts = np.bincount(pos[:n_ref], minlength=npos)
    with np.errstate(invalid="ignore"):
        profile = np.where(counts > 0, sums / np.maximum(counts, 1), 0.0)
    return profile[pos]


def build_design(cfg: Config, model: ModelConfig, obs: pd.DataFrame, as_of: pd.Timestamp, *,
                 horizon: int = 1, lags: Mapping[str, int] | None = None,
                 drop: tuple[str, ...] = ()) -> Design:
    """The model's design as it could have been built at each origin up to ``as_of``.

    Parameters
    ----------
    obs : all vintages (columns series, period, issued_at, value, available_at) of the model's series
        known by ``as_of``.
    as_of : tz-aware moment of the check; rows run to the last target period with a known value.
    horizon : forecast horizon h; the origin of row t is the start of period t − h + 1.
    lags : optional overrides of driver lags (for lag profiles / relag candidates).
    drop : driver series to leave out (nested models).

    Raises
    ------
    InsufficientDataError
        when the target has no values in the reference period.
    """
    f = model.frequency
    ref_start = pd.Timestamp(model.reference.start)
    ref_end = pd.Timestamp(model.reference.end)
    by_series = {s: g for s, g in obs.groupby("series")}
    tgt = by_series.get(model.target, obs.iloc[0:0])
    known_tgt = tgt[tgt["available_at"] <= as_of]
    if known_tgt.empty:
        raise InsufficientDataError(f"model '{model.name}': target '{model.target}'", 1, 0,
                                    "no target values are known at this date; run `drift ingest` first")
    last = known_tgt["period"].max()
    periods = period_index(model, ref_start, max(last, ref_end))
    n_ref = int((periods <= ref_end).sum())
    y = latest_values(known_tgt, periods)
    origins = _origins(periods, horizon, f)
    det, names = deterministic_columns(model, periods, n_ref)
    cols = [det]
    det_idx = list(range(det.shape[1]))
    driver_columns: dict[str, int] = {}
    used_lags: dict[str, int] = {}
    s = _season_length(model)
    stl = s is not None and model.preprocess.method == "stl"
    if stl:
        spos, snpos = season_position(model, periods)
        y = y - _stl_profile(y, n_ref, s, spos, snpos)  # type: ignore[arg-type]
    k = det.shape[1]
    for d in model.drivers:
        if d.series in drop:
            continue
        lag = int(lags.get(d.series, d.lag)) if lags else d.lag
        vint = by_series.get(d.series, obs.iloc[0:0])
        x = values_as_of(vint, shift_periods(periods, f, lag), origins, d.form)
        if stl:
            x = x - _stl_profile(x, n_ref, s, spos, snpos)  # type: ignore[arg-type]
        cols.append(x[:, None])
        names.append(f"{d.series}[L{lag}]" if lag else d.series)
        driver_columns[d.series] = k
        used_lags[d.series] = lag
        k += 1
    for j in model.target_lags:
        x = values_as_of(tgt, shift_periods(periods, f, j), origins, "lagged")
        cols.append(x[:, None])
        names.append(f"{model.target}[L{j}]")
        k += 1
    X = np.column_stack(cols).astype(float)
    if np.isfinite(y[:n_ref]).sum() == 0:
        raise InsufficientDataError(f"model '{model.name}': reference period of '{model.target}'", X.shape[1] + 1,
                                    0, "check reference.start/end against the data")
    return Design(model=model.name, periods=periods, y=y.astype(float), X=X, columns=names,
                  driver_columns=driver_columns, n_ref=n_ref, deterministic=det_idx, lags=used_lags,
                  season_length=s)


def next_due(last_period: pd.Timestamp, freq: str, delay: timedelta) -> pd.Timestamp:
    """When the value after ``last_period`` is due: the end of the next period plus the delay (UTC)."""
    return (next_period(pd.Timestamp(last_period), freq, 2) + pd.Timedelta(delay)).tz_localize("UTC")
