"""The store: one schema through SQLAlchemy Core, SQLite by default (WAL), PostgreSQL by URL.

Every observation carries ``period`` (the first day of the period it describes), ``available_at`` (when it
could first be known, UTC) and, for driver forecasts, ``issued_at`` (when the forecast was issued). A
revised value is a new row (a vintage), never an overwrite. Nothing is ever deleted by a run.

Vintages are numbered per (series, period, issued_at): 1 for the first value, 2 for its first revision,
and so on. The database enforces that a number is used once (the unique index ``ux_obs_vintage``), so two
ingests running at once can never store the same vintage twice: inserts skip rows that conflict. A batch
(one file or query result) claims its content and parsing settings (``batches.claim``, unique) in the same
transaction that stores its rows, so the same file is never stored twice either.

A retracted batch keeps its rows, marked with ``retracted_at``: as-of queries after that moment ignore
them, queries as of an earlier moment still see them (vintages stay auditable).

Timestamps are stored as naive UTC and handed out tz-aware (UTC), on every backend.
"""

from __future__ import annotations

import json
import logging
import math
import os
import socket
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from contextvars import ContextVar
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine

from drift.exceptions import SchemaVersionError, StoreError
from drift.jsontext import ORJSON_OPTIONS, JSONText, stored_text
from drift.procs import START_MAX_LEN, process_start, this_host, why_dead

log = logging.getLogger(__name__)

try:  # the fast JSON encoder of verdict payloads (see _strict_json); the standard one without it
    import orjson as _orjson
except ImportError:  # pragma: no cover - a dependency; kept working without it
    _orjson = None  # type: ignore[assignment]

#: bump when the schema changes (and add the step to :data:`MIGRATIONS`); older code refuses a newer store
SCHEMA_VERSION = 7
#: stands for "no issue time" in the unique key of observations (NULLs never conflict in an index)
NO_ISSUE_KEY = "0001-01-01 00:00:00"


class UTCDateTime(sa.types.TypeDecorator[datetime]):
    """Aware datetimes in, stored as naive UTC, aware UTC out."""

    impl = sa.DateTime
    cache_ok = True

    def process_bind_param(self, value: Any, dialect: Any) -> Any:
        if value is None:
            return None
        if isinstance(value, pd.Timestamp):
            value = value.to_pydatetime()
        if value.tzinfo is None:
            raise ValueError("naive datetime given to the store; pass tz-aware datetimes")
        return value.astimezone(timezone.utc).replace(tzinfo=None)

    def process_result_value(self, value: Any, dialect: Any) -> Any:
        if value is None:
            return None
        if isinstance(value, str):
            value = datetime.fromisoformat(value)
        return value.replace(tzinfo=timezone.utc)


metadata = sa.MetaData()

meta = sa.Table(
    "meta", metadata,
    sa.Column("key", sa.String(64), primary_key=True),
    sa.Column("value", sa.Text, nullable=False),
)

batches = sa.Table(
    "batches", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("source", sa.String(200), nullable=False),
    sa.Column("file", sa.Text),
    sa.Column("content_hash", sa.String(64)),
    sa.Column("started_at", UTCDateTime, nullable=False),
    sa.Column("finished_at", UTCDateTime),
    sa.Column("stored", sa.Integer, default=0),
    sa.Column("known", sa.Integer, default=0),
    sa.Column("revised", sa.Integer, default=0),
    sa.Column("quarantined", sa.Integer, default=0),
    sa.Column("status", sa.String(20), nullable=False),
    # hash of the parsing settings that produced the rows (source keys, series calendars, reader version)
    sa.Column("settings_hash", sa.String(64)),
    # source + content + settings: unique, so one content read with one set of settings is stored once
    sa.Column("claim", sa.String(64), unique=True),
    sa.Column("retracted_at", UTCDateTime),
    sa.Column("retract_note", sa.Text),
    # size and modification time (ns) of the file when it was read: an unchanged file is recognised by
    # them without reading it again (schema 5)
    sa.Column("file_size", sa.BigInteger),
    sa.Column("file_mtime_ns", sa.BigInteger),
)

observations = sa.Table(
    "observations", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("series", sa.String(200), nullable=False),
    sa.Column("period", sa.Date, nullable=False),
    sa.Column("issued_at", UTCDateTime, nullable=True),
    sa.Column("value", sa.Float, nullable=False),
    sa.Column("available_at", UTCDateTime, nullable=False),
    sa.Column("ingested_at", UTCDateTime, nullable=False),
    sa.Column("source", sa.String(200), nullable=False),
    sa.Column("batch", sa.Integer, sa.ForeignKey("batches.id"), nullable=False),
    sa.Column("vintage", sa.Integer, nullable=False, server_default="1"),
    sa.Column("retracted_at", UTCDateTime, nullable=True),
)
#: the observation's identity and vintage, enforced by the database (also serves lookups by series)
OBS_KEY_INDEX = sa.Index(
    "ux_obs_vintage", observations.c.series, observations.c.period,
    sa.func.coalesce(observations.c.issued_at, sa.literal_column(f"'{NO_ISSUE_KEY}'")), observations.c.vintage,
    unique=True)

