"""Freshness: each series' arrivals → late feeds.

Takes a model's context (its observations with their ``available_at`` times, the drivers' forms and
delays); gives ``charts['feeds']`` (per series: the recent periods and when each first arrived, the next
due time, late or not), the set of late series (``c.late``, read by the lag-drift stage) and a
``data-late`` action per late feed, with the number of periods missing. A lagged feed is late when its
next period was due by the check's moment; a forecast or planned driver when the forecast of the current
period had to be made without it.
"""

from __future__ import annotations

from datetime import timedelta
from functools import lru_cache
from typing import Any

import numpy as np
import pandas as pd

from drift.checking.context import _Ctx
from drift.config import next_period, period_start
from drift.panel import as_ns, next_due, period_index, shift_periods, week_anchor
from drift.verdicts import Action

_NO_NS = np.empty(0, np.int64)


def _freshness(c: _Ctx) -> None:
    m, d = c.model, c.design
    # each series' periods and availability times as int64 ns (the first vintage of each period is shown),
    # from the arrays the design stage made (else from the frame); the chart's dates are written in one call
    # per column for all the feeds
    arrays = _series_arrays(c)
    start_ns = pd.Timestamp(d.periods[max(0, d.n - 26)]).as_unit("ns").value
    as_of = pd.Timestamp(c.as_of)
    feeds: list[tuple[str, np.ndarray, np.ndarray, dict[str, Any]]] = []
    limit = c.cfg.check.feed_limit
    for s in m.series:
        dr = next((x for x in m.drivers if x.series == s), None)
        if dr is not None and dr.form != "lagged":
            feeds.append(_forward_feed(c, dr, *arrays.get(dr.series, (_NO_NS, _NO_NS))))
            continue
        delay = c.cfg.driver_delay(m, dr) if dr else timedelta(0)
        got = arrays.get(s)
        if got is None or got[0].size == 0:
            continue
        per, at = got
        lp, lp_day, due, due_iso = _due(int(per.max()), m.frequency, delay)
        late = bool(as_of > due)
        first = _first_arrivals(per, at, start_ns)
        feeds.append((s, per[first], at[first], {"next_due": due_iso, "late": late, "last_period": lp_day}))
        if late:
            c.late.add(s)
            missing = _periods_between(lp, as_of, m.frequency, delay)
            role = "target" if s == m.target else "driver"
            reason = (f"The {role} feed '{s}' is late: its last value is for the period starting "
                      f"{lp_day}, and the next was due by {due.strftime('%Y-%m-%d %H:%M')} UTC "
                      f"({missing} period{'s' if missing != 1 else ''} missing).")
            if missing > limit and role == "driver":
                reason += f" It has been missing for more than {limit} periods."
            c.actions.append(Action("data-late", reason=reason,
                                    extra={"driver": s, "last_period": lp_day,
                                           "missing_periods": int(missing), "next_due": due_iso, "role": role,
                                           **({"feed_limit": limit} if missing > limit else {})}))
    c.charts["feeds"] = _feed_charts(feeds)


