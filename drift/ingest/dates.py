"""Dates of a batch: periods and available / issued times, parsed without guessing.

Periods (the ``period_column``)
-------------------------------
- With ``period_format`` set, every period is read with it (``strftime`` codes such as ``%d/%m/%Y``), or as
  spreadsheet serial day numbers with ``period_format: excel`` (days since 1899-12-30, the 1900 date system
  from March 1900 on). A value that does not fit is quarantined.
- Without it, a period is read only where one reading is certain: ISO 8601 (``2024-03-04``, ``20240304``,
  ``2024-03``, with or without a time), year first with ``/`` or ``.`` (``2024/03/04``), a quarter
  (``2024Q1``) or a month written out (``4 March 2024``, with a four-digit year). Day-month-year numbers
  (``04/03/2024``, ``04.03.24``) are read day first or month first only when that reading is the only one
  that fits *every* such period of the batch; a batch where both fit (every day <= 12) or where rows need
  different readings is refused before anything is stored (:class:`~drift.exceptions.InputError` naming the
  file, a row, its two readings and the key that resolves it). A batch whose periods are all plain numbers
  (serial day numbers?) is refused the same way; a stray number among dates is quarantined.

Available and issued times
--------------------------
ISO 8601 only (``2024-03-04T09:30:00Z``; naive times are UTC); anything else is quarantined.

Range
-----
Periods and times from :data:`EARLIEST` to :data:`LATEST` are stored; a date outside (a year 9999 or 0001
placeholder) is quarantined with a reason that says so.

Everything works on the *distinct* raw values of a column: Python loops run over distinct dates, never over
cells.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Sequence
from datetime import date, datetime
from enum import IntEnum

import numpy as np
import pandas as pd

from drift.config import DATE_RANGE
from drift.exceptions import InputError

log = logging.getLogger(__name__)

#: the earliest and latest dates stored: :data:`drift.config.DATE_RANGE` (nanosecond timestamps end in 2262;
#: this leaves room for period ends and publication delays)
EARLIEST = pd.Timestamp(DATE_RANGE[0])
LATEST = pd.Timestamp(DATE_RANGE[1]) + pd.Timedelta(days=1) - pd.Timedelta(microseconds=1)
#: ``period_format`` value for spreadsheet serial day numbers
SERIAL_FORMAT = "excel"
#: day zero of spreadsheet serial day numbers (1900 date system, valid from 1900-03-01 on)
SERIAL_EPOCH = pd.Timestamp("1899-12-30")

_NAT = np.iinfo(np.int64).min
_DMY = re.compile(r"^(\d{1,2})([/.\-])(\d{1,2})\2(\d{4}|\d{2})$")
_YMD = re.compile(r"^(\d{4})([/.])(\d{1,2})\2(\d{1,2})$")
_QUARTER = re.compile(r"^(\d{4})\s*-?\s*[Qq]([1-4])$")
_ISO_DIGITS = re.compile(r"^\d{4}$|^\d{8}$")
_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_ISO_START = re.compile(r"^[+-]?\d{4}(-\d{2}(-\d{2})?|\d{4})?([T ]|$)")
_HAS_YEAR = re.compile(r"\d{4}")
_HAS_LETTER = re.compile(r"[A-Za-z]")


class Problem(IntEnum):
    """Why a distinct raw value has no date (codes per value; 0 = fine)."""

    OK = 0
    NOT_A_DATE = 1
    OUT_OF_RANGE = 2
    NUMBER = 3


def describe_range() -> str:
    return f"{EARLIEST:%Y-%m-%d} to {LATEST:%Y-%m-%d}"


def cell_text(v: object) -> str:
    """A raw cell as text ('' for a null), as it is shown in messages and quarantine records."""
    if v is None or v is pd.NA or v is pd.NaT:
        return ""
    if isinstance(v, (pd.Timestamp, datetime)):
        return v.isoformat()
    return str(v)


def _is_number(v: object) -> bool:
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)


def _in_range(ts: pd.Timestamp) -> bool:
    return bool(EARLIEST <= ts <= LATEST)


def _to_naive(ts: pd.Timestamp, *, utc: bool) -> pd.Timestamp:
    """UTC wall time (``utc``) or the value's own wall date (periods), without a zone."""
    if ts.tzinfo is None:
        return ts
    return ts.tz_convert("UTC").tz_localize(None) if utc else ts.tz_localize(None)


def _store(out: np.ndarray, problem: np.ndarray, i: int, ts: object, *, utc: bool) -> None:
    """Put one parsed value (a Timestamp, a datetime or NaT) into the outputs, checking the range."""
    if ts is None or ts is pd.NaT or (isinstance(ts, float) and np.isnan(ts)):
        problem[i] = Problem.NOT_A_DATE
        return
    try:
        t = _to_naive(pd.Timestamp(ts), utc=utc)  # type: ignore[arg-type]
    except (ValueError, OverflowError):
        problem[i] = Problem.OUT_OF_RANGE
        return
    if not _in_range(t):
        problem[i] = Problem.OUT_OF_RANGE
        return
    out[i] = t.as_unit("ns").value
    problem[i] = Problem.OK


