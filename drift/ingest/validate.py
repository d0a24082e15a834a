"""Validation of one batch: raw table in, good observations and quarantine records out.

A reader (:mod:`drift.ingest.csv`, :mod:`~drift.ingest.parquet`, :mod:`~drift.ingest.sql`) hands over a
:class:`RawTable` - the cells exactly as the source holds them, one row per data row. :func:`validate`
turns it into

- the *good* cells, one per observation: series, period (normalised to the period's first day), value,
  issued_at, an explicit available_at (from the source) and the default available_at (end of period plus
  the series delay); and
- the *quarantine* records: row, column, raw value and a reason in plain words.

Row numbers
-----------
Rows are numbered as the source shows them: for CSV the header is row 1 and the first data row is row 2
(the record number a spreadsheet shows; a quoted field spanning lines counts as one record); for Parquet
and SQL the first data row is row 1.

What is quarantined (and where the record points)
-------------------------------------------------
Whole-row problems - one record per data row, pointing at the period / available / issued column:
an empty or unparseable period, an unparseable available or issued time, a date outside the range drift
stores (how dates are read, and when a whole batch is refused instead: :mod:`drift.ingest.dates`). None of the row's values is
stored. A period that is not a period start of the series' frequency (or, with ``period_label: end``,
not a period end) - one record per row and frequency, naming the series concerned. Cell problems - one
record per cell, pointing at the value's column: non-numeric and non-finite values, an empty series name,
and keys (series, period[, issued_at]) that occur more than once in the batch (every copy is quarantined,
each reason lists the clashing rows). An empty cell is a missing observation: neither stored nor
quarantined. Everything here is vectorised over cells; Python loops run only over distinct periods and
over the (rare) bad records.
"""

from __future__ import annotations

import hashlib
import logging
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd

from drift.config import MAX_ABS_VALUE, MAX_NAME_LENGTH, Config, SourceConfig, next_period, period_start
from drift.exceptions import InputError
from drift.ingest import dates

log = logging.getLogger(__name__)

_WEEKDAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")
_NAN_SPELLINGS = frozenset({"nan", "+nan", "-nan", "na n"})
#: at most this many series names are spelled out in one quarantine reason
_NAMES_IN_REASON = 3
#: the sentinel used in place of a missing issued_at in integer merge keys
_NO_ISSUE = np.iinfo(np.int64).min

QUARANTINE_COLUMNS = ["row", "column", "raw_value", "reason"]
GOOD_COLUMNS = ["row", "series", "period", "issued_at", "value", "available_at", "default_available_at"]


@dataclass(frozen=True)
class RawTable:
    """The cells of one batch as the source holds them.

    Parameters
    ----------
    label : the file path (or ``sql:<source>`` for a query); used in messages and quarantine rows.
    content_hash : SHA-256 of the batch content (file bytes, or the query result).
    frame : one row per data row, the source's columns (strings for CSV; typed for Parquet and SQL).
    first_row : the number of the first data row (2 for CSV, whose header is row 1; 1 otherwise).
    empty : optional per-column masks, True where a cell is empty; for typed columns whose NaN is a value
        (Parquet keeps null and NaN apart). Columns not listed count as empty where null or blank text.
    unnamed : placeholder names of columns whose header was empty (their values are quarantined).
    """

    label: str
    content_hash: str
    frame: pd.DataFrame
    first_row: int = 1
    empty: Mapping[str, np.ndarray] = field(default_factory=dict)
    unnamed: frozenset[str] = frozenset()


@dataclass(frozen=True)
class SeriesRule:
    """How one series' periods are checked: frequency (None = unknown), week anchor, publication delay."""

    frequency: str | None
    week_anchor: int
    delay: timedelta


