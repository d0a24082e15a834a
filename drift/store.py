"""The store: one schema through SQLAlchemy Core, SQLite by default (WAL), PostgreSQL by URL.

Every observation carries ``period`` (the first day of the period it describes), ``available_at`` (when it
could first be known, UTC) and, for driver forecasts, ``issued_at`` (when the forecast was issued). A
revised value is a new row (a vintage), never an overwrite. Nothing is ever deleted by a run.

Timestamps are stored as naive UTC and handed out tz-aware (UTC), on every backend.
"""

from __future__ import annotations

import json
import logging
import math
import os
import socket
from collections.abc import Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import date, datetime, timezone
from typing import Any

import pandas as pd
import sqlalchemy as sa
from sqlalchemy.engine import Connection, Engine

from drift.exceptions import SchemaVersionError, StoreError

log = logging.getLogger(__name__)

#: bump when the schema changes; older code refuses a newer store
SCHEMA_VERSION = 1


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
)
sa.Index("ix_obs_series_period", observations.c.series, observations.c.period, observations.c.available_at)

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
)

runs = sa.Table(
    "runs", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("kind", sa.String(40), nullable=False),
    sa.Column("job_id", sa.String(100)),
    sa.Column("started_at", UTCDateTime, nullable=False),
    sa.Column("finished_at", UTCDateTime),
    sa.Column("status", sa.String(20), nullable=False),  # running | ok | failed | missed | timeout | abandoned
    sa.Column("as_of", sa.Date),
    sa.Column("scheduled_for", UTCDateTime),
    sa.Column("detail", sa.Text),
    sa.Column("error", sa.Text),
)
sa.Index("ix_runs_kind", runs.c.kind, runs.c.started_at)

verdicts = sa.Table(
    "verdicts", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("run", sa.Integer, sa.ForeignKey("runs.id"), nullable=False),
    sa.Column("model", sa.String(200), nullable=False),
    sa.Column("as_of", sa.Date, nullable=False),
    sa.Column("verdict", sa.String(20), nullable=False),
    sa.Column("payload", sa.Text, nullable=False),
    sa.Column("created_at", UTCDateTime, nullable=False),
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
    sa.Column("status", sa.String(20), nullable=False),  # pending | sending | sent | uncertain | dead
    sa.Column("attempts", sa.Integer, nullable=False, default=0),
    sa.Column("next_attempt_at", UTCDateTime, nullable=False),
    sa.Column("last_error", sa.Text),
    sa.Column("created_at", UTCDateTime, nullable=False),
    sa.Column("sent_at", UTCDateTime),
)