quarantine = sa.Table(
    "quarantine", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("batch", sa.Integer, sa.ForeignKey("batches.id"), nullable=True),
    sa.Column("source", sa.String(200), nullable=False),
    sa.Column("file", sa.Text),
    sa.Column("row", sa.Integer),
    sa.Column("column", sa.String(200)),
    sa.Column("raw_value", sa.Text),
    sa.Column("reason", sa.Text, nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
    # set when a later read of the same file no longer quarantines the cell (fixed file or settings)
    sa.Column("resolved_at", UTCDateTime),
    sa.Column("resolved_batch", sa.Integer),
)

runs = sa.Table(
    "runs", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("kind", sa.String(40), nullable=False),
    sa.Column("job_id", sa.String(100)),
    sa.Column("started_at", UTCDateTime, nullable=False),
    sa.Column("finished_at", UTCDateTime),
    # running | ok | partial | failed | missed | timeout | abandoned (see RUN_STATES)
    sa.Column("status", sa.String(20), nullable=False),
    sa.Column("as_of", sa.Date),
    sa.Column("scheduled_for", UTCDateTime),
    sa.Column("detail", sa.Text),
    sa.Column("error", sa.Text),
    # the process that runs it (schema 4): host, pid, process start (drift.procs) and its last heartbeat
    sa.Column("pid", sa.Integer),
    sa.Column("host", sa.String(200)),
    sa.Column("proc_start", sa.String(START_MAX_LEN)),
    sa.Column("heartbeat_at", UTCDateTime),
)
sa.Index("ix_runs_kind", runs.c.kind, runs.c.started_at)
sa.Index("ix_runs_status", runs.c.status)

#: what a ``runs.status`` means
RUN_STATES: dict[str, str] = {
    "running": "its process is working on it (and beats every RUN_HEARTBEAT_SECONDS)",
    "ok": "finished; everything it was asked to do was done",
    "partial": "finished; some of it could not be done (models not checked, files not read): see error",
    "failed": "stopped by an error: see error",
    "timeout": "the daemon gave up waiting after schedule.job_timeout (its thread may still have finished)",
    "missed": "a scheduled fire time that was not run (late beyond schedule.misfire_grace, or the previous "
              "run was still going)",
    "abandoned": "its process died or went silent before recording the end: finished_at is when that was "
                 "found, error says why",
}

verdicts = sa.Table(
    "verdicts", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("run", sa.Integer, sa.ForeignKey("runs.id"), nullable=False),
    sa.Column("model", sa.String(200), nullable=False),
    sa.Column("as_of", sa.Date, nullable=False),
    sa.Column("verdict", sa.String(20), nullable=False),
    sa.Column("payload", sa.Text, nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
    # the payload's charts block (JSONText.stored: compressed JSON text behind a header naming its codec),
    # kept out of ``payload``; NULL for a payload without charts and for rows of schema 6 and earlier, whose
    # charts are inside ``payload``
    sa.Column("charts", sa.LargeBinary, nullable=True),
)
sa.Index("ix_verdicts_model", verdicts.c.model, verdicts.c.created_at)

alerts = sa.Table(
    "alerts", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("model", sa.String(200), nullable=False),
    sa.Column("condition", sa.String(300), nullable=False),  # e.g. "refit", "drop-driver:k000_temp"
    sa.Column("action", sa.String(20), nullable=False),
    sa.Column("severity", sa.Integer, nullable=False),
    sa.Column("status", sa.String(20), nullable=False),  # open | cleared
    sa.Column("first_seen", UTCDateTime, nullable=False),
    sa.Column("last_seen", UTCDateTime, nullable=False),
    sa.Column("cleared_at", UTCDateTime),
    sa.Column("as_of", sa.Date),
    sa.Column("payload", sa.Text, nullable=False),
)
sa.Index("ix_alerts_open", alerts.c.model, alerts.c.condition, alerts.c.status)

outbox = sa.Table(
    "outbox", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("alert", sa.Integer, sa.ForeignKey("alerts.id"), nullable=True),
    sa.Column("channel", sa.String(200), nullable=False),
    sa.Column("idempotency_key", sa.String(200), nullable=False, unique=True),
    sa.Column("subject", sa.Text, nullable=False),
    sa.Column("payload", sa.Text, nullable=False),
    # pending | sending | delivering | sent | uncertain | dead (drift.delivery.outbox)
    sa.Column("status", sa.String(20), nullable=False),
    sa.Column("attempts", sa.Integer, nullable=False, default=0),
    sa.Column("next_attempt_at", UTCDateTime, nullable=False),
    sa.Column("last_error", sa.Text),
    sa.Column("created_at", UTCDateTime, nullable=False),
    sa.Column("sent_at", UTCDateTime),
    # JSON {recipient: {status, permanent, reply, at}} for channels with several recipients (e-mail); schema 4
    sa.Column("recipients", sa.Text),
)

#: the monitoring epochs of models after the first (the first is the config as written): who decided what,
#: when, and the settings the check uses from ``effective`` on (see :mod:`drift.epochs`)
model_epochs = sa.Table(
    "model_epochs", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("model", sa.String(200), nullable=False),
    sa.Column("epoch", sa.Integer, nullable=False),  # 2, 3, ... (1 is the config as written)
    sa.Column("action", sa.String(20), nullable=False),  # refit | relag | drop-driver
    sa.Column("effective", sa.Date, nullable=False),  # checks as of this day or later use it
    sa.Column("decided_by", sa.String(200), nullable=False),
    sa.Column("recorded_at", UTCDateTime, nullable=False),
    sa.Column("note", sa.Text),
    sa.Column("settings", sa.Text, nullable=False),  # JSON: reference, lags, dropped, the fit proposed then
    sa.UniqueConstraint("model", "epoch", name="ux_model_epochs"),
)

#: alerts the team has seen and chosen to wait on: not re-sent before ``until`` unless they get worse
alert_snoozes = sa.Table(
    "alert_snoozes", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("model", sa.String(200), nullable=False),
    sa.Column("condition", sa.String(300), nullable=False),
    sa.Column("until", sa.Date, nullable=False),
    sa.Column("decided_by", sa.String(200), nullable=False),
    sa.Column("note", sa.Text),
    sa.Column("created_at", UTCDateTime, nullable=False),
    sa.Column("baseline", sa.Text, nullable=False),  # JSON: the action as it stood when snoozed
    sa.Column("ended_at", UTCDateTime),
    sa.Column("ended_reason", sa.String(20)),  # expired | worse | acted
)
sa.Index("ix_alert_snoozes_model", alert_snoozes.c.model, alert_snoozes.c.ended_at)

locks = sa.Table(
    "locks", metadata,
    sa.Column("name", sa.String(100), primary_key=True),
    sa.Column("owner", sa.String(300), nullable=False),
    sa.Column("pid", sa.Integer, nullable=False),
    sa.Column("host", sa.String(200), nullable=False),
    sa.Column("acquired_at", UTCDateTime, nullable=False),
    sa.Column("heartbeat_at", UTCDateTime, nullable=False),
    sa.Column("proc_start", sa.String(START_MAX_LEN)),  # the holder's process start (schema 4)
)


#: the observation columns an ingest writes (:meth:`Store.insert_observations`)
OBS_COLUMNS = ("series", "period", "issued_at", "value", "available_at", "ingested_at", "source", "batch",
               "vintage")
#: rows per executemany call / per COPY progress step
INSERT_CHUNK = 20_000
#: verdict payloads encoded and inserted at a time (:meth:`Store.save_verdicts`)
VERDICT_BATCH = 500


#: series per as-of read query (a check chunk of 500 models x 3 series is one query; SQLite allows 32,766
#: bound parameters)
READ_SERIES = 5_000


def observations_as_of(series: Sequence[str], as_of: datetime | None) -> sa.Select[Any]:
    """The as-of read of :meth:`Store.load_observations` for some series: one statement, its ``series IN``
    served by the unique index ``ux_obs_vintage`` (series first); ``EXPLAIN`` shows it on both backends."""
    o = observations
    # dates and times come back as the driver gives them (text on SQLite, naive UTC on PostgreSQL) and are
    # converted by column in :meth:`Store.load_observations`: per-value conversion was 10% of a whole check
    raw = [sa.type_coerce(o.c[c], sa.Text).label(c) for c in ("period", "issued_at", "available_at", "ingested_at")]
    return sa.select(o.c.series, raw[0], raw[1], o.c.value, raw[2], raw[3]).where(o.c.series.in_(list(series)),
                                                                                   _known_by(as_of))


def _known_by(as_of: datetime | None) -> Any:
    """Observations known at ``as_of``: available by then and not retracted by then (no ``as_of``: not
    retracted)."""
    o = observations
    if as_of is None:
        return o.c.retracted_at.is_(None)
    return sa.and_(o.c.available_at <= as_of, sa.or_(o.c.retracted_at.is_(None), o.c.retracted_at > as_of))


#: the columns of :meth:`Store.load_observations`, in order
READ_COLUMNS = ("series", "period", "issued_at", "value", "available_at", "ingested_at")
#: SQLite stores (by URL) whose packed read failed for want of SQLite's math functions: they read rows
_PACKED_READ: dict[str, bool] = {}


def _as_of_where(as_of: datetime | None, param: str) -> str:
    """The :func:`_known_by` condition in SQL text (``param`` stands for the bound moment)."""
    if as_of is None:
        return "retracted_at IS NULL"
    return f"available_at <= {param} AND (retracted_at IS NULL OR retracted_at > {param})"


def observations_as_of_packed(dialect: str, n_series: int, as_of: datetime | None, ingested: bool = True,
                               table: str = "observations") -> str:
    """The as-of read of :meth:`Store.load_observations` packed by the database: one row per series, each
    column aggregated (``group_concat`` / ``string_agg``) in one pass over the rows the unique index
    ``ux_obs_vintage`` finds (series first): every column of a series gets its rows in the same order.
    ``ingested=False`` leaves ``ingested_at`` out (NULL).

    SQLite: ``n_series`` ``?`` for the series, then the moment twice when ``as_of`` is given. A value
    travels exactly as an integer pair (m, k) with value = m · 2^-k: k = 53 - log2|value| truncated toward
    zero (53 - floor or 53 - ceil of log2, so |m| lies in [2^52, 2^54)); the scaling (multiplications by
    powers of two that stay in the normal range) and the conversion are exact, and :func:`_read_packed`
    checks that range (a value outside it, e.g. an infinity, sends the chunk to the row read). SQLite's own
    text of a REAL keeps 15 digits only. (No ``floor``: SQLAlchemy replaces SQLite's with a Python one.)

    PostgreSQL: ``%(series)s`` (an array) and ``%(at)s``; a value as its text, the shortest that reads back
    exactly (``extra_float_digits`` > 0), dates and times in ISO form (``DateStyle``).
    """
    if dialect == "postgresql":
        ingested_sql = "string_agg(ingested_at::text, ',')" if ingested else "NULL"
        return (
            "SELECT series, count(*), count(issued_at), string_agg(period::text, ','), "
            "string_agg(coalesce(issued_at::text, ''), ','), string_agg(value::text, ','), NULL, "
            f"string_agg(available_at::text, ','), {ingested_sql} "
            f"FROM {table} WHERE series = ANY(%(series)s) AND {_as_of_where(as_of, '%(at)s')} GROUP BY series")
    where = _as_of_where(as_of, "?")
    series_in = ", ".join("?" * n_series)
    ingested_sql = "group_concat(ingested_at, ',')" if ingested else "NULL"
    # one power of two is enough down to 1e-290; below, two (2^k would overflow for the smallest values)
    mant = ("CASE WHEN value = 0 THEN 0 WHEN abs(value) > 1e-290 THEN CAST(value * power(2, k) AS INTEGER) "
            "ELSE CAST(value * power(2, k / 2) * power(2, k - k / 2) AS INTEGER) END")
    return (
        "SELECT series, count(*), count(issued_at), group_concat(period, ','), "
        "group_concat(ifnull(issued_at, ''), ','), "
        f"group_concat({mant}, ','), group_concat(ifnull(k, 0), ','), group_concat(available_at, ','), "
        f"{ingested_sql} "
        "FROM (SELECT series, period, issued_at, value, available_at, ingested_at, "
        "CAST(53 - log2(abs(value)) AS INTEGER) AS k "
        f"FROM {table} WHERE series IN ({series_in}) AND {where}) GROUP BY series")


def _moment_param(conn: Connection, as_of: datetime | None) -> Any:
    """``as_of`` as SQLAlchemy binds it for ``available_at`` on this connection (naive UTC text on SQLite)."""
    proc = observations.c.available_at.type._cached_bind_processor(conn.dialect)
    return proc(as_of) if proc is not None else as_of


def _read_packed(store: Store, conn: Connection, series: list[str], as_of: datetime | None,
                 ingested: bool = True) -> pd.DataFrame | None:
    """One chunk by :func:`observations_as_of_packed`, parsed by column (no Python object per row); None
    when the packed form cannot be trusted for it (the caller reads rows instead)."""
    dialect = conn.dialect.name
    sql = observations_as_of_packed(dialect, len(series), as_of, ingested,
                                    conn.dialect.identifier_preparer.format_table(observations))
    at = _moment_param(conn, as_of) if as_of is not None else None
    try:
        if dialect == "postgresql":
            # the text forms parsed below: floats in their shortest exact form (PostgreSQL 12+; 17 digits before)
            conn.exec_driver_sql("SET LOCAL extra_float_digits = 3")
            conn.exec_driver_sql("SET LOCAL DateStyle = 'ISO, YMD'")
            rows = conn.exec_driver_sql(sql, {"series": list(series), "at": at}).fetchall()
        else:
            rows = conn.exec_driver_sql(sql, (*series, at, at) if as_of is not None else tuple(series)).fetchall()
    except sa.exc.OperationalError as exc:
        if dialect != "sqlite" or "no such function" not in str(exc):
            raise
        _PACKED_READ[store.url] = False  # a SQLite built without its math functions
        conn.rollback()
        return None
    if not rows:
        return _empty_observations(ingested)
    names, counts, n_issued, periods, issued, mant, exps, avail, ingested_at = zip(*rows, strict=True)
    n = int(sum(counts))
    value = _floats(mant, n) if dialect == "postgresql" else _mantissas(mant, exps, n)
    if value is None:
        return None
    per = _texts_parsed(periods, n, 10, "datetime64[D]")
    av = _texts_parsed(avail, n, 26, "datetime64[us]")
    ing = _texts_parsed(ingested_at, n, 26, "datetime64[us]") if ingested else None
    iss = (_texts_parsed(issued, n, 26, "datetime64[us]", nullable=True) if sum(n_issued)
           else np.full(n, np.datetime64("NaT", "s")))
    if per is None or av is None or iss is None or (ing is None and ingested):
        return None
    codes = np.repeat(np.arange(len(names)), np.asarray(counts, dtype=np.int64))
    cols = {"series": pd.array(np.array(names, dtype=object), dtype="str").take(codes),
            "period": per.astype("datetime64[s]"),
            "issued_at": pd.DatetimeIndex(iss).tz_localize("UTC").array,
            "value": value,
            "available_at": pd.DatetimeIndex(av).tz_localize("UTC").array}
    if ing is not None:
        cols["ingested_at"] = pd.DatetimeIndex(ing).tz_localize("UTC").array
    return pd.DataFrame(cols)


def _ints(texts: Sequence[str], n: int) -> np.ndarray | None:
    """Comma-separated integers (the groups' texts end to end) -> int64; None unless exactly ``n``."""
    import warnings

    if None in texts:  # a group whose every value was NULL (e.g. an infinity's mantissa)
        return None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)  # numpy's note on text it could not read
        try:
            out = np.fromstring(",".join(texts), dtype=np.int64, sep=",")
        except ValueError:
            return None
    return out if len(out) == n else None


def _mantissas(mant: Sequence[str], exps: Sequence[str], n: int) -> np.ndarray | None:
    """Values sent as (m, k) pairs (:func:`observations_as_of_packed`): m · 2^-k, exactly; None unless
    each is an exact pair (|m| in [2^52, 2^62) or m = 0)."""
    m, k = _ints(mant, n), _ints(exps, n)
    if m is None or k is None:
        return None
    big = np.abs(m[m != 0])
    if big.size and not bool(np.all((big >= 2 ** 52) & (big < 2 ** 62))):
        return None  # not the exact pair (an infinity, or a log2 far off): read rows
    return np.ldexp(m.astype(np.float64), -k.astype(np.int32))


def _floats(texts: Sequence[str], n: int) -> np.ndarray | None:
    """Comma-separated floats -> float64, correctly rounded (Arrow's parser); None unless exactly ``n``."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if None in texts:
        return None
    raw = ",".join(texts).encode()
    whole = pa.LargeStringArray.from_buffers(1, pa.py_buffer(np.array([0, len(raw)], np.int64)), pa.py_buffer(raw))
    flat = pc.split_pattern(whole, pattern=",").flatten()
    if len(flat) != n:
        return None
    try:
        return flat.cast(pa.float64()).to_numpy(zero_copy_only=False)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None


def _texts_parsed(texts: Sequence[str], n: int, width: int, dtype: str, nullable: bool = False
                  ) -> np.ndarray | None:
    """Comma-separated dates or times (the groups' texts end to end) -> datetime64 ``dtype``; each distinct
    text parsed once. SQLAlchemy writes them at a fixed width (``width``), read without splitting; any
    other form (or ``nullable``: empty texts for NULLs) is split and cast by Arrow. None when the texts are
    not ``n`` readable values."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if None in texts:
        return None
    raw = (",".join(texts) + ",").encode()
    try:
        if not nullable and len(raw) == n * (width + 1):
            rec = np.dtype([("t", f"S{width}"), ("c", "S1")])
            fixed = pa.FixedSizeBinaryArray.from_buffers(pa.binary(width + 1), n, [None, pa.py_buffer(raw)])
            enc = fixed.dictionary_encode()
            uniq = np.frombuffer(enc.dictionary.buffers()[1], dtype=rec, count=len(enc.dictionary))
            if bool(np.all(uniq["c"] == b",")):
                return uniq["t"].astype(dtype)[enc.indices.to_numpy()]
        whole = pa.LargeStringArray.from_buffers(1, pa.py_buffer(np.array([0, len(raw) - 1], np.int64)),
                                                 pa.py_buffer(raw))
        flat = pc.split_pattern(whole, pattern=",").flatten()
        if len(flat) != n:
            return None
        if nullable:
            flat = pc.if_else(pc.equal(flat, ""), pa.scalar(None, pa.large_string()), flat)
        unit = np.datetime_data(np.dtype(dtype))[0]
        target = pa.date32() if unit == "D" else pa.timestamp(unit)
        enc = flat.dictionary_encode()
        return pc.take(enc.dictionary.cast(target), enc.indices).to_numpy(zero_copy_only=False).astype(dtype)
    except (ValueError, UnicodeError, pa.ArrowInvalid, pa.ArrowNotImplementedError):
        return None


def _read_rows(conn: Connection, series: list[str], as_of: datetime | None) -> pd.DataFrame:
    """One chunk by :func:`observations_as_of`, a Python tuple per row (the general path)."""
    # plain tuples: pandas inspects SQLAlchemy Row objects attribute by attribute (slow)
    raw = pd.DataFrame([tuple(r) for r in conn.execute(observations_as_of(series, as_of)).fetchall()],
                       columns=list(READ_COLUMNS))
    return _typed(raw)


def _typed(df: pd.DataFrame) -> pd.DataFrame:
    """The column types of :meth:`Store.load_observations` from the driver's values."""
    # the units the per-value conversion gave (dates in seconds, times in microseconds)
    df["period"] = pd.to_datetime(df["period"]).astype("datetime64[s]")
    for c in ("available_at", "issued_at", "ingested_at"):
        col = pd.to_datetime(df[c], utc=True)
        df[c] = col.astype("datetime64[us, UTC]" if col.notna().any() else "datetime64[s, UTC]")
    df["value"] = df["value"].astype(float)
    return df


def _empty_observations(ingested: bool = True) -> pd.DataFrame:
    """No observations, with the column types of :meth:`Store.load_observations`."""
    df = _typed(pd.DataFrame(columns=list(READ_COLUMNS)))
    return df if ingested else df.drop(columns="ingested_at")


def _observation_frame(parts: list[pd.DataFrame], ingested: bool = True) -> pd.DataFrame:
    """The chunks' frames as one (an empty read: the empty frame with the usual column types)."""
    full = [p if ingested or "ingested_at" not in p.columns else p.drop(columns="ingested_at")
            for p in parts if len(p)]
    if not full:
        return _empty_observations(ingested)
    return full[0] if len(full) == 1 else pd.concat(full, ignore_index=True)


#: Arrow types of the observation columns, for COPY in CSV form (timestamps are naive UTC by then)
_ARROW_TYPES = {"series": "string", "period": "date32", "issued_at": "timestamp[us]", "value": "double",
                "available_at": "timestamp[us]", "ingested_at": "timestamp[us]", "source": "string",
                "batch": "int64", "vintage": "int64"}


def _copy_observations(conn: Connection, columns: list[str], cols: list[np.ndarray],
                       on_chunk: Callable[[int], None]) -> int:
    """PostgreSQL bulk path (psycopg 3): COPY straight into the table inside a savepoint; if any row
    conflicts with a stored key and vintage, the savepoint is rolled back and the rows go through a
    temporary table and ``INSERT ... SELECT ... ON CONFLICT DO NOTHING`` instead (conflicts are skipped).

    The rows are sent as CSV written by Arrow (strings always quoted, so only an unquoted empty field is a
    NULL; floats in their shortest round-trip form): no Python call per row.
    """
    import io

    import psycopg
    import pyarrow as pa
    import pyarrow.csv as pacsv

    prep = conn.dialect.identifier_preparer
    quoted = ", ".join(prep.quote(c) for c in columns)
    target = prep.format_table(observations)
    n = len(cols[0])
    table = pa.table({c: pa.array(v, type=pa.type_for_alias(_ARROW_TYPES[c])) for c, v in zip(columns, cols,
                                                                                                  strict=True)})
    options = pacsv.WriteOptions(include_header=False, quoting_style="all_valid")

    def copy_into(into: str, report: bool) -> None:
        dbapi = conn.connection.dbapi_connection
        with dbapi.cursor() as cur, cur.copy(  # type: ignore[union-attr]
                f"COPY {into} ({quoted}) FROM STDIN (FORMAT csv)") as cp:
            for i in range(0, n, INSERT_CHUNK):
                buf = io.BytesIO()
                part = table.slice(i, INSERT_CHUNK)
                pacsv.write_csv(part, buf, options)
                cp.write(buf.getvalue())
                if report:
                    on_chunk(part.num_rows)

    savepoint = conn.begin_nested()
    try:
        copy_into(target, True)
    except psycopg.errors.UniqueViolation:
        savepoint.rollback()
    else:
        savepoint.commit()
        return n
    log.info("some incoming observations are already stored (a concurrent ingest?); skipping those")
    conn.exec_driver_sql(f"CREATE TEMP TABLE drift_incoming ON COMMIT DROP AS SELECT {quoted} FROM {target} "
                         "WITH NO DATA")
    copy_into("drift_incoming", False)
    res = conn.exec_driver_sql(f"INSERT INTO {target} ({quoted}) SELECT {quoted} FROM drift_incoming "
                               "ON CONFLICT DO NOTHING")
    conn.exec_driver_sql("DROP TABLE drift_incoming")
    return int(res.rowcount)


def utcnow() -> datetime:
    return datetime.now(timezone.utc)


#: seconds a SQLite write waits for another process's write lock before failing (``?timeout=`` in the URL)
SQLITE_BUSY_TIMEOUT = 30.0
#: seconds to wait for a PostgreSQL server to accept a connection (``?connect_timeout=`` in the URL)
PG_CONNECT_TIMEOUT = 10
#: how drift's sessions are named in ``pg_stat_activity`` (``?application_name=`` in the URL overrides it)
PG_APPLICATION_NAME = "drift"
#: what a store operation can raise when the database is unusable right now (callers that must survive it,
#: such as the daemon, catch these)
STORE_FAILURES: tuple[type[Exception], ...] = (sa.exc.SQLAlchemyError, StoreError)
#: seconds between two heartbeats of the running runs of a process (one UPDATE for all of them)
RUN_HEARTBEAT_SECONDS = 30.0
#: a running run whose heartbeat is older than this is abandoned, when its process is on another host (or
#: unknown); on this host the process itself is asked (pid and start time) whatever the heartbeat's age
RUN_STALE_AFTER_SECONDS = 600.0
#: SQLite error texts that mean "another connection holds the lock" (SQLITE_BUSY / SQLITE_LOCKED)
_SQLITE_BUSY_TEXTS = ("database is locked", "database table is locked", "database schema is locked")


def _sqlite_connect(busy_ms: int) -> Any:
    """The ``connect`` hook of a SQLite engine: WAL, foreign keys, the busy timeout, and no implicit
    transactions from the driver (drift emits BEGIN itself, see :func:`_sqlite_begin`)."""

    def hook(dbapi_conn: Any, _record: Any) -> None:
        dbapi_conn.isolation_level = None  # the sqlite3 module must not open transactions behind our back
        cur = dbapi_conn.cursor()
        cur.execute(f"PRAGMA busy_timeout={int(busy_ms)}")
        cur.execute("PRAGMA journal_mode=WAL")
        cur.execute("PRAGMA synchronous=NORMAL")
        cur.execute("PRAGMA foreign_keys=ON")
        cur.close()

    return hook


def _sqlite_begin(conn: Connection) -> None:
    """``BEGIN IMMEDIATE`` for a write transaction (:meth:`Store.begin`), plain ``BEGIN`` for reads.

    A write transaction takes SQLite's write lock when it starts, so its reads and writes see one state
    and a concurrent writer makes it wait (up to the busy timeout) instead of failing half-way with
    SQLITE_BUSY when a read transaction tries to become a write one.
    """
    write = conn.get_execution_options().get("drift_write", False)
    conn.exec_driver_sql("BEGIN IMMEDIATE" if write else "BEGIN")


@dataclass
class Store:
    """A connected store. Create with :func:`open_store`.

    :meth:`begin` and :meth:`connect` turn the two database failures an operator has to act on into a
    :class:`~drift.exceptions.StoreError` naming the store: a SQLite file whose write lock another process
    held for longer than the busy timeout, and a connection lost mid-step (server restarted, session
    terminated). Every other database error passes through unchanged.
    """

    engine: Engine
    url: str
    busy_timeout: float = SQLITE_BUSY_TIMEOUT
    #: seconds between heartbeats of this process's running runs; the age that makes another host's stale
    run_heartbeat: float = RUN_HEARTBEAT_SECONDS
    run_stale_after: float = RUN_STALE_AFTER_SECONDS
    _beats: _RunBeats = field(default_factory=lambda: _RunBeats(), init=False, repr=False, compare=False)

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name

    @property
    def name(self) -> str:
        """The store as shown to people: the SQLite file, or the server URL without its password."""
        return describe_store(self.url)

    @contextmanager
    def begin(self) -> Iterator[Connection]:
        """A write transaction (context manager yielding a Connection; commits on success)."""
        with self._translated(), self.engine.connect() as conn:
            conn.execution_options(drift_write=True)
            with conn.begin():
                yield conn

    @contextmanager
    def connect(self) -> Iterator[Connection]:
        """A connection for reading (its transaction is rolled back on exit unless committed)."""
        with self._translated(), self.engine.connect() as conn:
            yield conn

    def dispose(self) -> None:
        self.engine.dispose()

    @contextmanager
    def _translated(self) -> Iterator[None]:
        try:
            yield
        except sa.exc.DBAPIError as exc:
            err = store_failure(self, exc)
            if err is None:
                raise
            raise err from exc

    # ---------------------------------------------------------------- observations
    def latest_vintages(self, conn: Connection, series: Iterable[str],
                        periods: tuple[date, date] | None = None) -> pd.DataFrame:
        """The latest live vintage and the highest vintage number of every key of the given series (and
        periods from ``periods[0]`` to ``periods[1]``, both included, when given: the unique index's
        (series, period) prefix serves the lookup, so a batch of new periods reads only those, not the
        series' history).

        A key is (series, period, issued_at). ``value`` is that of the highest-numbered vintage that is not
        retracted (NaN when every vintage of the key is retracted); ``vintage`` is the highest number used,
        retracted or not (the next vintage is ``vintage + 1``). (No availability times: reading them costs
        more than the rest of the query on a large store, and comparing values does not need them.)

        Columns: series, period, issued_at, value, vintage.
        """
        series = list(series)
        cols = ["series", "period", "issued_at", "value", "vintage"]
        if not series:
            return pd.DataFrame(columns=cols)
        o = observations
        frames = []
        for chunk in _chunks(series, 500):
            q = sa.select(o.c.series, o.c.period, o.c.issued_at, o.c.value, o.c.vintage,
                          o.c.retracted_at.is_not(None)).where(o.c.series.in_(chunk))
            if periods is not None:
                q = q.where(o.c.period.between(periods[0], periods[1]))
            # plain tuples: pandas probes each Row's attributes, which costs seconds per million rows
            frames.append(pd.DataFrame([tuple(r) for r in conn.execute(q).fetchall()],
                                       columns=[*cols, "retracted"]))
        df = pd.concat(frames, ignore_index=True)
        if df.empty:
            return df[cols]
        keys = ["series", "period", "issued_at"]
        df["issued_at"] = pd.to_datetime(df["issued_at"], utc=True)
        top = df.groupby(keys, dropna=False, sort=False)["vintage"].max().reset_index()
        live = (df[~df["retracted"].astype(bool)].sort_values("vintage")
                .drop_duplicates(keys, keep="last")[["series", "period", "issued_at", "value"]])
        out = top.merge(live, on=keys, how="left", sort=False)
        return out[cols].reset_index(drop=True)

    def load_observations(self, series: Sequence[str], as_of: datetime | None = None, *,
                          ingested: bool = True) -> pd.DataFrame:
        """All vintages of the given series known by ``as_of``: available by then and not retracted by then
        (without ``as_of``: every vintage not retracted).

        One query per :data:`READ_SERIES` series: a check chunk of 500 models reads its observations in one
        round trip, served by the unique index's series prefix. The database returns one row per series,
        its columns aggregated (:func:`observations_as_of_packed`, values exact), parsed by column with no
        Python object per row (a per-row read cost ~7 µs a row, most of a check's reading). A SQLite
        without its math functions, or data the packed form cannot carry exactly, is read row by row
        (:func:`observations_as_of`).

        Columns: series, period (Timestamp), issued_at, value, available_at (tz-aware UTC), ingested_at
        (left out with ``ingested=False``: the check does not read it).
        """
        names = [str(s) for s in dict.fromkeys(series)]
        parts: list[pd.DataFrame] = []
        with self.connect() as conn:
            for chunk in _chunks(names, READ_SERIES):
                got = None
                if _PACKED_READ.get(self.url, conn.dialect.name in ("sqlite", "postgresql")):
                    got = _read_packed(self, conn, chunk, as_of, ingested)
                parts.append(got if got is not None else _read_rows(conn, chunk, as_of))
        return _observation_frame(parts, ingested)

    def last_periods(self, series: Sequence[str], as_of: datetime | None = None) -> dict[str, date]:
        """Latest period with a value per series (known by ``as_of``, as in :meth:`load_observations`)."""
        o = observations
        out: dict[str, date] = {}
        with self.connect() as conn:
            for chunk in _chunks(list(series), 500):
                q = sa.select(o.c.series, sa.func.max(o.c.period)).where(o.c.series.in_(chunk), _known_by(as_of))
                for s, p in conn.execute(q.group_by(o.c.series)):
                    out[s] = p if isinstance(p, date) else date.fromisoformat(str(p))
        return out

    def series_names(self) -> list[str]:
        """Every series name with a stored value (sorted): for the did-you-mean of a series a model names but
        the store does not hold (one pass over the observations' key index; the error path only)."""
        o = observations
        with self.connect() as conn:
            return sorted(str(r[0]) for r in conn.execute(sa.select(o.c.series).distinct()))

    def insert_observations(self, conn: Connection, data: dict[str, np.ndarray],
                            on_chunk: Callable[[int], None] = lambda n: None) -> int:
        """Insert observation rows (columns :data:`OBS_COLUMNS`), skipping any whose key and vintage is
        already stored; returns how many were inserted.

        SQLite: executemany of ``INSERT ... ON CONFLICT DO NOTHING``. PostgreSQL (psycopg 3): ``COPY`` inside a
        savepoint, and only if a row conflicts, ``COPY`` into a temporary table and ``INSERT ... SELECT ... ON
        CONFLICT DO NOTHING``. Each column's bind processing is applied once per distinct value (a few hundred
        periods and publication times) instead of per cell, which is most of the cost of a large batch, and
        keeps the stored format exactly what SQLAlchemy writes. Rows are written sorted by (series, period).
        """
        columns = list(OBS_COLUMNS)
        processed: dict[str, np.ndarray] = {}
        for name in columns:
            values = data[name]
            proc = observations.c[name].type._cached_bind_processor(conn.dialect)
            if proc is None:
                processed[name] = values
                continue
            codes, uniq = pd.factorize(pd.Series(values, dtype=object), use_na_sentinel=True)
            done = np.empty(len(uniq) + 1, dtype=object)
            done[:-1] = [proc(v) for v in uniq]
            done[-1] = None  # code -1: a null
            processed[name] = done[codes]
        n = len(processed["series"])
        if n == 0:
            return 0
        # rows in the order of the unique index (series, period): its inserts become appends instead of
        # jumps across the B-tree (a wide file arrives period by period); 3.5x less CPU for SQLite's inserts
        s_codes, _ = pd.factorize(pd.Series(processed["series"], dtype=object), sort=True)
        p_codes, _ = pd.factorize(pd.Series(processed["period"], dtype=object), sort=True)
        order = np.lexsort((p_codes, s_codes))
        cols = [processed[k][order] for k in columns]
        if conn.dialect.name == "postgresql" and conn.dialect.driver == "psycopg":
            return _copy_observations(conn, columns, cols, on_chunk)
        if conn.dialect.name == "sqlite":
            from sqlalchemy.dialects.sqlite import insert as dialect_insert
        elif conn.dialect.name == "postgresql":
            from sqlalchemy.dialects.postgresql import insert as dialect_insert
        else:  # pragma: no cover - drift supports SQLite and PostgreSQL
            raise StoreError(f"unsupported store dialect {conn.dialect.name}")
        stmt = dialect_insert(observations).on_conflict_do_nothing()
        compiled = stmt.compile(dialect=conn.dialect, column_keys=columns)
        inserted = 0
        if compiled.positional:
            by_name = dict(zip(columns, cols, strict=True))
            order = [by_name[compiled.binds[k].key] for k in compiled.positiontup]  # type: ignore[union-attr]
            for i in range(0, n, INSERT_CHUNK):
                rows = list(zip(*(c[i:i + INSERT_CHUNK].tolist() for c in order), strict=True))
                inserted += max(conn.exec_driver_sql(compiled.string, rows).rowcount, 0)
                on_chunk(len(rows))
        else:
            for i in range(0, n, INSERT_CHUNK):
                parts = [c[i:i + INSERT_CHUNK].tolist() for c in cols]
                rows_d = [dict(zip(columns, r, strict=True)) for r in zip(*parts, strict=True)]
                res = conn.exec_driver_sql(compiled.string, rows_d)
                inserted += max(res.rowcount, 0) if res.rowcount is not None else len(rows_d)
                on_chunk(len(rows_d))
        return inserted

    # ---------------------------------------------------------------- batches
    def find_claim(self, claim: str) -> dict[str, Any] | None:
        """The batch holding a claim (see :meth:`claim_batch`), or None."""
        with self.connect() as conn:
            row = conn.execute(sa.select(batches).where(batches.c.claim == claim)).first()
        return dict(row._mapping) if row is not None else None

    def known_files(self, source: str, settings_hash: str) -> dict[tuple[str, int, int], dict[str, Any]]:
        """The batches of a source that hold their claim under these settings and recorded their file's
        size and modification time, keyed by (file, size, mtime_ns): one query per ingest of a source."""
        b = batches
        q = sa.select(b).where(b.c.source == source, b.c.settings_hash == settings_hash, b.c.claim.is_not(None),
                               b.c.status == "ok", b.c.file_size.is_not(None), b.c.file_mtime_ns.is_not(None))
        with self.connect() as conn:
            rows = [dict(r._mapping) for r in conn.execute(q)]
        return {(r["file"], int(r["file_size"]), int(r["file_mtime_ns"])): r for r in rows}

    def note_file_stat(self, batch_id: int, size: int, mtime_ns: int) -> None:
        """Record the size and modification time under which a batch's file was found unchanged (by its
        content hash), so that the next ingest recognises it without reading it."""
        with self.begin() as conn:
            conn.execute(batches.update().where(batches.c.id == batch_id)
                         .values(file_size=int(size), file_mtime_ns=int(mtime_ns)))

    def claim_batch(self, conn: Connection, *, source: str, file: str, content_hash: str, settings_hash: str,
                    claim: str, started_at: datetime, reread: bool = False, file_size: int | None = None,
                    file_mtime_ns: int | None = None) -> int | None:
        """Start a batch in the open transaction ``conn`` by inserting its row with a unique ``claim``.

        Returns the batch id, or None when another batch holds the claim (this content was already stored
        with these settings, possibly by a process running at the same time: on PostgreSQL the insert waits
        for that transaction to end). Ingests are serialised per store from here to the commit, so the
        latest vintages read next cannot change under this batch: SQLite holds its write lock, PostgreSQL
        takes a transaction-level advisory lock. With ``reread`` the claim is first taken from the batch
        holding it (that batch and its rows stay as they are).
        """
        if conn.dialect.name == "postgresql":
            conn.exec_driver_sql("select pg_advisory_xact_lock(hashtext(current_schema() || '.drift-ingest'))")
        if reread:
            conn.execute(batches.update().where(batches.c.claim == claim).values(claim=None))
        if conn.dialect.name == "sqlite":
            from sqlalchemy.dialects.sqlite import insert as dialect_insert
        else:
            from sqlalchemy.dialects.postgresql import insert as dialect_insert
        stmt = dialect_insert(batches).values(
            source=source, file=file, content_hash=content_hash, settings_hash=settings_hash, claim=claim,
            started_at=started_at, finished_at=None, stored=0, known=0, revised=0, quarantined=0,
            status="running", file_size=file_size, file_mtime_ns=file_mtime_ns).on_conflict_do_nothing()
        if conn.dialect.name == "postgresql":
            row = conn.execute(stmt.returning(batches.c.id)).first()
            return int(row[0]) if row is not None else None
        if conn.execute(stmt).rowcount != 1:  # (no RETURNING here: SQLite before 3.35 lacks it)
            return None
        return int(conn.execute(sa.select(batches.c.id).where(batches.c.claim == claim)).scalar_one())

    def batch_counts(self, conn: Connection, batch_id: int) -> tuple[int, int]:
        """(first vintages, revisions) stored by a batch, counted in the store."""
        o = observations
        rows = conn.execute(sa.select(o.c.vintage > 1, sa.func.count()).where(o.c.batch == batch_id)
                            .group_by(o.c.vintage > 1)).fetchall()
        got = {bool(k): int(v) for k, v in rows}
        return got.get(False, 0), got.get(True, 0)

    def list_batches(self, *, source: str | None = None, limit: int | None = None,
                     ids: Sequence[int] | None = None) -> list[dict[str, Any]]:
        """Batches, newest first (optionally of one source, or with the given ids)."""
        q = sa.select(batches).order_by(batches.c.id.desc())
        if source is not None:
            q = q.where(batches.c.source == source)
        if ids is not None:
            q = q.where(batches.c.id.in_([int(i) for i in ids]))
        if limit is not None:
            q = q.limit(limit)
        with self.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(q)]

    def retract_batches(self, ids: Sequence[int], *, note: str | None = None,
                        when: datetime | None = None) -> dict[int, str]:
        """Mark batches and their observations retracted (nothing is deleted).

        Returns, per id, ``retracted`` or why it was not: ``unknown`` (no such batch), ``already retracted``
        or ``not finished`` (a batch that is still running or failed stored nothing).
        """
        when = when or utcnow()
        out: dict[int, str] = {}
        with self.begin() as conn:
            for bid in ids:
                row = conn.execute(sa.select(batches.c.status, batches.c.retracted_at)
                                   .where(batches.c.id == bid)).first()
                if row is None:
                    out[bid] = "unknown"
                elif row[1] is not None:
                    out[bid] = "already retracted"
                elif row[0] != "ok":
                    out[bid] = "not finished"
                else:
                    conn.execute(batches.update().where(batches.c.id == bid)
                                 .values(retracted_at=when, retract_note=note))
                    conn.execute(observations.update().where(observations.c.batch == bid,
                                                             observations.c.retracted_at.is_(None))
                                 .values(retracted_at=when))
                    out[bid] = "retracted"
        return out

    # ---------------------------------------------------------------- quarantine
    def quarantine_records(self, *, source: str | None = None, include_resolved: bool = False,
                           files: Sequence[str] | None = None) -> list[dict[str, Any]]:
        """Quarantine records (open ones unless ``include_resolved``), by source, file, row and column."""
        q = quarantine
        stmt = sa.select(q).order_by(q.c.source, q.c.file, q.c.row, q.c.column, q.c.id)
        if source is not None:
            stmt = stmt.where(q.c.source == source)
        if not include_resolved:
            stmt = stmt.where(q.c.resolved_at.is_(None))
        if files is not None:
            stmt = stmt.where(q.c.file.in_(list(files)))
        with self.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(stmt)]

    def quarantined_columns(self, columns: Sequence[str]) -> dict[str, tuple[int, int, str]]:
        """Open quarantine records by column (a wide source's column is its series): the number of records
        and the row and reason of the first one, for those of ``columns`` that have any."""
        q = quarantine
        out: dict[str, tuple[int, int, str]] = {}
        with self.connect() as conn:
            for chunk in _chunks(list(columns), 500):
                rows = conn.execute(sa.select(q.c.column, sa.func.count(), sa.func.min(q.c.id))
                                    .where(q.c.column.in_(chunk), q.c.resolved_at.is_(None))
                                    .group_by(q.c.column)).fetchall()
                for col, n, first in rows:
                    rec = conn.execute(sa.select(q.c.row, q.c.reason).where(q.c.id == first)).one()
                    out[str(col)] = (int(n), int(rec.row), str(rec.reason))
        return out

    def open_quarantine(self, conn: Connection, source: str, file: str) -> pd.DataFrame:
        """The open records of one source and file: id, row, column, raw_value, reason."""
        q = quarantine
        rows = conn.execute(sa.select(q.c.id, q.c.row, q.c.column, q.c.raw_value, q.c.reason).where(
            q.c.source == source, q.c.file == file, q.c.resolved_at.is_(None))).fetchall()
        return pd.DataFrame([tuple(r) for r in rows], columns=["id", "row", "column", "raw_value", "reason"])

    def resolve_quarantine(self, conn: Connection, ids: Sequence[int], batch_id: int, when: datetime) -> None:
        """Mark records resolved by a batch that read their file again and no longer quarantined them."""
        for chunk in _chunks([int(i) for i in ids], 500):
            conn.execute(quarantine.update().where(quarantine.c.id.in_(chunk))
                         .values(resolved_at=when, resolved_batch=batch_id))

    # ---------------------------------------------------------------- runs
    def start_run(self, kind: str, *, as_of: date | None = None, job_id: str | None = None,
                  scheduled_for: datetime | None = None, detail: dict[str, Any] | None = None) -> int:
        """Record a run as ``running``, owned by this process (host, pid, process start), and keep its
        heartbeat while it lasts. Running rows of dead or silent processes are first recorded abandoned.

        Inside :meth:`adopting` (the daemon's job), the first run of the adopted kind is the daemon's own
        row: no second row is written, and its end is handed to the daemon (:meth:`finish_run`).
        """
        scope = _RUN_SCOPE.get()
        if scope is not None and scope.store is self and scope.kind == kind and not scope.adopted:
            scope.adopted, scope.as_of, scope.start_detail = True, as_of, dict(detail or {})
            return scope.run_id
        now = utcnow()
        with self.begin() as conn:
            _close_stale(conn, now, self.run_stale_after, note="found when a later run started")
            res = conn.execute(runs.insert().values(
                kind=kind, job_id=job_id, started_at=now, status="running", as_of=as_of,
                scheduled_for=scheduled_for, detail=json.dumps(detail or {}, default=str),
                pid=os.getpid(), host=this_host(), proc_start=process_start(), heartbeat_at=now))
            run_id = int(res.inserted_primary_key[0])
        self._beats.add(self, run_id)
        return run_id

    def finish_run(self, run_id: int, status: str, *, detail: dict[str, Any] | None = None,
                   error: str | None = None, as_of: date | None = None) -> None:
        """Record the end of a run (once it is over, its heartbeat stops, whether or not the write works).

        The end of a run adopted from the daemon (:meth:`adopting`) is kept for the daemon to record.
        """
        scope = _RUN_SCOPE.get()
        if scope is not None and scope.store is self and scope.adopted and scope.run_id == run_id:
            scope.status, scope.detail, scope.error = status, dict(detail or {}), error
            return
        self._beats.discard(run_id)
        now = utcnow()
        values: dict[str, Any] = {"finished_at": now, "status": status, "error": error, "heartbeat_at": now}
        if detail is not None:
            values["detail"] = json.dumps(detail, default=str)
        if as_of is not None:
            values["as_of"] = as_of
        with self.begin() as conn:
            conn.execute(runs.update().where(runs.c.id == run_id).values(**values))

    @contextmanager
    def adopting(self, run_id: int, kind: str) -> Iterator[RunScope]:
        """Within this block (this thread's context), the first :meth:`start_run` of ``kind`` returns
        ``run_id`` instead of writing a second row, and its :meth:`finish_run` is kept in the yielded
        :class:`RunScope` (status, detail, error, as_of) for the caller to record."""
        scope = RunScope(store=self, run_id=run_id, kind=kind)
        token = _RUN_SCOPE.set(scope)
        try:
            yield scope
        finally:
            _RUN_SCOPE.reset(token)

    def close_stale_runs(self, *, note: str | None = None) -> list[dict[str, Any]]:
        """Record every running run whose process is gone as ``abandoned`` (finished_at = now, error = why).

        Gone: on this host, its pid is not running or now names another process (start time differs); on
        another host (or unknown), no heartbeat for :attr:`run_stale_after` seconds. Returns the closed
        runs: ``id``, ``kind``, ``job_id``, ``scheduled_for``, ``why``.
        """
        with self.begin() as conn:
            return _close_stale(conn, utcnow(), self.run_stale_after, note=note)

    def run_stale_reason(self, row: dict[str, Any], *, now: datetime | None = None) -> str | None:
        """Why a ``running`` runs row's process is gone (a sentence), or None while it looks alive."""
        return run_stale_reason(row, now=now or utcnow(), stale_after=self.run_stale_after)

    def record_run(self, kind: str, status: str, *, job_id: str | None = None,
                   scheduled_for: datetime | None = None, detail: dict[str, Any] | None = None,
                   error: str | None = None) -> int:
        """A run that is already over (e.g. a missed schedule)."""
        now = utcnow()
        with self.begin() as conn:
            res = conn.execute(runs.insert().values(
                kind=kind, job_id=job_id, started_at=now, finished_at=now, status=status,
                scheduled_for=scheduled_for, detail=json.dumps(detail or {}, default=str), error=error))
            return int(res.inserted_primary_key[0])

    def recent_runs(self, kind: str | None = None, limit: int = 20) -> list[dict[str, Any]]:
        q = sa.select(runs).order_by(runs.c.id.desc()).limit(limit)
        if kind:
            q = q.where(runs.c.kind == kind)
        with self.connect() as conn:
            return [dict(r._mapping) for r in conn.execute(q)]

    # ---------------------------------------------------------------- verdicts
    def save_verdicts(self, run_id: int, as_of: date, items: Sequence[dict[str, Any]]) -> None:
        """One verdict row per payload, all in one transaction, encoded and inserted :data:`VERDICT_BATCH` at a
        time.

        A payload's ``charts`` mapping (~33 KB of the ~36 KB of JSON a model) goes to the row's ``charts``
        column as :attr:`drift.jsontext.JSONText.stored`: a JSONText's compressed bytes as they are (~8 KB),
        a plain dict encoded and compressed the same way first (:func:`drift.jsontext.stored_text`); the rest
        of the payload is ``payload``, its strict JSON (:func:`_strict_json`). A payload without a charts
        mapping (an error entry) is stored whole, ``charts`` NULL."""
        if not items:
            return
        now = utcnow()
        with self.begin() as conn:
            for part in _chunks(list(items), VERDICT_BATCH):
                rows = []
                for it in part:
                    charts = _stored_charts(it.get("charts"))
                    body = it if charts is None else {k: val for k, val in it.items() if k != "charts"}
                    rows.append({"run": run_id, "model": it["name"], "as_of": as_of, "verdict": it["verdict"],
                                 "payload": _strict_json(body), "charts": charts, "created_at": now})
                conn.execute(verdicts.insert(), rows)

    def latest_verdicts(self, since: datetime | None = None, *, charts: bool = True) -> list[dict[str, Any]]:
        """The newest verdict row per model (optionally only those created since a time), ``payload`` decoded.

        ``charts=True``: a row written with its charts in their own column gets them back as
        ``payload["charts"]``, a :class:`drift.jsontext.JSONText` that decodes nothing until read (a digest
        draws a few models of thousands); a row of schema 6 or earlier has them inside its payload, read as
        they always were. ``charts=False``: the column is not read, and no payload carries ``charts``.
        """
        v = verdicts
        newest = sa.select(v.c.model, sa.func.max(v.c.id).label("mid")).group_by(v.c.model)
        if since is not None:
            newest = newest.where(v.c.created_at >= since)
        sub = newest.subquery()
        cols = [c for c in v.c if c.name != "charts"]
        q = (sa.select(*cols, *([v.c.charts.label("_charts")] if charts else []))
             .join(sub, v.c.id == sub.c.mid).order_by(v.c.model))
        with self.connect() as conn:
            out = []
            for r in conn.execute(q):
                d = dict(r._mapping)
                blob = d.pop("_charts", None)
                payload = json.loads(d["payload"])
                if isinstance(payload, dict):
                    if not charts:
                        payload.pop("charts", None)
                    elif blob is not None:
                        payload["charts"] = JSONText.from_stored(blob)
                d["payload"] = payload
                out.append(d)
            return out