def _out_of_range_text(text: str, fmt: str | None) -> bool:
    """Whether a value pandas could not parse is a date after all, just outside pandas' range."""
    try:
        if fmt is not None:
            datetime.strptime(text, fmt)
        else:
            datetime.fromisoformat(text.replace("Z", "+00:00"))
        return True
    except (ValueError, OverflowError):
        return False


def _parse_vectorised(texts: list[str], idx: list[int], fmt: str, out: np.ndarray, problem: np.ndarray, *,
                      utc: bool, strptime_fmt: str | None) -> None:
    """Parse ``texts`` (positions ``idx``) with one pandas format; per value where that fails as a whole."""
    if not texts:
        return
    try:
        parsed = list(pd.to_datetime(pd.Index(texts, dtype=object), format=fmt, errors="coerce", utc=utc))
    except (ValueError, TypeError, OverflowError):  # e.g. mixed UTC offsets without utc
        parsed = []
        for t in texts:
            try:
                parsed.append(pd.to_datetime(t, format=fmt, utc=utc))
            except (ValueError, TypeError, OverflowError):
                parsed.append(pd.NaT)
    for i, t, ts in zip(idx, texts, parsed, strict=True):
        _store(out, problem, i, ts, utc=utc)
        if problem[i] == Problem.NOT_A_DATE and _out_of_range_text(t, strptime_fmt):
            problem[i] = Problem.OUT_OF_RANGE


def parse_times(values: Sequence[object]) -> tuple[np.ndarray, np.ndarray]:
    """Available / issued times: ISO 8601 text or typed datetimes, as naive-UTC nanoseconds.

    Returns
    -------
    (ns, problem) : int64 nanoseconds since the epoch (NaT sentinel where there is none) and a
        :class:`Problem` code per value.
    """
    n = len(values)
    out = np.full(n, _NAT, dtype=np.int64)
    problem = np.zeros(n, dtype=np.int8)
    texts, idx = [], []
    for i, v in enumerate(values):
        if isinstance(v, (pd.Timestamp, datetime, date, np.datetime64)):
            _store(out, problem, i, v, utc=True)
            continue
        t = cell_text(v).strip()
        if _is_number(v) or not _ISO_START.match(t):
            problem[i] = Problem.NOT_A_DATE
            continue
        texts.append(t)
        idx.append(i)
    _parse_vectorised(texts, idx, "ISO8601", out, problem, utc=True, strptime_fmt=None)
    return out, problem


def parse_periods(values: Sequence[object], first_rows: Sequence[int], fmt: str | None, *, label: str,
                  column: str, source: str) -> tuple[np.ndarray, np.ndarray]:
    """Periods as naive wall-date nanoseconds, reading day/month order only where it is certain.

    Parameters
    ----------
    values : the distinct raw values of the period column (text, or typed values from Parquet / SQL).
    first_rows : the row number where each value first occurs (for messages).
    fmt : the source's ``period_format`` (None: detect, see the module docstring).
    label, column, source : file label, period column and source name, for messages.

    Returns
    -------
    (ns, problem) : int64 nanoseconds (NaT sentinel where there is none) and a :class:`Problem` per value.

    Raises
    ------
    InputError
        when the day/month order of the batch is ambiguous or mixed, or every period is a plain number and
        ``period_format`` does not say how to read it.
    """
    n = len(values)
    out = np.full(n, _NAT, dtype=np.int64)
    problem = np.zeros(n, dtype=np.int8)
    if fmt == SERIAL_FORMAT:
        for i, v in enumerate(values):
            _serial(v, i, out, problem)
        return out, problem
    if fmt is not None:
        texts, idx = [], []
        for i, v in enumerate(values):
            if isinstance(v, (pd.Timestamp, datetime, date, np.datetime64)):
                _store(out, problem, i, v, utc=False)
            else:
                texts.append(cell_text(v).strip())
                idx.append(i)
        _parse_vectorised(texts, idx, fmt, out, problem, utc=False, strptime_fmt=fmt)
        return out, problem

    iso_t, iso_i = [], []
    dmy: list[tuple[int, re.Match[str]]] = []
    numbers: list[int] = []
    for i, v in enumerate(values):
        if isinstance(v, (pd.Timestamp, datetime, date, np.datetime64)):
            _store(out, problem, i, v, utc=False)
            continue
        t = cell_text(v).strip()
        if _is_number(v) or (_NUMBER.match(t) and not _ISO_DIGITS.match(t)):
            numbers.append(i)
            problem[i] = Problem.NUMBER
        elif m := _DMY.match(t):
            dmy.append((i, m))
        elif m := _YMD.match(t):
            _store(out, problem, i, _safe_date(int(m.group(1)), int(m.group(3)), int(m.group(4))), utc=False)
        elif m := _QUARTER.match(t):
            _store(out, problem, i, _safe_date(int(m.group(1)), 3 * int(m.group(2)) - 2, 1), utc=False)
        elif _ISO_START.match(t):
            iso_t.append(t)
            iso_i.append(i)
        elif _HAS_LETTER.search(t) and _HAS_YEAR.search(t):
            try:  # a month written out, with a four-digit year: one reading only
                _store(out, problem, i, pd.Timestamp(t), utc=False)
            except (ValueError, OverflowError):
                problem[i] = Problem.NOT_A_DATE
        else:
            problem[i] = Problem.NOT_A_DATE
    _parse_vectorised(iso_t, iso_i, "ISO8601", out, problem, utc=False, strptime_fmt=None)
    if numbers and len(numbers) == n:
        i = min(numbers, key=lambda k: first_rows[k])
        raise InputError(
            f"the periods are plain numbers, such as '{cell_text(values[i]).strip()}' (spreadsheet serial day "
            f"numbers?); drift does not guess what they mean: set period_format: {SERIAL_FORMAT} on source "
            f"'{source}' to read them as days since {SERIAL_EPOCH:%Y-%m-%d}, or write the periods as ISO dates "
            "(2024-03-04). Nothing of this file was stored", file=label, row=int(first_rows[i]), column=column)
    if dmy:
        _day_month(dmy, first_rows, out, problem, label=label, column=column, source=source)
    return out, problem