locks = sa.Table(
    "locks", metadata,
    sa.Column("name", sa.String(100), primary_key=True),
    sa.Column("owner", sa.String(300), nullable=False),
    sa.Column("pid", sa.Integer, nullable=False),
    sa.Column("host", sa.String(200), nullable=False),
    sa.Column("acquired_at", UTCDateTime, nullable=False),
    sa.Column("heartbeat_at", UTCDateTime, nullable=False),
)


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
    def latest_vintages(self, conn: Connection, series: Iterable[str]) -> pd.DataFrame:
        """Latest stored vintage of every (series, period, issued_at) for the given series."""
        series = list(series)
        cols = ["series", "period", "issued_at", "value", "available_at"]
        if not series:
            return pd.DataFrame(columns=cols)
        o = observations
        frames = []
        for chunk in _chunks(series, 500):
            q = sa.select(o.c.series, o.c.period, o.c.issued_at, o.c.value, o.c.available_at, o.c.id).where(
                o.c.series.in_(chunk))
            # plain tuples: pandas probes each Row's attributes, which costs seconds per million rows
            frames.append(pd.DataFrame([tuple(r) for r in conn.execute(q).fetchall()], columns=[*cols, "id"]))
        df = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(columns=[*cols, "id"])
        if df.empty:
            return df[cols]
        df = df.sort_values(["available_at", "id"]).drop_duplicates(
            ["series", "period", "issued_at"], keep="last")
        return df[cols].reset_index(drop=True)

    def load_observations(self, series: Sequence[str], as_of: datetime | None = None) -> pd.DataFrame:
        """All vintages of the given series known by ``as_of`` (available_at <= as_of).

        Columns: series, period (Timestamp), issued_at, value, available_at (tz-aware UTC), ingested_at.
        """
        o = observations
        frames = []
        with self.connect() as conn:
            for chunk in _chunks(list(series), 500):
                q = sa.select(o.c.series, o.c.period, o.c.issued_at, o.c.value, o.c.available_at,
                              o.c.ingested_at).where(o.c.series.in_(chunk))
                if as_of is not None:
                    q = q.where(o.c.available_at <= as_of)
                # plain tuples: pandas inspects SQLAlchemy Row objects attribute by attribute (slow)
                frames.append(pd.DataFrame([tuple(r) for r in conn.execute(q).fetchall()],
                                           columns=["series", "period", "issued_at", "value", "available_at",
                                                    "ingested_at"]))
        df = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(
            columns=["series", "period", "issued_at", "value", "available_at", "ingested_at"])
        df["period"] = pd.to_datetime(df["period"])
        for c in ("available_at", "issued_at", "ingested_at"):
            df[c] = pd.to_datetime(df[c], utc=True)
        df["value"] = df["value"].astype(float)
        return df

    def last_periods(self, series: Sequence[str], as_of: datetime | None = None) -> dict[str, date]:
        """Latest period with a value per series (known by ``as_of``)."""
        o = observations
        out: dict[str, date] = {}
        with self.connect() as conn:
            for chunk in _chunks(list(series), 500):
                q = sa.select(o.c.series, sa.func.max(o.c.period)).where(o.c.series.in_(chunk))
                if as_of is not None:
                    q = q.where(o.c.available_at <= as_of)
                for s, p in conn.execute(q.group_by(o.c.series)):
                    out[s] = p if isinstance(p, date) else date.fromisoformat(str(p))
        return out

    # ---------------------------------------------------------------- runs
    def start_run(self, kind: str, *, as_of: date | None = None, job_id: str | None = None,
                  scheduled_for: datetime | None = None, detail: dict[str, Any] | None = None) -> int:
        with self.begin() as conn:
            res = conn.execute(runs.insert().values(
                kind=kind, job_id=job_id, started_at=utcnow(), status="running", as_of=as_of,
                scheduled_for=scheduled_for, detail=json.dumps(detail or {}, default=str)))
            return int(res.inserted_primary_key[0])

    def finish_run(self, run_id: int, status: str, *, detail: dict[str, Any] | None = None,
                   error: str | None = None) -> None:
        values: dict[str, Any] = {"finished_at": utcnow(), "status": status, "error": error}
        if detail is not None:
            values["detail"] = json.dumps(detail, default=str)
        with self.begin() as conn:
            conn.execute(runs.update().where(runs.c.id == run_id).values(**values))

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
        now = utcnow()
        rows = [{"run": run_id, "model": it["name"], "as_of": as_of, "verdict": it["verdict"],
                 "payload": json.dumps(_jsonable(it), allow_nan=False), "created_at": now} for it in items]
        if rows:
            with self.begin() as conn:
                conn.execute(verdicts.insert(), rows)

    def latest_verdicts(self, since: datetime | None = None) -> list[dict[str, Any]]:
        """The newest verdict row per model (optionally only those created since a time)."""
        v = verdicts
        newest = sa.select(v.c.model, sa.func.max(v.c.id).label("mid")).group_by(v.c.model)
        if since is not None:
            newest = newest.where(v.c.created_at >= since)
        sub = newest.subquery()
        q = sa.select(v).join(sub, v.c.id == sub.c.mid).order_by(v.c.model)
        with self.connect() as conn:
            out = []
            for r in conn.execute(q):
                d = dict(r._mapping)
                d["payload"] = json.loads(d["payload"])
                out.append(d)
            return out


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
        if create and not complete:
            with store.begin() as conn:
                version = _schema_version(conn)
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


def _redact(url: str) -> str:
    """The URL without its password (never log secrets)."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - best effort for messages only
        return "<store url>"


def owner_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}"