class SeriesRules:
    """Frequency, weekly anchor and delay of every series, resolved once per ingest.

    The frequency comes from the first model that uses the series (its weekly anchor is the weekday of that
    model's reference start), else from the source's ``frequency``; the delay is the largest driver delay
    any model sets for it, else the source's ``delay``.
    """

    def __init__(self, cfg: Config) -> None:
        self._freq = cfg.series_frequency()
        self._anchor: dict[str, int] = {}
        for m in cfg.models:
            for s in m.series:
                self._anchor.setdefault(s, m.reference.start.weekday())
        self._delays = cfg.series_delays()
        #: series some model uses as a forecast or known-in-advance driver (values for future periods)
        self.forward = frozenset(d.series for m in cfg.models for d in m.drivers if d.form != "lagged")

    def fingerprint(self) -> list[tuple[str, str | None, int, float]]:
        """(series, frequency, week anchor, delay in seconds) of every series the models name, sorted: what a
        change of which must make files be read again."""
        names = sorted(set(self._freq) | set(self._anchor) | set(self._delays) | set(self.forward))
        return [(s, self._freq.get(s), self._anchor.get(s, 0),
                 self._delays[s].total_seconds() if s in self._delays else -1.0) for s in names]

    def rule(self, series: str, source: SourceConfig) -> SeriesRule:
        freq = self._freq.get(series)
        anchor = self._anchor.get(series, 0) if freq is not None else 0
        if freq is None:
            freq = source.frequency
        return SeriesRule(freq, anchor, self._delays.get(series, source.delay))


@dataclass(frozen=True)
class FileBytes:
    """A source file read once: its bytes and their SHA-256 (for the already-ingested check)."""

    data: bytes
    digest: str