# ---------------------------------------------------------------------------------------- run owners
@dataclass
class RunScope:
    """A run the daemon recorded and a job's own :meth:`Store.start_run` adopts (see :meth:`Store.adopting`).

    After the job: ``adopted`` tells whether the job recorded a run of this kind; ``status``, ``detail``,
    ``error`` are what it would have recorded at its end (None: it did not get there), ``as_of`` and
    ``start_detail`` what it recorded at its start.
    """

    store: Store
    run_id: int
    kind: str
    adopted: bool = False
    as_of: date | None = None
    start_detail: dict[str, Any] = field(default_factory=dict)
    status: str | None = None
    detail: dict[str, Any] | None = None
    error: str | None = None


_RUN_SCOPE: ContextVar[RunScope | None] = ContextVar("drift_run_scope", default=None)


class _RunBeats:
    """The running runs of this process and the one thread that beats them all (one UPDATE per beat)."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.ids: set[int] = set()
        self.pid = os.getpid()
        self.thread: threading.Thread | None = None

    def _mine(self) -> None:
        if self.pid != os.getpid():  # a forked child: the parent's runs and thread are not ours
            self.ids, self.pid, self.thread = set(), os.getpid(), None

    def add(self, store: Store, run_id: int) -> None:
        with self.lock:
            self._mine()
            self.ids.add(run_id)
            if self.thread is None or not self.thread.is_alive():
                self.thread = threading.Thread(target=self._run, args=(store,), name="drift-run-heartbeat",
                                               daemon=True)
                self.thread.start()

    def discard(self, run_id: int) -> None:
        with self.lock:
            self._mine()
            self.ids.discard(run_id)

    def _run(self, store: Store) -> None:
        me = threading.current_thread()
        while True:
            time_to_wait = store.run_heartbeat
            time.sleep(time_to_wait)
            with self.lock:
                if self.thread is not me:
                    return
                ids = sorted(self.ids)
                if not ids:
                    self.thread = None
                    return
            try:
                with store.begin() as conn:
                    conn.execute(runs.update().where(runs.c.id.in_(ids), runs.c.status == "running")
                                 .values(heartbeat_at=utcnow()))
            except Exception as exc:  # noqa: BLE001 - a missed beat is retried at the next one
                log.debug("run heartbeat failed (%s: %s); retrying in %.0f s", exc.__class__.__name__,
                          str(exc).splitlines()[0] if str(exc) else "", time_to_wait)


def run_stale_reason(row: dict[str, Any], *, now: datetime, stale_after: float = RUN_STALE_AFTER_SECONDS,
                     host: str | None = None) -> str | None:
    """Why the process of a ``running`` runs row is gone (a sentence), or None while it looks alive.

    On this host a recorded pid is asked directly (:func:`drift.procs.why_dead`: not running, a zombie, or
    the pid now names a process with another start time), whatever the heartbeat's age: a long write
    transaction of another process may hold back a SQLite heartbeat. Elsewhere, or when the row names no
    process, a heartbeat older than ``stale_after`` seconds.
    """
    host = host or this_host()
    pid = row.get("pid")
    if pid is not None and row.get("host") == host:
        why = why_dead(int(pid), row.get("proc_start"))
        return None if why is None else f"its process {pid} on {host} {why}"
    last = row.get("heartbeat_at") or row.get("started_at")
    age = (now - last).total_seconds() if last is not None else float("inf")
    if age <= stale_after:
        return None
    who = f"pid {pid} on {row.get('host')}" if pid is not None else "its process (not recorded)"
    return f"no heartbeat from {who} for {age:.0f} s (limit {stale_after:.0f} s)"


def _close_stale(conn: Connection, now: datetime, stale_after: float, *,
                 note: str | None = None) -> list[dict[str, Any]]:
    """Record the stale running runs abandoned inside the open write transaction ``conn``."""
    closed = []
    # in id order: two writers closing the same rows lock them in one order (no deadlock on PostgreSQL)
    for r in conn.execute(sa.select(runs).where(runs.c.status == "running").order_by(runs.c.id)).fetchall():
        row = dict(r._mapping)
        why = run_stale_reason(row, now=now, stale_after=stale_after)
        if why is None:
            continue
        last = row.get("heartbeat_at") or row["started_at"]
        error = f"abandoned: {why}; last sign of life {last:%Y-%m-%d %H:%M:%S} UTC" + (f"; {note}" if note else "")
        res = conn.execute(runs.update().where(runs.c.id == row["id"], runs.c.status == "running")
                           .values(status="abandoned", finished_at=now, error=error))
        if res.rowcount == 1:
            log.warning("run %s (%s) recorded abandoned: %s", row["id"], row["kind"], why)
            closed.append({"id": row["id"], "kind": row["kind"], "job_id": row["job_id"],
                           "scheduled_for": row["scheduled_for"], "why": why})
    return closed


def _strict_json(obj: Any) -> str:
    """Strict JSON of a payload: NaN/inf as null (walked only when present: the walk costs more than the
    encoding, and payloads already carry None for missing values).

    With orjson installed (a dependency) it writes the text: float arrays (a chart block has ~3,000) cost
    the standard encoder ~1.4 ms a payload, orjson a tenth of that. Its text differs only in spacing and
    exponent style (``1e-5`` for ``1e-05``), and NaN/inf are null as well: the payload reads back
    identical. A block kept as its JSON text (:class:`drift.jsontext.JSONText`; a verdict's charts go to
    their own column instead, :meth:`Store.save_verdicts`) is spliced in verbatim: that text was written by
    orjson with the same options, so the JSON is what encoding the decoded block would give. Anything orjson
    refuses (an integer beyond 64 bits, an unknown type) goes through the standard encoder as before, which
    decodes such a block."""
    if _orjson is not None:
        try:
            return _orjson.dumps(obj, default=_fragment, option=ORJSON_OPTIONS).decode()
        except TypeError:
            pass
    try:
        return json.dumps(obj, allow_nan=False, default=_decoded)
    except ValueError:
        return json.dumps(_jsonable(obj), allow_nan=False, default=_decoded)


def _stored_charts(charts: Any) -> bytes | None:
    """The ``verdicts.charts`` bytes of a payload's charts block; None when it is not a mapping (absent or
    null: the payload is stored whole)."""
    if not isinstance(charts, Mapping):
        return None
    return stored_text(charts, _strict_json)


def _fragment(obj: Any) -> Any:
    """orjson's ``default=``: a block kept as JSON text goes in as that text."""
    if isinstance(obj, JSONText):
        return _orjson.Fragment(obj.text)
    raise TypeError(f"Type is not JSON serializable: {type(obj).__name__}")