def _series_arrays(c: _Ctx) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Series -> (period, available_at) as int64 ns, rows in their stored order: ``c.vintages`` when the
    design stage left them, else read from ``c.obs``."""
    if c.vintages is not None:
        return {s: (v.period, v.available) for s, v in c.vintages.items()}
    known = c.obs
    per_ns, at_ns = _ns(known["period"]), _ns(known["available_at"])
    return {s: (per_ns[r], at_ns[r]) for s, r in _rows_by_series(known["series"]).items()}


def _rows_by_series(col: pd.Series) -> dict[str, np.ndarray]:
    """Row positions of each series (stored order), from one pass over the column (Arrow's dictionary
    encoding for Arrow strings: no Python string per row)."""
    arr = col.array
    if hasattr(arr, "__arrow_array__"):
        import pyarrow as pa
        import pyarrow.compute as pc

        chunked = arr.__arrow_array__()
        enc = pc.dictionary_encode(chunked.combine_chunks() if isinstance(chunked, pa.ChunkedArray) else chunked)
        codes = enc.indices.fill_null(-1).to_numpy(zero_copy_only=False)
        names = enc.dictionary.to_pylist()
    else:
        codes, uniq = pd.factorize(col.to_numpy(dtype=object), use_na_sentinel=True)
        names = list(uniq)
    order = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[order], np.arange(len(names) + 1))
    return {str(n): order[bounds[j]:bounds[j + 1]] for j, n in enumerate(names) if bounds[j + 1] > bounds[j]}


def _ns(col: pd.Series) -> np.ndarray:
    """A datetime column as int64 ns (UTC for aware ones; NaT -> min int64), as :func:`drift.panel.as_ns`
    gives it, without building an index (a few µs instead of a hundred)."""
    arr = col.array
    if isinstance(arr, pd.arrays.DatetimeArray):
        i8 = np.asarray(arr.asi8)
        scale = {"s": 10 ** 9, "ms": 10 ** 6, "us": 10 ** 3, "ns": 1}[arr.unit]
        if scale == 1:
            return i8
        nat = i8 == np.iinfo(np.int64).min
        return np.where(nat, i8, i8 * scale)
    return as_ns(col)


@lru_cache(maxsize=4096)
def _due(last_ns: int, freq: str, delay: timedelta) -> tuple[pd.Timestamp, str, pd.Timestamp, str]:
    """(last period, its ISO date, when the next value is due, its ISO form): most feeds of a check share
    their last period, so each is worked out once."""
    lp = pd.Timestamp(last_ns)
    due = next_due(lp, freq, delay)
    return lp, lp.date().isoformat(), due, due.isoformat()


def _first_arrivals(per: np.ndarray, at: np.ndarray, start_ns: int) -> np.ndarray:
    """The rows of a feed's chart: for each period from ``start_ns`` on, its first arrival."""
    recent = np.flatnonzero(per >= start_ns)
    if recent.size == 0:
        return recent
    recent = recent[np.lexsort((at[recent], per[recent]))]
    p = per[recent]
    keep = np.empty(p.size, bool)
    keep[0] = True
    np.not_equal(p[1:], p[:-1], out=keep[1:])
    return recent[keep]


def _feed_charts(feeds: list[tuple[str, np.ndarray, np.ndarray, dict[str, Any]]]) -> dict[str, Any]:
    """``charts['feeds']``: per series its chart's periods and first arrival times (ISO), then the rest."""
    per = np.concatenate([f[1] for f in feeds]) if feeds else _NO_NS
    at = np.concatenate([f[2] for f in feeds]) if feeds else _NO_NS
    days, times = _iso(per, "D"), _iso(at, "s")
    out: dict[str, Any] = {}
    i = 0
    for s, p, _a, rest in feeds:
        out[s] = {"periods": days[i:i + p.size], "available_at": times[i:i + p.size], **rest}
        i += p.size
    return out


#: ISO texts of the dates and times the feeds' charts show, one str object per distinct value: the feeds of a
#: check repeat the same few hundred dates (each its own string cost ~10 MB per 1,000 models held until the
#: verdicts are saved); cleared when it grows past :data:`_ISO_MAX`
_ISO: dict[str, dict[int, str]] = {"D": {}, "s": {}}
_ISO_MAX = 100_000


def _iso(values: np.ndarray, unit: str) -> list[str]:
    """int64 ns -> ISO dates (``unit`` "D") or UTC times to the second (``unit`` "s", with ``+00:00``)."""
    known = _ISO[unit]
    if len(known) > _ISO_MAX:
        known.clear()
    keys = values.tolist()
    out = [known.get(k) for k in keys]
    miss = [j for j, t in enumerate(out) if t is None]
    if miss:
        texts = np.datetime_as_string(values[miss].astype("datetime64[ns]"), unit=unit).tolist()
        for j, t in zip(miss, texts, strict=True):
            out[j] = known.setdefault(keys[j], t if unit == "D" else t + "+00:00")
    return out  # type: ignore[return-value]


