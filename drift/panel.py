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

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import timedelta
from functools import lru_cache
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
    return _period_range(model.frequency, week_anchor(model), start, end)


def _period_range(freq: str, anchor: int, start: pd.Timestamp, end: pd.Timestamp) -> pd.DatetimeIndex:
    first = period_start(start, freq, week_anchor=anchor)
    step = {"D": "D", "W": "7D", "M": "MS", "Q": "QS"}[freq]  # ``first`` is a period start: on the grid
    return pd.date_range(first, pd.Timestamp(end), freq=step)


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


_NAT = np.iinfo(np.int64).min  # what :func:`as_ns` gives for NaT


@dataclass(frozen=True)
class Vintages:
    """The vintages of one series as arrays, rows in their stored order (what :func:`values_as_of` and
    :func:`latest_values` read): period, available_at and issued_at as int64 nanoseconds (:func:`as_ns`,
    NaT as the smallest int64), value as float64; ``period_unit`` is the unit of the frame's period column."""

    period: np.ndarray
    available: np.ndarray
    issued: np.ndarray
    value: np.ndarray
    period_unit: str = "ns"

    def __len__(self) -> int:
        return int(self.period.size)

    @classmethod
    def from_frame(cls, v: pd.DataFrame) -> Vintages:
        """From rows with columns period, issued_at, value, available_at."""
        return cls(as_ns(v["period"]), as_ns(v["available_at"]), as_ns(v["issued_at"]),
                   v["value"].to_numpy(dtype=float), _unit(v["period"]))

    def take(self, rows: np.ndarray) -> Vintages:
        """The rows at ``rows`` (positions or a boolean mask), in that order."""
        return Vintages(self.period[rows], self.available[rows], self.issued[rows], self.value[rows],
                        self.period_unit)


def _unit(col: Any) -> str:
    dt = getattr(col, "dtype", None)
    unit = getattr(dt, "unit", None)  # tz-aware
    if unit is None and isinstance(dt, np.dtype) and dt.kind == "M":
        unit = np.datetime_data(dt)[0]
    return str(unit or "ns")


def _empty_vintages() -> Vintages:
    z = np.empty(0, np.int64)
    return Vintages(z, z, z, np.empty(0, float))


class SeriesVintages(Mapping[str, Vintages]):
    """The vintages of every series of an observation frame, converted once: series name -> :class:`Vintages`
    (a view of arrays sorted by series, stored order kept within a series), and each series' row positions
    in the frame (:attr:`rows`). Series without a name are left out, as ``groupby`` leaves them."""

    def __init__(self, obs: pd.DataFrame) -> None:
        codes, uniques = _series_codes(obs["series"])
        counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
        starts = int(np.sum(codes < 0)) + np.concatenate([[0], np.cumsum(counts)])
        v = Vintages.from_frame(obs)
        if codes.size and bool(np.all(codes[1:] >= codes[:-1])):  # rows already by series (the store's order)
            order = np.arange(codes.size)
        else:
            order = np.argsort(codes, kind="stable")
            v = v.take(order)
        self._all = v
        self._starts = starts
        self._slices = {str(s): (int(starts[j]), int(starts[j + 1])) for j, s in enumerate(uniques)}
        self._index = {str(s): j for j, s in enumerate(uniques)}
        self._order = order

    def __getitem__(self, name: str) -> Vintages:
        a, b = self._slices[name]
        v = self._all
        return Vintages(v.period[a:b], v.available[a:b], v.issued[a:b], v.value[a:b], v.period_unit)

    def __contains__(self, name: object) -> bool:
        return name in self._slices

    def __iter__(self) -> Any:
        return iter(self._slices)

    def __len__(self) -> int:
        return len(self._slices)

    def rows(self, name: str) -> np.ndarray:
        """Positions in the frame of the rows of series ``name``, in their stored order."""
        a, b = self._slices[name]
        return self._order[a:b]


def _series_codes(col: pd.Series) -> tuple[np.ndarray, Any]:
    """``pd.factorize(col)`` (codes in order of first appearance, -1 for a missing name), factorizing only
    the first name of each run of equal names: the rows of a series mostly come together."""
    if len(col) < 2 or bool(col.isna().any()):
        codes, uniques = pd.factorize(col, sort=False)
        return np.asarray(codes), uniques
    arr = col.array
    heads = np.concatenate([[0], np.flatnonzero(np.asarray(arr[1:] != arr[:-1], dtype=bool)) + 1])
    head_codes, uniques = pd.factorize(arr.take(heads), sort=False)
    return np.repeat(np.asarray(head_codes), np.diff(np.append(heads, len(arr)))), uniques


