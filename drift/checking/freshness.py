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
from typing import Any

import numpy as np
import pandas as pd

from drift.checking.context import _Ctx
from drift.config import next_period, period_start
from drift.panel import as_ns, next_due, shift_periods, week_anchor
from drift.verdicts import Action


def _freshness(c: _Ctx) -> None:
    m, d, known = c.model, c.design, c.obs  # c.obs holds only this model's series
    # numpy views per series: period and available_at as int64 ns (first vintage of each period shown)
    ser = known["series"].to_numpy()
    per_ns = as_ns(known["period"])
    at_ns = as_ns(known["available_at"])
    start_ns = int(as_ns(d.periods[max(0, d.n - 26):][:1])[0])
    feeds: dict[str, Any] = {}
    limit = c.cfg.check.feed_limit
    for s in m.series:
        dr = next((x for x in m.drivers if x.series == s), None)
        if dr is not None and dr.form != "lagged":
            _forward_feed(c, dr, ser, per_ns, feeds)
            continue
        delay = c.cfg.driver_delay(m, dr) if dr else timedelta(0)
        rows = np.flatnonzero(ser == s)
        if rows.size == 0:
            continue
        lp = pd.Timestamp(int(per_ns[rows].max()))
        due = next_due(lp, m.frequency, delay)
        late = pd.Timestamp(c.as_of) > due
        recent = rows[per_ns[rows] >= start_ns]
        recent = recent[np.lexsort((at_ns[recent], per_ns[recent]))]
        first = recent[np.r_[True, per_ns[recent][1:] != per_ns[recent][:-1]]] if recent.size else recent
        feeds[s] = {"periods": np.datetime_as_string(per_ns[first].astype("datetime64[ns]"), unit="D").tolist(),
                    "available_at": [t + "+00:00" for t in np.datetime_as_string(
                        at_ns[first].astype("datetime64[ns]"), unit="s").tolist()],
                    "next_due": due.isoformat(), "late": bool(late), "last_period": lp.date().isoformat()}
        if late:
            c.late.add(s)
            missing = _periods_between(pd.Timestamp(lp), pd.Timestamp(c.as_of), m.frequency, delay)
            role = "target" if s == m.target else "driver"
            reason = (f"The {role} feed '{s}' is late: its last value is for the period starting "
                      f"{lp.date().isoformat()}, and the next was due by {due.strftime('%Y-%m-%d %H:%M')} UTC "
                      f"({missing} period{'s' if missing != 1 else ''} missing).")
            if missing > limit and role == "driver":
                reason += f" It has been missing for more than {limit} periods."
            c.actions.append(Action("data-late", reason=reason,
                                    extra={"driver": s, "last_period": lp.date().isoformat(),
                                           "missing_periods": int(missing),
                                           **({"feed_limit": limit} if missing > limit else {})}))
    c.charts["feeds"] = feeds


def _forward_feed(c: _Ctx, dr: Any, ser: np.ndarray, per_ns: np.ndarray, feeds: dict[str, Any]) -> None:
    """A forecast or planned driver is late when the forecast of the current period had to be made
    without it: no forecast (or plan) of the period it needs was stored by the check's moment."""
    m = c.model
    moment = pd.Timestamp(c.as_of) - pd.Timedelta(microseconds=1)
    cur = period_start(moment.tz_convert("UTC").tz_localize(None), m.frequency, week_anchor=week_anchor(m))
    need = shift_periods(pd.DatetimeIndex([cur]), m.frequency, dr.lag)[0]
    rows = np.flatnonzero(ser == dr.series)
    have = per_ns[rows]
    last = pd.Timestamp(int(have.max())) if have.size else None
    late = not bool(np.any(have == int(as_ns(pd.DatetimeIndex([need]))[0])))
    kind = "forecast" if dr.form == "forecast" else "plan"
    # the timeline of the chart: the periods of the last half year and when their first plan (forecast)
    # was stored, as for a lagged feed
    at_ns = as_ns(c.obs["available_at"])
    start_ns = int(as_ns(shift_periods(pd.DatetimeIndex([cur]), m.frequency, 26))[0])
    recent = rows[per_ns[rows] >= start_ns]
    recent = recent[np.lexsort((at_ns[recent], per_ns[recent]))]
    first = recent[np.r_[True, per_ns[recent][1:] != per_ns[recent][:-1]]] if recent.size else recent
    feeds[dr.series] = {"periods": np.datetime_as_string(per_ns[first].astype("datetime64[ns]"), unit="D").tolist(),
                        "available_at": [t + "+00:00" for t in np.datetime_as_string(
                            at_ns[first].astype("datetime64[ns]"), unit="s").tolist()],
                        "next_due": cur.tz_localize("UTC").isoformat(),
                        "late": late, "last_period": last.date().isoformat() if last is not None else None,
                        "form": dr.form}
    if late:
        c.late.add(dr.series)
        covers = f"its latest {kind} covers the period starting {last.date().isoformat()}" if last is not None \
            else f"no {kind} of it is stored at all"
        c.actions.append(Action("data-late", extra={
            "driver": dr.series, "last_period": last.date().isoformat() if last is not None else None,
            "missing_periods": 1}, reason=(
                f"The {kind} feed '{dr.series}' is late: the forecast for the period starting "
                f"{cur.date().isoformat()} needed its {kind} for the period starting {need.date().isoformat()}, "
                f"and none had arrived; {covers}.")))


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