def _forward_feed(c: _Ctx, dr: Any, per: np.ndarray, at: np.ndarray
                  ) -> tuple[str, np.ndarray, np.ndarray, dict[str, Any]]:
    """A forecast or planned driver is late when the forecast of the current period had to be made
    without it: no forecast (or plan) of the period it needs was stored by the check's moment. ``per``,
    ``at``: the driver's periods and availability times (ns). Returns the feed's chart (series, its
    periods and first arrival times, the other fields)."""
    m = c.model
    cur, need, need_ns, start_ns = _forward_periods(pd.Timestamp(c.as_of), m.frequency, week_anchor(m), dr.lag)
    last = pd.Timestamp(int(per.max())) if per.size else None
    late = not bool(np.any(per == need_ns))
    kind = "forecast" if dr.form == "forecast" else "plan"
    if late:
        c.late.add(dr.series)
        covers = f"its latest {kind} covers the period starting {last.date().isoformat()}" if last is not None \
            else f"no {kind} of it is stored at all"
        # the periods it should have covered by now and does not: after its last one up to the one needed
        missing = len(period_index(m, last, need)) - 1 if last is not None and last < need else 1
        limit = c.cfg.check.feed_limit
        what = "that same period" if need == cur else f"the period starting {need.date().isoformat()}"
        c.actions.append(Action("data-late", extra={
            "driver": dr.series, "last_period": last.date().isoformat() if last is not None else None,
            "missing_periods": int(missing), "next_due": cur.tz_localize("UTC").isoformat(), "role": "driver",
            **({"feed_limit": limit} if missing > limit else {})}, reason=(
                f"The {kind} feed '{dr.series}' is late: the forecast of the period starting "
                f"{cur.date().isoformat()} needed a {kind} of '{dr.series}' for {what}, and none had arrived; "
                f"{covers} ({missing} period{'s' if missing != 1 else ''} missing)."
                + (f" It has been missing for more than {limit} periods." if missing > limit else ""))))
    # the timeline of the chart: the periods of the last half year and when their first plan (forecast)
    # was stored, as for a lagged feed
    first = _first_arrivals(per, at, start_ns)
    return dr.series, per[first], at[first], {
        "next_due": cur.tz_localize("UTC").isoformat(), "late": late,
        "last_period": last.date().isoformat() if last is not None else None, "form": dr.form}


@lru_cache(maxsize=1024)
def _forward_periods(as_of: pd.Timestamp, freq: str, anchor: int, lag: int
                     ) -> tuple[pd.Timestamp, pd.Timestamp, int, int]:
    """(the period being forecast at ``as_of``, the period a driver at ``lag`` needs for it (and in ns),
    the start of the chart's half year in ns): the same for every driver of that frequency and lag."""
    moment = as_of - pd.Timedelta(microseconds=1)
    cur = period_start(moment.tz_convert("UTC").tz_localize(None), freq, week_anchor=anchor)
    need = shift_periods(pd.DatetimeIndex([cur]), freq, lag)[0]
    need_ns = int(as_ns(pd.DatetimeIndex([need]))[0])
    start_ns = int(as_ns(shift_periods(pd.DatetimeIndex([cur]), freq, 26))[0])
    return cur, need, need_ns, start_ns


def _periods_between(last: pd.Timestamp, as_of: pd.Timestamp, freq: str, delay: timedelta) -> int:
    """How many periods after ``last`` should have arrived by ``as_of``."""
    n = 0
    p = last
    while True:
        p = next_period(p, freq)
        due = (next_period(p, freq) + pd.Timedelta(delay)).tz_localize("UTC")
        if due >= as_of or n > 10000:
            return n
        n += 1