def values_as_of(vintages: pd.DataFrame | Vintages, periods: pd.DatetimeIndex | np.ndarray,
                 origins: pd.DatetimeIndex | np.ndarray, form: str = "lagged") -> np.ndarray:
    """Value of each requested period as known at the matching origin.

    Parameters
    ----------
    vintages : rows of one series with columns period, issued_at, value, available_at (or those as
        :class:`Vintages`).
    periods, origins : equal-length requests (datetime-like, or int64 nanoseconds as :func:`as_ns` gives).
    form : "lagged" (available_at <= origin), "forecast" (latest issue by the origin) or "known".

    Notes
    -----
    Vectorised as one sorted search: vintages are keyed by (period, usable-from time) and each request by
    (period, origin); the last key at or before the request's key with the same period is the vintage in
    force. Times are compared in whole seconds, availability rounded up and origins down.
    """
    n = len(periods)
    out = np.full(n, np.nan)
    if len(vintages) == 0 or n == 0:
        return out
    v = vintages if isinstance(vintages, Vintages) else Vintages.from_frame(vintages)
    usable = v.available
    issued_na = v.issued == _NAT
    has_issue = form == "forecast" and not bool(issued_na.all())
    if has_issue:
        # a forecast is usable from its issue (and not before the store says it was available)
        usable = np.maximum(np.where(issued_na, v.available, v.issued), usable)
    vp = v.period
    uniq = np.unique(vp)
    vcode = np.searchsorted(uniq, vp)
    rp = _ns(periods)
    o_ns = _ns(origins)
    rcode = np.searchsorted(uniq, rp)
    found = (rcode < uniq.size) & (uniq[np.minimum(rcode, uniq.size - 1)] == rp)
    base = int(min(usable.min(), o_ns.min())) - 10**9
    vkey = _keys(vcode, usable, base, up=True)
    order = np.argsort(vkey, kind="stable")
    vkey_s = vkey[order]
    vals = v.value[order]
    rkey = _keys(rcode, o_ns, base, up=False)
    pos = np.searchsorted(vkey_s, rkey, side="right") - 1
    ok = found & (pos >= 0)
    ok[ok] &= (vkey_s[pos[ok]] // _SHIFT) == rcode[ok]
    out[ok] = vals[pos[ok]]
    if form in ("known", "forecast"):
        missing = np.isnan(out) & found
        if missing.any():
            plain = np.ones(len(v), bool) if not has_issue else issued_na
            # the first plan stored for each period (earliest usable-from among the plain values)
            cand = np.flatnonzero(plain)
            if cand.size:
                c_order = cand[np.lexsort((usable[cand], vcode[cand]))]
                first_code, first_at = np.unique(vcode[c_order], return_index=True)
                first_val = v.value[c_order[first_at]]
                k = np.searchsorted(first_code, rcode[missing])
                hit = (k < first_code.size) & (first_code[np.minimum(k, first_code.size - 1)] == rcode[missing])
                fill = np.full(int(missing.sum()), np.nan)
                fill[hit] = first_val[k[hit]]
                out[np.flatnonzero(missing)] = fill
    return out


def _ns(values: Any) -> np.ndarray:
    """int64 nanoseconds as they are, anything else through :func:`as_ns`."""
    if isinstance(values, np.ndarray) and values.dtype == np.int64:
        return values
    return as_ns(values)


def latest_values(vintages: pd.DataFrame | Vintages, periods: pd.DatetimeIndex | np.ndarray) -> np.ndarray:
    """Latest known vintage of each period (the 'final' data): the one with the latest available_at
    (``vintages`` a frame or :class:`Vintages`; ``periods`` datetime-like or int64 nanoseconds)."""
    out = np.full(len(periods), np.nan)
    if len(vintages) == 0 or len(periods) == 0:
        return out
    v = vintages if isinstance(vintages, Vintages) else Vintages.from_frame(vintages)
    vp = v.period
    order = np.lexsort((np.arange(len(vp)), v.available, vp))  # by period, then time, then row order
    vp_s = vp[order]
    last = np.r_[vp_s[1:] != vp_s[:-1], True]  # last row of each period
    per = vp_s[last]
    val = v.value[order][last]
    rp = _ns(periods)
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


def build_design(cfg: Config, model: ModelConfig, obs: pd.DataFrame | Mapping[str, Vintages],
                 as_of: pd.Timestamp, *, horizon: int = 1, lags: Mapping[str, int] | None = None,
                 drop: tuple[str, ...] = ()) -> Design:
    """The model's design as it could have been built at each origin up to ``as_of``.

    Parameters
    ----------
    obs : all vintages (columns series, period, issued_at, value, available_at) of the model's series
        known by ``as_of``; or those already converted, series name -> :class:`Vintages` (a
        :class:`SeriesVintages` of them, for one: the same design without converting the frame again).
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
    by_series = SeriesVintages(obs) if isinstance(obs, pd.DataFrame) else obs
    empty = _empty_vintages()
    tgt = by_series.get(model.target, empty)
    at_ns = pd.Timestamp(as_of).value  # ns since the epoch (UTC when tz-aware), as as_ns gives
    known = (tgt.available != _NAT) & (tgt.available <= at_ns)
    known_tgt = tgt if known.all() else tgt.take(known)
    if len(known_tgt) == 0:
        raise InsufficientDataError(f"model '{model.name}': target '{model.target}'", 1, 0,
                                    "no target values are known at this date; run `drift ingest` first")
    last = pd.Timestamp(int(known_tgt.period.max()), unit="ns").as_unit(known_tgt.period_unit)
    g = _grid(f, week_anchor(model), ref_start, ref_start.unit, max(last, ref_end), max(last, ref_end).unit)
    periods = g.periods
    n_ref = g.n_ref(ref_end)
    y = latest_values(known_tgt, g.ns)
    origins = g.shifted(horizon - 1)  # the origin of row t (UTC), as int64 ns
    det, names = g.deterministic(model, n_ref)
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
        x = values_as_of(by_series.get(d.series, empty), g.shifted(lag), origins, d.form)
        if stl:
            x = x - _stl_profile(x, n_ref, s, spos, snpos)  # type: ignore[arg-type]
        cols.append(x[:, None])
        names.append(f"{d.series}[L{lag}]" if lag else d.series)
        driver_columns[d.series] = k
        used_lags[d.series] = lag
        k += 1
    for j in model.target_lags:
        x = values_as_of(tgt, g.shifted(j), origins, "lagged")
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


def build_designs(cfg: Config, models: Sequence[ModelConfig], table: SeriesVintages,
                  as_of: pd.Timestamp) -> dict[str, Design]:
    """The one-step designs (:func:`build_design`) of many models at once, their as-of selections done
    together in a few sorted searches over the whole ``table`` instead of a few per model.

    Returns the designs it could build, by model name: a model it leaves out (a missing series, no target
    value known, a reference period without values, STL seasonal adjustment, a series read twice) is for
    :func:`build_design`, which builds it or says why not. When the times of ``table`` are not all whole
    seconds (or span more than a century) it builds none: the rounding of :func:`values_as_of` would then
    depend on each selection's own time base.
    """
    v = table._all
    at_ns = pd.Timestamp(as_of).value
    todo = []
    for m in models:
        read = m.read_series
        if (len(set(read)) != len(read) or not all(x in table for x in read[:1 + len(m.drivers)])
                or (m.preprocess.method == "stl" and _season_length(m) is not None)):
            continue
        todo.append(m)
    if (not todo or len(v) == 0 or table._starts[0] > 0 or bool(np.any(v.available == _NAT))
            or bool(np.any(v.period == _NAT))):
        return {}  # rows without a series name or a time: build_design copes
    sec = np.int64(10**9)
    if bool(np.any(v.available % sec)):
        return {}
    # the last target period known at as_of, per series
    known = v.available <= at_ns
    heads = table._starts[:-1][np.diff(table._starts) > 0]
    last_known = np.maximum.reduceat(np.where(known, v.period, _NAT), heads) if heads.size else heads
    series_last = dict(zip((s for s, (a, b) in table._slices.items() if b > a), last_known.tolist()))
    # the requests: every model's target on its grid (lat_*), then its lagged drivers and target lags (req_*)
    plan = []
    grids: dict[tuple[Any, ...], tuple[_Grid, int]] = {}
    req_s: list[int] = []
    req_p: list[np.ndarray] = []
    req_o: list[np.ndarray] = []
    lat_s: list[int] = []
    lat_p: list[np.ndarray] = []
    index = table._index
    n_req = n_lat = 0
    for m in todo:
        last_ns = series_last.get(m.target, _NAT)
        if last_ns == _NAT:
            continue
        key = (m.frequency, m.reference.start, m.reference.end, last_ns)
        got = grids.get(key)
        if got is None:
            ref_start = pd.Timestamp(m.reference.start)
            ref_end = pd.Timestamp(m.reference.end)
            last = pd.Timestamp(last_ns, unit="ns").as_unit(v.period_unit)
            end = max(last, ref_end)
            g = _grid(m.frequency, week_anchor(m), ref_start, ref_start.unit, end, end.unit)
            got = grids[key] = (g, g.n_ref(ref_end))
        g, n_ref = got
        n = len(g.ns)
        origins = g.shifted(0)
        t_idx = index[m.target]
        lat_s.append(t_idx)
        lat_p.append(g.ns)
        cols = []
        for d in m.drivers:
            if d.form == "lagged":
                cols.append((d, d.lag, n_req))
                req_s.append(index[d.series])
                req_p.append(g.shifted(d.lag))
                req_o.append(origins)
                n_req += n
            else:
                cols.append((d, d.lag, None))
        tlags = []
        for j in m.target_lags:
            tlags.append((j, n_req))
            req_s.append(t_idx)
            req_p.append(g.shifted(j))
            req_o.append(origins)
            n_req += n
        plan.append((m, g, n_ref, n_lat, cols, tlags))
        n_lat += n
    if not plan:
        return {}
    rp = np.concatenate(req_p) if req_p else np.empty(0, np.int64)
    ro = np.concatenate(req_o) if req_o else np.empty(0, np.int64)
    rs = np.repeat(np.asarray(req_s, np.int64), [len(a) for a in req_p]) if req_p else np.empty(0, np.int64)
    if bool(np.any(ro % sec)):
        return {}
    base = int(min(v.available.min(), ro.min() if ro.size else v.available.min())) - 10**9
    top = int(max(v.available.max(), ro.max() if ro.size else v.available.max()))
    if (top - base) // 10**9 >= int(_SHIFT) - 1:
        return {}
    # (series, period) -> one code, ordered as the pairs are
    series_of = np.repeat(np.arange(len(table._starts) - 1), np.diff(table._starts))
    uniq_p = np.sort(pd.unique(v.period))
    n_p = uniq_p.size
    if (len(table._starts) - 1) * n_p >= 2**31:
        return {}
    pcode = np.searchsorted(uniq_p, v.period)
    vcode = series_of.astype(np.int64) * n_p + pcode
    vsec = (v.available - base) // 10**9
    vkey = vcode * _SHIFT + vsec
    if bool(np.all(vkey[1:] >= vkey[:-1])):  # already by series, period and time (the store's order)
        order = None
        vals = v.value
    else:
        order = np.lexsort((v.available, vcode))  # stable: stored order among equal times
        vkey = vkey[order]
        vals = v.value[order]
    out = np.full(rs.size, np.nan)
    if rs.size:
        rk = np.searchsorted(uniq_p, rp)
        found = (rk < n_p) & (uniq_p[np.minimum(rk, n_p - 1)] == rp)
        rcode = rs.astype(np.int64) * n_p + rk
        pos = np.searchsorted(vkey, rcode * _SHIFT + (ro - base) // 10**9, side="right") - 1
        ok = found & (pos >= 0)
        ok[ok] &= (vkey[pos[ok]] // _SHIFT) == rcode[ok]
        out[ok] = vals[pos[ok]]
    # the latest vintage known at as_of of each target period
    kn = known if order is None else known[order]
    kcode = (vcode if order is None else vcode[order])[kn]
    kval = vals[kn]
    is_last = np.r_[kcode[1:] != kcode[:-1], True] if kcode.size else np.empty(0, bool)
    per, per_val = kcode[is_last], kval[is_last]
    ls = np.repeat(np.asarray(lat_s, np.int64), [len(a) for a in lat_p])
    lp = np.concatenate(lat_p)
    lk = np.searchsorted(uniq_p, lp)
    lfound = (lk < n_p) & (uniq_p[np.minimum(lk, n_p - 1)] == lp)
    lcode = ls.astype(np.int64) * n_p + np.minimum(lk, n_p - 1)
    yall = np.full(ls.size, np.nan)
    if per.size:
        k = np.searchsorted(per, lcode)
        hit = lfound & (k < per.size) & (per[np.minimum(k, per.size - 1)] == lcode)
        yall[hit] = per_val[k[hit]]
    designs: dict[str, Design] = {}
    for m, g, n_ref, at, cols, tlags in plan:
        n = len(g.ns)
        y = yall[at:at + n]
        if not np.isfinite(y[:n_ref]).any():
            continue  # build_design says why
        try:
            det, names = g.deterministic(m, n_ref)
            xs = [det]
            driver_columns: dict[str, int] = {}
            used_lags: dict[str, int] = {}
            for d, lag, start in cols:
                x = (out[start:start + n] if start is not None
                     else values_as_of(table[d.series], g.shifted(lag), g.shifted(0), d.form))
                driver_columns[d.series] = len(names)
                used_lags[d.series] = lag
                xs.append(x[:, None])
                names.append(f"{d.series}[L{lag}]" if lag else d.series)
            for j, start in tlags:
                xs.append(out[start:start + n, None])
                names.append(f"{m.target}[L{j}]")
            designs[m.name] = Design(model=m.name, periods=g.periods, y=y.astype(float),
                                     X=np.column_stack(xs).astype(float), columns=names,
                                     driver_columns=driver_columns, n_ref=n_ref,
                                     deterministic=list(range(det.shape[1])), lags=used_lags,
                                     season_length=_season_length(m))
        except Exception:  # noqa: BLE001, S112 - left to build_design, which fails this model alone
            continue
    return designs


class _Grid:
    """One period grid (:func:`period_index`) and what every design on it shares: the grid shifted by a
    number of periods (int64 ns), the reference length for a reference end, the deterministic columns for
    a preprocessing. Cached (:func:`_grid`): the models of a check mostly share their grid. Read only."""

    def __init__(self, freq: str, periods: pd.DatetimeIndex) -> None:
        self.freq = freq
        self.periods = periods
        self.ns = self._frozen(as_ns(periods))
        self._shifted: dict[int, np.ndarray] = {0: self.ns}
        self._n_ref: dict[pd.Timestamp, int] = {}
        self._det: dict[tuple[Any, ...], tuple[np.ndarray, list[str]]] = {}

    @staticmethod
    def _frozen(a: np.ndarray) -> np.ndarray:
        a = np.array(a, copy=True)
        a.flags.writeable = False
        return a

    def shifted(self, lag: int) -> np.ndarray:
        """:func:`shift_periods` of the grid by ``lag``, as int64 ns."""
        got = self._shifted.get(lag)
        if got is None:
            got = self._shifted[lag] = self._frozen(as_ns(shift_periods(self.periods, self.freq, lag)))
        return got

    def n_ref(self, ref_end: pd.Timestamp) -> int:
        got = self._n_ref.get(ref_end)
        if got is None:
            got = self._n_ref[ref_end] = int((self.periods <= ref_end).sum())
        return got

    def deterministic(self, model: ModelConfig, n_ref: int) -> tuple[np.ndarray, list[str]]:
        """:func:`deterministic_columns` (a read-only array and a fresh list of names)."""
        key = (model.frequency, model.preprocess, n_ref)
        got = self._det.get(key)
        if got is None:
            det, names = deterministic_columns(model, self.periods, n_ref)
            got = self._det[key] = (self._frozen(det), names)
        return got[0], list(got[1])


@lru_cache(maxsize=64)
def _grid(freq: str, anchor: int, start: pd.Timestamp, start_unit: str, end: pd.Timestamp,
          end_unit: str) -> _Grid:
    """The :class:`_Grid` of :func:`period_index` (units are part of the key: they set the grid's)."""
    return _Grid(freq, _period_range(freq, anchor, start, end))


def next_due(last_period: pd.Timestamp, freq: str, delay: timedelta) -> pd.Timestamp:
    """When the value after ``last_period`` is due: the end of the next period plus the delay (UTC)."""
    return (next_period(pd.Timestamp(last_period), freq, 2) + pd.Timedelta(delay)).tz_localize("UTC")