def read_file(path: Path) -> FileBytes:
    """Read a whole source file.

    Raises
    ------
    InputError : naming the file when it is missing or unreadable.
    """
    label = str(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise InputError("file not found", file=label) from None
    except OSError as exc:
        raise InputError(f"cannot read the file: {exc.strerror or exc}", file=label, unavailable=True) from None
    return FileBytes(data=data, digest=hashlib.sha256(data).hexdigest())


@dataclass(frozen=True)
class Validated:
    """Result of :func:`validate`: the good cells and the quarantine records (see the module docstring)."""

    good: pd.DataFrame
    quarantine: pd.DataFrame
    cells: int


# ----------------------------------------------------------------------------------------- helpers

_text = dates.cell_text


def _empty_mask(values: np.ndarray) -> np.ndarray:
    """True where a cell is null or an empty string (blank-only text is handled where it fails to parse)."""
    mask = np.asarray(pd.isna(values), dtype=bool)
    if values.dtype == object:
        with np.errstate(invalid="ignore"):
            mask |= np.asarray(values == "", dtype=bool)
    return mask


def _column_empty(raw: RawTable, column: str) -> np.ndarray:
    if column in raw.empty:
        return np.asarray(raw.empty[column], dtype=bool)
    return _empty_mask(raw.frame[column].to_numpy())


def _names(names: list[str]) -> str:
    quoted = [f"'{n}'" for n in names[:_NAMES_IN_REASON]]
    if len(names) > _NAMES_IN_REASON:
        return ", ".join(quoted) + f" and {len(names) - _NAMES_IN_REASON} more"
    if len(quoted) == 1:
        return quoted[0]
    return ", ".join(quoted[:-1]) + " and " + quoted[-1]


def _parse_row_dates(raw: RawTable, column: str, fmt: str | None, *, utc: bool, source: SourceConfig
                     ) -> tuple[pd.DatetimeIndex, np.ndarray, np.ndarray]:
    """(parsed values per data row, empty mask, :class:`~drift.ingest.dates.Problem` code per row).

    Periods come back naive (wall dates); available / issued times (``utc``) tz-aware UTC. Distinct raw
    values are parsed once (see :mod:`drift.ingest.dates`).
    """
    col = raw.frame[column]
    empty = _column_empty(raw, column)
    n = len(col)
    if pd.api.types.is_datetime64_any_dtype(col.dtype):
        idx = pd.DatetimeIndex(col)
        if idx.tz is not None:
            idx = idx.tz_convert("UTC").tz_localize(None) if utc else idx.tz_localize(None)
        far = np.asarray((idx < dates.EARLIEST) | (idx > dates.LATEST), dtype=bool) & ~empty
        ns = np.where(far | empty, np.iinfo(np.int64).min, idx.as_unit("ns").asi8)
        problem = np.where(far, dates.Problem.OUT_OF_RANGE, dates.Problem.OK).astype(np.int8)
    else:
        values = col.to_numpy(dtype=object)
        codes, uniq = pd.factorize(pd.Series(values[~empty], dtype=object), use_na_sentinel=True)
        rows_present = raw.first_row + np.nonzero(~empty)[0]
        first_rows = np.full(len(uniq), 0, dtype=np.int64)
        ok = codes >= 0
        u_first, first_pos = np.unique(codes[ok], return_index=True)
        first_rows[u_first] = rows_present[ok][first_pos]
        uvals = list(np.asarray(uniq, dtype=object))
        if utc:
            u_ns, u_problem = dates.parse_times(uvals)
        else:
            u_ns, u_problem = dates.parse_periods(uvals, first_rows, fmt, label=raw.label, column=column,
                                                  source=source.name)
        ns = np.full(n, np.iinfo(np.int64).min, dtype=np.int64)
        problem = np.zeros(n, dtype=np.int8)
        picked = np.full(len(codes), np.iinfo(np.int64).min, dtype=np.int64)
        picked_p = np.full(len(codes), dates.Problem.NOT_A_DATE, dtype=np.int8)
        picked[ok] = u_ns[codes[ok]]
        picked_p[ok] = u_problem[codes[ok]]
        ns[~empty] = picked
        problem[~empty] = picked_p
    parsed = pd.DatetimeIndex(ns.view("datetime64[ns]"))
    if utc:
        parsed = parsed.tz_localize("UTC")
    problem[empty] = dates.Problem.OK
    return parsed, empty, problem


# ----------------------------------------------------------------------------------------- validate

def validate(raw: RawTable, source: SourceConfig, rules: SeriesRules) -> Validated:
    """Check every cell of a batch and split it into good observations and quarantine records.

    Parameters
    ----------
    raw : the batch as read.
    source : its source configuration (layout, period column and label, available / issued columns).
    rules : frequency, anchor and delay per series.

    Returns
    -------
    Validated
        ``good`` has columns ``row, series, period (datetime64, first day), issued_at (UTC or NaT), value
        (float), available_at (UTC or NaT: from the source), default_available_at (UTC or NaT: end of
        period plus delay; NaT when the frequency is unknown)``; ``quarantine`` has ``row, column,
        raw_value, reason``; ``cells`` counts the non-empty value cells examined.

    Raises
    ------
    InputError
        when a column the source configuration names is not in the table (nothing of it is usable).
    """
    frame = raw.frame
    columns = [str(c) for c in frame.columns]
    pc = source.period_column
    _require(raw, pc, "period_column", columns)
    special = {pc}
    for key, col in (("available_column", source.available_column), ("issued_column", source.issued_column)):
        if col is not None:
            _require(raw, col, key, columns)
            special.add(col)
    n = len(frame)
    rows = raw.first_row + np.arange(n, dtype=np.int64)
    qrecords: list[pd.DataFrame] = []

    # ---- row-level: period, available, issued
    period_raw = frame[pc].to_numpy()
    period_idx, period_empty, period_problem = _parse_row_dates(raw, pc, source.period_format, utc=False,
                                                                source=source)
    periods = period_idx.to_numpy()
    avail = issued = None
    no_problem = np.zeros(n, dtype=np.int8)
    avail_problem = issued_problem = no_problem
    if source.available_column is not None:
        avail, _, avail_problem = _parse_row_dates(raw, source.available_column, None, utc=True, source=source)
    if source.issued_column is not None:
        issued, _, issued_problem = _parse_row_dates(raw, source.issued_column, None, utc=True, source=source)

    # ---- cells (long table of non-empty value cells)
    if source.long_format:
        assert source.series_column is not None and source.value_column is not None  # validated config
        _require(raw, source.series_column, "series_column", columns)
        _require(raw, source.value_column, "value_column", columns)
        vcol = source.value_column
        value_empty = _column_empty(raw, vcol)
        cell_row = np.nonzero(~value_empty)[0]
        series_vals = frame[source.series_column].to_numpy()[cell_row]
        series = np.array([_text(s).strip() for s in series_vals], dtype=object)
        cell_values = frame[vcol].to_numpy()[cell_row]
        cell_column = np.full(len(cell_row), vcol, dtype=object)
    else:
        if source.columns is not None:
            for c in source.columns:
                _require(raw, c, "columns", columns)
            value_cols = [c for c in source.columns if c not in special]
        else:
            value_cols = [c for c in columns if c not in special]
        if value_cols:
            block = frame[value_cols]
            arr = block.to_numpy()
            empty2 = np.column_stack([_column_empty(raw, c) for c in value_cols]) if raw.empty else \
                _empty_mask(arr)
            r_idx, c_idx = np.nonzero(~empty2)
            cell_row = r_idx
            cell_values = arr[r_idx, c_idx]
            names = np.array([c.strip() for c in value_cols], dtype=object)
            series = names[c_idx]
            cell_column = np.array(value_cols, dtype=object)[c_idx]
        else:
            cell_row = np.zeros(0, dtype=np.int64)
            cell_values = np.zeros(0, dtype=object)
            series = cell_column = np.zeros(0, dtype=object)
    n_cells = len(cell_row)

    # whole-row failures are reported once per row that has at least one value
    has_value = np.zeros(n, dtype=bool)
    has_value[cell_row] = True
    row_fail = np.zeros(n, dtype=bool)
    for mask, col, what, problem in (
        (period_empty & has_value, pc, None, no_problem),
        ((period_problem != 0) & has_value, pc, "period", period_problem),
        ((avail_problem != 0) & has_value, source.available_column, "available", avail_problem),
        ((issued_problem != 0) & has_value, source.issued_column, "issued", issued_problem),
    ):
        mask = mask & ~row_fail
        if not mask.any():
            continue
        idx = np.nonzero(mask)[0]
        colvals = frame[col].to_numpy()[idx]
        reasons = [_row_reason(what, _text(v), source, int(p)) for v, p in zip(colvals, problem[idx], strict=True)]
        qrecords.append(pd.DataFrame({"row": rows[idx], "column": col,
                                      "raw_value": [_text(v) for v in colvals], "reason": reasons}))
        row_fail |= mask

    keep = ~row_fail[cell_row]
    cell_row, cell_values, series, cell_column = (cell_row[keep], cell_values[keep], series[keep],
                                                  cell_column[keep])

    # ---- frequency alignment, per (rule, distinct period)
    cell_period = periods[cell_row]
    s_codes, s_uniq = pd.factorize(pd.Series(series, dtype=object), use_na_sentinel=False)
    s_rules = [rules.rule(str(s), source) for s in s_uniq]
    rule_keys = [(r.frequency, r.week_anchor) for r in s_rules]
    g_codes_of_s, g_uniq = pd.factorize(pd.Series(rule_keys, dtype=object), use_na_sentinel=False)
    g_codes = g_codes_of_s[s_codes] if len(s_codes) else np.zeros(0, dtype=np.int64)
    p_codes, p_uniq = pd.factorize(cell_period, use_na_sentinel=False)
    n_p = max(len(p_uniq), 1)
    pair = g_codes.astype(np.int64) * n_p + p_codes.astype(np.int64)
    u_pair, inv = np.unique(pair, return_inverse=True)
    start_u = np.empty(len(u_pair), dtype="datetime64[ns]")
    end_u = np.empty(len(u_pair), dtype="datetime64[ns]")
    ok_u = np.ones(len(u_pair), dtype=bool)
    for i, key in enumerate(u_pair):
        freq, anchor = g_uniq[key // n_p]
        p = pd.Timestamp(p_uniq[key % n_p]).normalize()
        start, end, ok = _align(p, freq, anchor, source.period_label)
        start_u[i] = np.datetime64(start.to_datetime64(), "ns")
        end_u[i] = np.datetime64("NaT", "ns") if end is None else np.datetime64(end.to_datetime64(), "ns")
        ok_u[i] = ok
    cell_start = start_u[inv]
    cell_end = end_u[inv]
    off = ~ok_u[inv]
    if off.any():
        qrecords.append(_off_frequency_records(
            rows[cell_row[off]], g_codes[off], series[off], period_raw[cell_row[off]], cell_period[off],
            g_uniq, pc, source))
        on = ~off
        cell_row, cell_values, series, cell_column = cell_row[on], cell_values[on], series[on], cell_column[on]
        cell_start, cell_end, s_codes = cell_start[on], cell_end[on], s_codes[on]

    # ---- cell-level: series name, duplicates, numbers
    cell_issued = (issued[cell_row] if issued is not None
                   else pd.DatetimeIndex(np.full(len(cell_row), np.datetime64("NaT", "ns")), tz="UTC"))
    cell_avail = (avail[cell_row] if avail is not None
                  else pd.DatetimeIndex(np.full(len(cell_row), np.datetime64("NaT", "ns")), tz="UTC"))
    reason = np.full(len(cell_row), None, dtype=object)
    rcolumn = cell_column.copy()
    rraw = np.array([None] * len(cell_row), dtype=object)

    if raw.unnamed and not source.long_format:
        no_header = np.isin(cell_column, list(raw.unnamed))
        reason[no_header] = ("the column has no name in the header, so its values belong to no series; "
                             "name the column (or remove it)")
    if source.long_format:
        no_name = series == ""
        if no_name.any():
            reason[no_name] = "the series name is empty"
            rcolumn[no_name] = source.series_column
            rraw[no_name] = ""

    _check_names(series, reason, rcolumn, rraw, source)

    issued_key = cell_issued.as_unit("ns").asi8.copy()
    issued_key[cell_issued.isna()] = _NO_ISSUE
    keys = pd.DataFrame({"s": series, "p": cell_start.astype("datetime64[ns]").astype(np.int64),
                         "i": issued_key})
    dup = keys.duplicated(keep=False).to_numpy() & (reason == None)
    if dup.any():
        idx = np.nonzero(dup)[0]
        d = keys.iloc[idx].assign(row=rows[cell_row[idx]], pos=idx)
        for _, grp in d.groupby(["s", "p", "i"], sort=False):
            clash = sorted(int(r) for r in grp["row"])
            what = f"series '{grp['s'].iloc[0]}' period {_day(pd.Timestamp(int(grp['p'].iloc[0])))}"
            if int(grp["i"].iloc[0]) != _NO_ISSUE:
                what += f" issued {pd.Timestamp(int(grp['i'].iloc[0]), tz='UTC').isoformat()}"
            rows_text = ", ".join(str(r) for r in clash[:-1]) + f" and {clash[-1]}"
            text = (f"duplicate: {what} appears in rows {rows_text} of this batch; none of the copies "
                    "was stored")
            for p in grp["pos"]:
                reason[p] = text

    values, num_reason = _parse_values(cell_values, source.decimal)
    blank = num_reason == "blank"
    free = reason == None
    take = free & (num_reason != None) & ~blank
    reason[take] = num_reason[take]
    bad = reason != None
    if bad.any():
        raw_text = np.array([_text(v) if r is None else r for v, r in zip(cell_values[bad], rraw[bad],
                                                                           strict=True)], dtype=object)
        qrecords.append(pd.DataFrame({"row": rows[cell_row[bad]], "column": rcolumn[bad],
                                      "raw_value": raw_text, "reason": reason[bad]}))
    good_mask = ~bad & ~blank

    delays = np.array([r.delay for r in s_rules], dtype="timedelta64[us]").astype("timedelta64[ns]") \
        if s_rules else np.zeros(0, dtype="timedelta64[ns]")
    g_start = cell_start[good_mask]
    good = pd.DataFrame({
        "row": rows[cell_row[good_mask]],
        "series": series[good_mask],
        "period": pd.DatetimeIndex(g_start),
        "issued_at": cell_issued[good_mask],
        "value": values[good_mask].astype(np.float64),
        "available_at": cell_avail[good_mask],
        "default_available_at": pd.DatetimeIndex(cell_end[good_mask] + delays[s_codes[good_mask]]
                                                 if len(delays) else cell_end[good_mask]).tz_localize("UTC"),
    })
    quarantine = (pd.concat(qrecords, ignore_index=True) if qrecords
                  else pd.DataFrame({c: [] for c in QUARANTINE_COLUMNS}))
    quarantine = _storable(quarantine)
    quarantine = quarantine.sort_values(["row", "column"], kind="stable").reset_index(drop=True)
    quarantine["row"] = quarantine["row"].astype(np.int64)
    return Validated(good=good, quarantine=quarantine[QUARANTINE_COLUMNS], cells=int(n_cells))


def _check_names(series: np.ndarray, reason: np.ndarray, rcolumn: np.ndarray, rraw: np.ndarray,
                 source: SourceConfig) -> None:
    """Quarantine (in place: ``reason``, and for long format ``rcolumn``/``rraw``) the cells whose series name
    no store keeps: one with a NUL byte, or longer than :data:`~drift.config.MAX_NAME_LENGTH` characters.
    Checked once per distinct name."""
    names = pd.unique(pd.Series(series, dtype=object))
    bad: dict[str, str] = {}
    for name in names:
        text = str(name)
        if "\x00" in text:
            bad[text] = (f"the series name '{text[:60]}' contains a NUL byte, which no store keeps in "
                         "text; remove it from the name")
        elif len(text) > MAX_NAME_LENGTH:
            bad[text] = (f"the series name is {len(text)} characters long ('{text[:40]}…'); drift keeps "
                         f"names of at most {MAX_NAME_LENGTH} characters: shorten it")
    if not bad:
        return
    hit = np.isin(series, list(bad)) & (reason == None)  # elementwise on an object array
    idx = np.nonzero(hit)[0]
    reason[idx] = [bad[str(series[i])] for i in idx]
    if source.long_format:
        rcolumn[idx] = source.series_column
        rraw[idx] = series[idx]


def _escape(text: str) -> str:
    """``text`` as a store keeps it: a NUL byte written as the four characters ``\\x00``."""
    return text.replace("\x00", "\\x00")


def _storable(records: pd.DataFrame) -> pd.DataFrame:
    """Quarantine records every store can keep: NUL bytes escaped (:func:`_escape`) in every text, and the
    column name cut to :data:`~drift.config.MAX_NAME_LENGTH` characters (the store's column width)."""
    if records.empty:
        return records
    out = records.copy()
    for col in ("column", "raw_value", "reason"):
        text = out[col].astype(object)
        nul = text.map(lambda v: isinstance(v, str) and "\x00" in v).to_numpy(dtype=bool)
        if nul.any():
            out.loc[nul, col] = [_escape(v) for v in text[nul]]
    long = out["column"].map(lambda v: isinstance(v, str) and len(v) > MAX_NAME_LENGTH).to_numpy(dtype=bool)
    if long.any():
        out.loc[long, "column"] = [v[: MAX_NAME_LENGTH - 1] + "…" for v in out["column"][long]]
    return out


def _require(raw: RawTable, column: str, key: str, columns: list[str]) -> None:
    if column not in columns:
        shown = ", ".join(f"'{c}'" for c in columns[:12]) + (" ..." if len(columns) > 12 else "")
        raise InputError(f"no column '{column}' (named by '{key}'); the columns are {shown or 'none'}",
                         file=raw.label, column=column)


def _day(ts: pd.Timestamp) -> str:
    return ts.strftime("%Y-%m-%d")


def _row_reason(what: str | None, text: str, source: SourceConfig, problem: int = 0) -> str:
    if what is None:
        return "the period is empty, so the row's values cannot be placed in time"
    if problem == dates.Problem.OUT_OF_RANGE:
        return (f"{what if what == 'period' else what + ' time'} '{text}' is outside the range of dates drift "
                f"stores ({dates.describe_range()}); none of the row's values was stored")
    if what == "period":
        if problem == dates.Problem.NUMBER:
            return (f"period '{text}' is a number, not a date (a spreadsheet serial day number? set "
                    f"period_format: {dates.SERIAL_FORMAT}); none of the row's values was stored")
        hint = (f"in the format '{source.period_format}'" if source.period_format else
                "(write ISO dates such as 2024-03-04, or set 'period_format')")
        return f"period '{text}' is not a date {hint}; none of the row's values was stored"
    return (f"{what} time '{text}' is not a date and time (ISO 8601, e.g. 2024-03-04T09:30:00Z; "
            "naive times are UTC); none of the row's values was stored")


def _align(p: pd.Timestamp, freq: str | None, anchor: int, label: str
           ) -> tuple[pd.Timestamp, pd.Timestamp | None, bool]:
    """(period start, period end = next start or None, whether ``p`` is on the series' calendar)."""
    if freq is None:
        return p, None, label == "start"
    start = period_start(p, freq, week_anchor=anchor)
    end = next_period(start, freq)
    if label == "start":
        return start, end, bool(start == p)
    return start, end, bool(end - pd.Timedelta(days=1) == p)


def _calendar(freq: str, anchor: int, label: str) -> str:
    if label == "start":
        return {"D": "days start at midnight", "W": f"weeks start on {_WEEKDAYS[anchor]}",
                "M": "months start on the 1st", "Q": "quarters start on 1 January, April, July and October"
                }[freq]
    return {"D": "days end at midnight", "W": f"weeks end on {_WEEKDAYS[(anchor - 1) % 7]}",
            "M": "months end on their last day",
            "Q": "quarters end on 31 March, 30 June, 30 September and 31 December"}[freq]


def _label_hint(p: pd.Timestamp, freq: str, anchor: int, label: str) -> str:
    """What setting would read a period that is off the calendar: the other ``period_label`` when the day is
    on the calendar that way; for weeks, also the weekday the models' weeks start on."""
    other = "end" if label == "start" else "start"
    hint = ""
    if _align(p, freq, anchor, other)[2]:
        which = "last" if other == "end" else "first"
        hint = (f" (it is the {which} day of a {freq} period: if the file names each period by its {which} day, "
                f"set 'period_label: {other}' on the source")
    if freq == "W":
        day = _WEEKDAYS[p.weekday()]
        first = day if label == "start" else _WEEKDAYS[(p.weekday() + 1) % 7]  # the weekday its week starts on
        hint += ("; if" if hint else " (if") + (
            f" the weeks {label} on {day}, give the models' reference.start on a {first}: a week starts on the "
            "weekday of reference.start")
    return hint + (")" if hint else "")


def _off_frequency_records(rows: np.ndarray, g_codes: np.ndarray, series: np.ndarray, raw_period: np.ndarray,
                           period: np.ndarray, g_uniq: pd.Index, pc: str, source: SourceConfig
                           ) -> pd.DataFrame:
    df = pd.DataFrame({"row": rows, "g": g_codes, "series": series, "pos": np.arange(len(rows))})
    out = []
    for (row, g), grp in df.groupby(["row", "g"], sort=True):
        freq, anchor = g_uniq[g]
        names = _names(sorted({str(s) for s in grp["series"]}))
        pos = int(grp["pos"].iloc[0])
        day = _day(pd.Timestamp(period[pos]))
        if freq is None:
            reason = (f"the frequency of series {names} is unknown, so period {day} (labelled as a period "
                      "end) cannot be converted to a period start; set 'frequency' on the source")
        else:
            which = "first" if source.period_label == "start" else "last"
            reason = (f"period {day} is not the {which} day of a {freq} period ({_calendar(freq, anchor, source.period_label)}) "
                      f"for series {names}; the value was not stored{_label_hint(pd.Timestamp(period[pos]), freq, anchor, source.period_label)}")
        out.append((int(row), pc, _text(raw_period[pos]), reason))
    return pd.DataFrame(out, columns=QUARANTINE_COLUMNS)


def _parse_values(values: np.ndarray, decimal: str) -> tuple[np.ndarray, np.ndarray]:
    """Numbers from raw cells, with a reason per failing cell (None when fine, "blank" for blank text)."""
    reason = np.full(len(values), None, dtype=object)
    if values.dtype.kind in "fiub":
        out = values.astype(np.float64)
    else:
        series = pd.Series(values, dtype=object)
        if decimal != ".":
            is_str = np.fromiter((isinstance(v, str) for v in values), dtype=bool, count=len(values))
            if is_str.any():
                text = series[is_str]
                dotted = text.str.contains(".", regex=False).to_numpy(dtype=bool)
                for i in np.nonzero(is_str)[0][dotted]:
                    reason[i] = (f"value '{_text(values[i]).strip()}' has a '.' but the source's decimal "
                                 f"separator is '{decimal}' (a thousands separator? drift does not guess: "
                                 "remove it)")
                series[is_str] = text.str.replace(decimal, ".", regex=False)
        out = np.array(pd.to_numeric(series, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan))
        out[reason != None] = np.nan
        failed = np.nonzero(np.isnan(out) & (reason == None))[0]
        for i in failed:
            text = _text(values[i]).strip()
            if text == "":
                reason[i] = "blank"
            elif text.lower() in _NAN_SPELLINGS:
                reason[i] = f"value '{text}' is not a finite number"
            elif decimal == "." and "," in text:
                reason[i] = (f"value '{text}' is not a number: it has a ',' (a thousands separator, or a decimal "
                             "comma? drift does not guess: remove the separator, or set the source's "
                             "'decimal: \",\"')")
            else:
                reason[i] = f"value '{text}' is not a number"
    with np.errstate(invalid="ignore"):
        nonfinite = ~np.isfinite(out) & (reason == None)
        huge = np.isfinite(out) & (np.abs(out) > MAX_ABS_VALUE) & (reason == None)
    for i in np.nonzero(nonfinite)[0]:
        reason[i] = f"value '{_text(values[i]).strip()}' is not a finite number"
    for i in np.nonzero(huge)[0]:
        reason[i] = (f"value '{_text(values[i]).strip()}' is beyond ±{MAX_ABS_VALUE:.0e}, the largest size drift "
                     "accepts (the statistics square and sum values, which overflows near 1e154)")
    return out + 0.0, reason  # + 0.0 turns -0.0 into 0.0
