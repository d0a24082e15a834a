"""Triggers in the schedule's time zone across daylight-saving changes.

Expected instants: EU summer time starts and ends at 01:00 UTC on the last Sunday of March and of October
(Directive 2000/84/EC); Europe/Lisbon is UTC+0 in winter, UTC+1 in summer (IANA tz database)."""

from __future__ import annotations

from datetime import date, datetime, timedelta, timezone
from zoneinfo import ZoneInfo

from drift.scheduler import build_trigger, count_fire_times

LISBON = ZoneInfo("Europe/Lisbon")


def _fires(text: str, start: datetime, end: datetime) -> list[datetime]:
    trig = build_trigger(text, LISBON, start=start)
    out, prev = [], None
    t = trig.get_next_fire_time(None, start)
    while t is not None and t < end:
        out.append(t)
        prev = t.astimezone(timezone.utc)  # UTC arithmetic: zone arithmetic drops `fold`
        t = trig.get_next_fire_time(prev, prev + timedelta(microseconds=1))
    return out


def _utc(*a: int) -> datetime:
    return datetime(*a, tzinfo=timezone.utc)  # type: ignore[misc]


def test_daily_cron_across_spring_forward_fires_once_a_day() -> None:
    fires = _fires("30 1 * * *", _utc(2026, 3, 27), _utc(2026, 4, 1))
    assert [f.astimezone(timezone.utc) for f in fires] == [
        _utc(2026, 3, 27, 1, 30), _utc(2026, 3, 28, 1, 30),
        _utc(2026, 3, 29, 1, 30),  # 01:30 local does not exist; fired at the pre-jump offset (02:30 WEST)
        _utc(2026, 3, 30, 0, 30), _utc(2026, 3, 31, 0, 30)]


def test_daily_cron_across_fall_back_fires_once_a_day() -> None:
    fires = _fires("30 1 * * *", _utc(2026, 10, 23), _utc(2026, 10, 28))
    assert [f.astimezone(timezone.utc) for f in fires] == [
        _utc(2026, 10, 23, 0, 30), _utc(2026, 10, 24, 0, 30),
        _utc(2026, 10, 25, 0, 30),  # first 01:30 (WEST); the repeated 01:30 WET is skipped
        _utc(2026, 10, 26, 1, 30), _utc(2026, 10, 27, 1, 30)]
    days = [f.astimezone(LISBON).date() for f in fires]
    assert days == [date(2026, 10, d) for d in range(23, 28)]


def test_hourly_cron_fires_each_wall_clock_hour_once() -> None:
    # 24 elapsed hours from 23:00Z; local 01:00 occurs twice that night and fires once (the first)
    fires = _fires("0 * * * *", _utc(2026, 10, 24, 23), _utc(2026, 10, 25, 23))
    local = [f.astimezone(LISBON).replace(tzinfo=None) for f in fires]
    assert len(fires) == 23 and len(set(local)) == 23  # 23:00Z..22:00Z is 24 h; 01:00 WET (01:00Z) skipped
    assert _utc(2026, 10, 25, 1) not in {f.astimezone(timezone.utc) for f in fires}


def test_interval_trigger_is_anchored_on_its_start() -> None:
    start = _utc(2026, 1, 1, 12)
    trig = build_trigger("every 10m", LISBON, start=start)
    assert trig.get_next_fire_time(None, _utc(2026, 1, 1, 12, 1)) == _utc(2026, 1, 1, 12, 10)
    assert count_fire_times(trig, start, _utc(2026, 1, 1, 13)) == (6, _utc(2026, 1, 1, 13))