def _safe_date(y: int, m: int, d: int) -> datetime | None:
    try:
        return datetime(y, m, d)
    except ValueError:
        return None


def _serial(v: object, i: int, out: np.ndarray, problem: np.ndarray) -> None:
    t = cell_text(v).strip()
    try:
        x = float(v) if _is_number(v) else float(t)  # type: ignore[arg-type]
    except ValueError:
        problem[i] = Problem.NOT_A_DATE
        return
    if not np.isfinite(x) or x < 1:
        problem[i] = Problem.NOT_A_DATE
        return
    if x > (LATEST - SERIAL_EPOCH).days + 1:
        problem[i] = Problem.OUT_OF_RANGE
        return
    _store(out, problem, i, SERIAL_EPOCH + pd.Timedelta(days=int(np.floor(x))), utc=False)


def _year(text: str) -> int:
    y = int(text)
    if len(text) == 2:  # the strptime %y rule: 69-99 -> 1969-1999, 00-68 -> 2000-2068
        y += 1900 if y >= 69 else 2000
    return y


def _formats(m: re.Match[str]) -> tuple[str, str]:
    sep, y = m.group(2), "%Y" if len(m.group(4)) == 4 else "%y"
    return f"%d{sep}%m{sep}{y}", f"%m{sep}%d{sep}{y}"


def _day_month(dmy: list[tuple[int, re.Match[str]]], first_rows: Sequence[int], out: np.ndarray,
               problem: np.ndarray, *, label: str, column: str, source: str) -> None:
    """Read day-month-year numbers in the one order that fits every one of them, or refuse the batch."""
    dm, md = [], []
    for _, m in dmy:
        a, b, y = int(m.group(1)), int(m.group(3)), _year(m.group(4))
        dm.append(_safe_date(y, b, a))
        md.append(_safe_date(y, a, b))
    only_dm = [k for k in range(len(dmy)) if dm[k] is not None and md[k] is None]
    only_md = [k for k in range(len(dmy)) if md[k] is not None and dm[k] is None]

    def row(k: int) -> int:
        return int(first_rows[dmy[k][0]])

    def first(ks: list[int]) -> int:
        return min(ks, key=row)

    if only_dm and only_md:
        a, b = first(only_dm), first(only_md)
        fd, fm = _formats(dmy[a][1])
        raise InputError(
            f"the periods need different readings: row {row(a)} '{dmy[a][1].group(0)}' can only be day first "
            f"and row {row(b)} '{dmy[b][1].group(0)}' can only be month first. Nothing of this file was "
            f"stored; correct the file, or set period_format on source '{source}' ('{fd}' or '{fm}'; periods "
            "that do not fit it are quarantined)", file=label, row=min(row(a), row(b)), column=column)
    if only_dm or only_md:
        chosen = dm if only_dm else md
        k = first(only_dm or only_md)
        log.info("%s: periods read %s first over the whole file (row %d '%s' has no other reading)", label,
                 "day" if only_dm else "month", row(k), dmy[k][1].group(0))
    else:
        differ = [k for k in range(len(dmy)) if dm[k] is not None and dm[k] != md[k]]
        if differ:
            k = first(differ)
            fd, fm = _formats(dmy[k][1])
            raise InputError(
                f"period '{dmy[k][1].group(0)}' reads as {dm[k]:%Y-%m-%d} (day first) or as {md[k]:%Y-%m-%d} "
                "(month first), and every period of this file fits both readings; drift does not guess. "
                f"Nothing of this file was stored: set period_format on source '{source}' to '{fd}' (day "
                f"first) or '{fm}' (month first)", file=label, row=row(k), column=column)
        chosen = dm
    for k, (i, _) in enumerate(dmy):
        _store(out, problem, i, chosen[k], utc=False)