def _decoded(obj: Any) -> Any:
    """The standard encoder's ``default=``: a block kept as JSON text goes in decoded."""
    if isinstance(obj, JSONText):
        return obj.decoded()
    raise TypeError(f"Object of type {type(obj).__name__} is not JSON serializable")


def _jsonable(obj: Any) -> Any:
    """Replace NaN/inf by None so the JSON is strict."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    return obj


def _chunks(seq: list[Any], n: int) -> Iterable[list[Any]]:
    for i in range(0, len(seq), n):
        yield seq[i:i + n]


def open_store(url: str, *, create: bool = True) -> Store:
    """Connect to the store at ``url``, creating the schema if needed and checking its version.

    A SQLite file is created owner-only (mode 0600; SQLite gives its ``-wal`` and ``-shm`` files the same
    mode). URL options: SQLite ``?timeout=SECONDS`` (how long a write waits for another process's write
    lock, default :data:`SQLITE_BUSY_TIMEOUT`); PostgreSQL ``connect_timeout`` and ``application_name``
    (defaults :data:`PG_CONNECT_TIMEOUT`, :data:`PG_APPLICATION_NAME`).

    Raises
    ------
    StoreError
        when the database cannot be reached, or stays locked by another process beyond the timeout.
    SchemaVersionError
        when the store was written by a newer drift (its schema version is higher than ours).
    """
    try:
        parsed = sa.engine.make_url(url)
    except sa.exc.ArgumentError as exc:
        raise StoreError(f"cannot use store URL {_redact(url)}: {exc}") from None
    kwargs: dict[str, Any] = {}
    busy = SQLITE_BUSY_TIMEOUT
    if parsed.get_backend_name() == "sqlite":
        raw = parsed.query.get("timeout")
        if raw is not None:
            try:
                busy = float(raw if isinstance(raw, str) else raw[0])
            except ValueError:
                raise StoreError(f"store URL {_redact(url)}: timeout must be a number of seconds, "
                                 f"got {raw!r}") from None
            if not (busy >= 0 and math.isfinite(busy)):
                raise StoreError(f"store URL {_redact(url)}: timeout must be a non-negative number of seconds")
        path = parsed.database
        if path and path != ":memory:" and not path.startswith("file:"):
            parent = os.path.dirname(path)
            if parent and not os.path.isdir(parent):
                raise StoreError(f"cannot open the SQLite store {path}: folder {parent} does not exist")
            _create_owner_only(path)
        kwargs["connect_args"] = {"timeout": busy}
    else:
        kwargs["pool_pre_ping"] = True
        if parsed.get_backend_name() == "postgresql":
            args: dict[str, Any] = {}
            if "application_name" not in parsed.query:
                args["application_name"] = PG_APPLICATION_NAME
            if "connect_timeout" not in parsed.query:
                args["connect_timeout"] = PG_CONNECT_TIMEOUT
            kwargs["connect_args"] = args
    try:
        engine = sa.create_engine(url, **kwargs)
    except (sa.exc.ArgumentError, ModuleNotFoundError) as exc:
        raise StoreError(f"cannot use store URL {_redact(url)}: {exc}") from None
    if engine.dialect.name == "sqlite":
        sa.event.listen(engine, "connect", _sqlite_connect(int(busy * 1000)))
        sa.event.listen(engine, "begin", _sqlite_begin)
    store = Store(engine=engine, url=url, busy_timeout=busy)
    try:
        # read first: an up-to-date store needs no write lock to open (status works during a long ingest)
        with store.connect() as conn:
            version = _schema_version(conn)
            complete = version is not None and set(metadata.tables) <= set(sa.inspect(conn).get_table_names())
        if version is not None and version > SCHEMA_VERSION:
            raise SchemaVersionError(
                f"the store at {_redact(url)} has schema version {version}, newer than this drift "
                f"understands ({SCHEMA_VERSION}); upgrade drift before using this store")
        older = version is not None and version < SCHEMA_VERSION
        if create and (not complete or older):
            with store.begin() as conn:
                version = _schema_version(conn)
                if version is not None and version < SCHEMA_VERSION:
                    migrate(conn, url)
                metadata.create_all(conn)
                if version is None:
                    conn.execute(meta.insert().values(key="schema_version", value=str(SCHEMA_VERSION)))
    except (SchemaVersionError, StoreError):
        engine.dispose()
        raise
    except sa.exc.SQLAlchemyError as exc:
        engine.dispose()
        raise StoreError(f"cannot open the store at {_redact(url)}: {exc.__class__.__name__}: "
                         f"{str(exc).splitlines()[0]}") from None
    return store


def _schema_version(conn: Connection) -> int | None:
    if not sa.inspect(conn).has_table("meta"):
        return None
    row = conn.execute(sa.select(meta.c.value).where(meta.c.key == "schema_version")).first()
    return int(row[0]) if row else None


def _create_owner_only(path: str) -> None:
    """Create an empty SQLite file readable and writable by its owner only, unless it exists."""
    try:
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    except FileExistsError:
        return
    except OSError as exc:
        raise StoreError(f"cannot create the SQLite store {path}: {exc.strerror}") from None
    os.close(fd)


def describe_store(url: str) -> str:
    """How a store is named in messages: ``the SQLite store /path/drift.db`` or the URL without password."""
    try:
        parsed = sa.engine.make_url(url)
    except Exception:  # noqa: BLE001 - best effort for messages only
        return "the store"
    if parsed.get_backend_name() == "sqlite":
        return f"the SQLite store {parsed.database or ':memory:'}"
    return f"the store at {_redact(url)}"


def store_failure(store: Store, exc: sa.exc.DBAPIError) -> StoreError | None:
    """A :class:`StoreError` for a database error an operator must act on (held lock, lost connection),
    or None for any other error (which is then raised as it is)."""
    first = (str(getattr(exc, "orig", None) or exc).strip().splitlines() or [""])[0][:300]
    if exc.connection_invalidated:
        return StoreError(f"the connection to {store.name} was lost during this step ({first}); the step's "
                          "open transaction was rolled back and the next run reconnects")
    if store.dialect == "sqlite" and isinstance(exc, sa.exc.OperationalError) and any(
            t in first.lower() for t in _SQLITE_BUSY_TEXTS):
        return StoreError(f"{store.name} is locked by another process: its write lock stayed taken for more "
                          f"than {store.busy_timeout:g} s (the busy timeout; '?timeout=SECONDS' in the store "
                          "URL sets it). This step was not written; run it again when the other process is done")
    return None



# ---------------------------------------------------------------------------------------- migrations

def _add_column(conn: Connection, table: sa.Table, name: str) -> None:
    col = table.c[name]
    ddl = f"{col.type.compile(dialect=conn.dialect)}"
    if col.server_default is not None:
        ddl += f" NOT NULL DEFAULT {col.server_default.arg}"  # type: ignore[attr-defined]
    prep = conn.dialect.identifier_preparer
    conn.exec_driver_sql(f"ALTER TABLE {prep.format_table(table)} ADD COLUMN {prep.quote(name)} {ddl}")


def _migrate_1_to_2(conn: Connection, url: str) -> None:
    """Schema 1 -> 2: vintage numbers and the unique key of observations, batch claims and settings,
    retraction, resolved quarantine records.

    Vintages are numbered in the order the old code used to pick the latest one (available_at, then id). A
    row that repeats the value of the vintage before it (left by two ingests that ran at the same time,
    which schema 1 could not prevent) is kept but marked retracted, and counted in the log and in the
    ``meta`` key ``migration_2_repeated_rows``.
    """
    now = utcnow()
    for table, names in ((observations, ("vintage", "retracted_at")),
                         (batches, ("settings_hash", "claim", "retracted_at", "retract_note")),
                         (quarantine, ("resolved_at", "resolved_batch"))):
        for name in names:
            _add_column(conn, table, name)
    key = f"series, period, coalesce(issued_at, '{NO_ISSUE_KEY}')"
    numbered = (f"SELECT id, row_number() OVER w AS rn, "
                f"CASE WHEN value = lag(value) OVER w THEN 1 ELSE 0 END AS repeated FROM observations "
                f"WINDOW w AS (PARTITION BY {key} ORDER BY available_at, id)")
    conn.exec_driver_sql(f"CREATE TEMPORARY TABLE drift_numbered AS {numbered}")
    conn.exec_driver_sql("CREATE INDEX drift_numbered_id ON drift_numbered (id)")
    if conn.dialect.name == "postgresql":
        conn.exec_driver_sql("UPDATE observations o SET vintage = v.rn FROM drift_numbered v "
                             "WHERE o.id = v.id AND v.rn > 1")
    else:
        conn.exec_driver_sql("UPDATE observations SET vintage = (SELECT rn FROM drift_numbered v "
                             "WHERE v.id = observations.id) "
                             "WHERE id IN (SELECT id FROM drift_numbered WHERE rn > 1)")
    repeated = conn.execute(observations.update().where(observations.c.id.in_(
        sa.text("SELECT id FROM drift_numbered WHERE repeated = 1"))).values(retracted_at=now)).rowcount
    conn.exec_driver_sql("DROP TABLE drift_numbered")
    conn.exec_driver_sql("DROP INDEX IF EXISTS ix_obs_series_period")
    OBS_KEY_INDEX.create(conn)
    _unique_claims(conn)
    if repeated:
        log.warning("store %s, migration to schema 2: %d stored rows repeat the value of the vintage before "
                    "them (two ingests ran at the same time); they are kept and marked retracted", _redact(url),
                    repeated)
    conn.execute(meta.insert().values(key="migration_2_repeated_rows", value=str(int(repeated or 0))))


def _unique_claims(conn: Connection) -> None:
    """The unique constraint on ``batches.claim`` (a column added to an existing table gets it as an index)."""
    conn.exec_driver_sql("CREATE UNIQUE INDEX ux_batches_claim ON batches (claim)")


def _migrate_2_to_3(conn: Connection, url: str) -> None:
    """Schema 2 -> 3: the tables of model epochs and alert snoozes (new tables; nothing else changes)."""
    for table in (model_epochs, alert_snoozes):
        table.create(conn, checkfirst=True)


def _migrate_3_to_4(conn: Connection, url: str) -> None:
    """Schema 3 -> 4: ``outbox.recipients`` (what each recipient of a notice answered; NULL on old rows)."""
    inspector = sa.inspect(conn)
    if inspector.has_table("outbox") and "recipients" not in {c["name"] for c in inspector.get_columns("outbox")}:
        _add_column(conn, outbox, "recipients")


def _migrate_4_to_5(conn: Connection, url: str) -> None:
    """Schema 4 -> 5: ``batches.file_size`` and ``batches.file_mtime_ns`` (NULL on old rows: their files are
    recognised by content hash once more, which records them)."""
    have = {c["name"] for c in sa.inspect(conn).get_columns("batches")}
    for name in ("file_size", "file_mtime_ns"):
        if name not in have:
            _add_column(conn, batches, name)


def _migrate_5_to_6(conn: Connection, url: str) -> None:
    """Schema 5 -> 6: each run names its process (``pid``, ``host``, ``proc_start``) and carries a heartbeat
    (``heartbeat_at``, set to ``started_at`` for the runs already there: an old running row then goes stale
    by age); the daemon lock names its holder's process start (``locks.proc_start``); index on
    ``runs.status``. A store from before the runs table existed gets the whole table from ``create_all``."""
    insp = sa.inspect(conn)
    tables = set(insp.get_table_names())
    if "runs" in tables:
        have = {c["name"] for c in insp.get_columns("runs")}
        for name in ("pid", "host", "proc_start", "heartbeat_at"):
            if name not in have:
                _add_column(conn, runs, name)
        conn.execute(runs.update().where(runs.c.heartbeat_at.is_(None)).values(heartbeat_at=runs.c.started_at))
        if "ix_runs_status" not in {i["name"] for i in insp.get_indexes("runs")}:
            conn.exec_driver_sql("CREATE INDEX ix_runs_status ON runs (status)")
    if "locks" in tables and "proc_start" not in {c["name"] for c in insp.get_columns("locks")}:
        _add_column(conn, locks, "proc_start")


def _migrate_6_to_7(conn: Connection, url: str) -> None:
    """Schema 6 -> 7: ``verdicts.charts``, each new row's charts block compressed in its own column and out of
    ``payload`` (NULL on old rows: their charts stay inside ``payload`` and read as before)."""
    inspector = sa.inspect(conn)
    if inspector.has_table("verdicts") and "charts" not in {c["name"] for c in inspector.get_columns("verdicts")}:
        _add_column(conn, verdicts, "charts")


#: schema migrations: from version -> step (each runs in the transaction of :func:`migrate`)
MIGRATIONS: dict[int, Callable[[Connection, str], None]] = {1: _migrate_1_to_2, 2: _migrate_2_to_3,
                                                            3: _migrate_3_to_4, 4: _migrate_4_to_5,
                                                            5: _migrate_5_to_6, 6: _migrate_6_to_7}


def migrate(conn: Connection, url: str) -> int:
    """Bring an older store up to :data:`SCHEMA_VERSION` inside the open transaction ``conn``.

    The first statement writes the version row, so concurrent openers queue behind one migration (SQLite's
    write lock, PostgreSQL's row lock) and find the store up to date when their turn comes. Returns the
    version found. Any failure rolls the whole migration back and is raised as a
    :class:`~drift.exceptions.StoreError` that names the store and says what to do.
    """
    conn.execute(meta.update().where(meta.c.key == "schema_version").values(value=meta.c.value))
    found = int(conn.execute(sa.select(meta.c.value).where(meta.c.key == "schema_version")).scalar_one())
    version = found
    try:
        while version < SCHEMA_VERSION:
            MIGRATIONS[version](conn, url)
            version += 1
            log.info("store %s migrated to schema version %d", _redact(url), version)
    except sa.exc.SQLAlchemyError as exc:
        raise StoreError(
            f"upgrading the store at {_redact(url)} from schema version {found} to {SCHEMA_VERSION} failed "
            f"({exc.__class__.__name__}: {str(exc).splitlines()[0]}); nothing was changed. Keep using the "
            "drift version that wrote it, and report the message") from None
    conn.execute(meta.update().where(meta.c.key == "schema_version").values(value=str(SCHEMA_VERSION)))
    return found


def _redact(url: str) -> str:
    """The URL without its password (never log secrets)."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - best effort for messages only
        return "<store url>"


def owner_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"
