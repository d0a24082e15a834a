"""SQL reader: run a source's query (SQLAlchemy) and hand its result over as one batch.

The URL comes from ``url`` or from the environment variable named by ``url_env`` (so secrets stay out
of the config). The query text may use the bound parameter ``:since`` - a naive UTC timestamp: the latest
``ingested_at`` of this source in the store, else the configured ``since``, else 1970-01-01 - to fetch
only what changed. The result has the same wide or long layout as a file. Rows are numbered from 1 (the
first result row); the batch's label is ``sql:<source name>``. A query that fails raises
:class:`InputError`; the URL is never shown with its password.
"""

from __future__ import annotations

import hashlib
import logging
import os
from datetime import datetime, timezone

import numpy as np
import pandas as pd
import sqlalchemy as sa

from drift.config import SourceConfig
from drift.exceptions import InputError
from drift.ingest.validate import RawTable

log = logging.getLogger(__name__)

EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)


def sql_label(source: SourceConfig) -> str:
    """The name a SQL source's batches carry in messages, batches and quarantine rows."""
    return f"sql:{source.name}"


def source_url(source: SourceConfig) -> str:
    """The SQLAlchemy URL of a SQL source (from ``url`` or the variable ``url_env``).

    Raises
    ------
    InputError
        when ``url_env`` names a variable that is not set.
    """
    if source.url:
        return source.url
    assert source.url_env is not None  # validated config
    value = os.environ.get(source.url_env)
    if not value:
        raise InputError(f"environment variable {source.url_env} (named by 'url_env') is not set",
                         file=sql_label(source))
    return value


def redact(url: str) -> str:
    """The URL without its password (for messages and logs)."""
    try:
        return sa.engine.make_url(url).render_as_string(hide_password=True)
    except Exception:  # noqa: BLE001 - best effort for messages only
        return "<url>"


def read_sql(source: SourceConfig, since: datetime) -> RawTable:
    """Run a SQL source's query with ``since`` bound, and return its result as a raw table.

    Parameters
    ----------
    source : a ``kind: sql`` source.
    since : tz-aware; bound (as naive UTC) to ``:since`` when the query uses it.

    Returns
    -------
    RawTable
        typed cells as the driver returns them, null masks for every column, ``first_row=1``; the content
        hash is taken over the result rows.

    Raises
    ------
    InputError
        when the URL is missing or unusable, or the query fails.
    """
    label = sql_label(source)
    url = source_url(source)
    assert source.query is not None  # validated config
    stmt = sa.text(source.query)
    params: dict[str, object] = {}
    if "since" in stmt._bindparams:
        stmt = stmt.bindparams(sa.bindparam("since", type_=sa.DateTime()))
        params["since"] = since.astimezone(timezone.utc).replace(tzinfo=None)
    try:
        engine = sa.create_engine(url)
    except (sa.exc.ArgumentError, ModuleNotFoundError) as exc:
        raise InputError(f"cannot use the URL {redact(url)}: {exc}", file=label) from None
    try:
        with engine.connect() as conn:
            result = conn.execute(stmt, params)
            names = [str(k) for k in result.keys()]  # noqa: SIM118 - a SQLAlchemy Result, not a dict
            rows = result.fetchall()
    except sa.exc.SQLAlchemyError as exc:
        first = str(getattr(exc, "orig", None) or exc).splitlines()[0]
        raise InputError(f"the query failed on {redact(url)}: {exc.__class__.__name__}: {first}",
                         file=label, unavailable=True) from None
    finally:
        engine.dispose()
    dup = {n for n in names if names.count(n) > 1}
    if dup:
        raise InputError(f"the query returns column '{min(dup)}' twice", file=label,
                         column=min(dup))
    columns: dict[str, np.ndarray] = {}
    empty: dict[str, np.ndarray] = {}
    for j, name in enumerate(names):
        col = np.empty(len(rows), dtype=object)
        col[:] = [r[j] for r in rows]
        columns[name] = col
        empty[name] = np.fromiter(
            (v is None or (isinstance(v, str) and not v.strip()) for v in col), dtype=bool, count=len(col))
    frame = pd.DataFrame({n: pd.Series(c, dtype=object) for n, c in columns.items()}, columns=names)
    digest = hashlib.sha256()
    digest.update(repr(names).encode())
    for r in rows:
        digest.update(repr(tuple(r)).encode())
    log.debug("query of source %s returned %d rows (since %s)", source.name, len(rows), since.isoformat())
    return RawTable(label=label, content_hash=digest.hexdigest(), frame=frame, first_row=1, empty=empty)
