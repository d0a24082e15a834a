"""Ingest orchestration: sources -> readers -> validation -> vintaged writes, one transaction per batch.

A *batch* is one file (CSV, Parquet) or one query result (SQL). For each batch:

1. a file whose name, size and modification time match those recorded by the batch that stored it (with
   the same parsing settings) is skipped without being read; otherwise it is read once and hashed; a file
   whose content this source already stored with the same
   parsing settings (:func:`settings_hash`: the source's keys, the series' calendars and delays, the reader
   version), or stored and then retracted, is skipped without being parsed (its values are counted as
   known) - unless the ingest is a re-read (``reread``);
2. the reader registered for the source kind (:data:`READERS`) returns a raw table, or raises
   :class:`~drift.exceptions.InputError` when the batch cannot be read as a whole - then nothing of it is
   written, it is listed in :attr:`IngestSummary.failed_files` and the other batches still ingest;
3. :func:`drift.ingest.validate.validate` splits the cells into good observations and quarantine records;
4. in one transaction: the batch row claims (source, content, settings) - a unique key, so a concurrent
   ingest of the same file stores nothing and reports it skipped - which also serialises ingests on the
   store; the good cells are merged with the latest live vintage of each (series, period, issued_at): equal
   values are *known* (nothing written), different values are *revised* (the next vintage number) and the
   rest are *stored* (first vintages); observations (inserted so that a key and vintage already stored is
   skipped, never doubled), new quarantine records and the batch's counts are written.

available_at
------------
From the source's ``available_column`` when it has a value (naive times are UTC). Otherwise a first
vintage counts as available at the end of its period (the next period's start, midnight UTC) plus the
series delay; a forecast vintage (``issued_column`` set) at its issue time; a revision, and a value of a
series whose frequency is unknown, at ingest time ``now``.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field, replace
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import sqlalchemy as sa

from drift import progress as bars
from drift.config import Config, SourceConfig
from drift.exceptions import ConfigError, InputError
from drift.ingest.csv import read_csv
from drift.ingest.parquet import read_parquet
from drift.ingest.sql import EPOCH, read_sql, sql_label
from drift.ingest.validate import FileBytes, RawTable, SeriesRules, Validated, read_file, validate
from drift.store import INSERT_CHUNK, Store, batches, observations, quarantine

log = logging.getLogger(__name__)

#: file readers by source kind (the SQL reader takes a ``since`` instead of a path)
READERS: dict[str, Callable[[Path, SourceConfig, FileBytes | None], RawTable]] = {"csv": read_csv, "parquet": read_parquet}
#: bump when a change to the readers or validation would read the same file differently: every file is
#: then read again once (its values compared with what is stored), instead of being skipped as unchanged
READER_VERSION = 2
#: quarantine records per file kept in a summary (the first reasons shown after an ingest)
FIRST_REASONS = 3
#: source keys that do not change how a file's cells are read (left out of the settings hash)
_NOT_PARSING = frozenset({"name", "path", "url", "url_env", "since"})
#: auto progress shows a bar from this many files, or for a batch of this many cells
PROGRESS_FILES = 5
PROGRESS_CELLS = 200_000
#: a wide file of more cells than this is validated and written by groups of series columns (one
#: transaction still): peak memory follows the group, not the file
PART_CELLS = 500_000


@dataclass(frozen=True)
class IngestSummary:
    """What one ingest of a source did.

    Attributes
    ----------
    source : the source name.
    files : batches read (files, or 1 for a query), including skipped and failed ones.
    stored : new values (first vintages) written.
    known : values already stored with the same value (nothing written).
    revised : new vintages of known values (the value differs from the latest stored vintage).
    quarantined : quarantine records written by this ingest (already quarantined ones are not repeated).
    failed_files : (file, message) of every batch that could not be read; nothing of it was written.
    skipped : files whose exact content this source had already stored with the same parsing settings (their
        values counted as known), or had stored and then retracted (see ``skipped_retracted``).
    unavailable : the labels among ``failed_files`` that could not be reached (a query that failed to run, a
        file the system would not read) rather than refused for their content.
    skipped_retracted : of ``skipped``, the files whose batch was retracted (``reread`` reads them again).
    quarantine_files : file -> quarantine records written for it by this ingest.
    quarantine_first : the first records (file, row, column, raw value, reason), at most
        :data:`FIRST_REASONS` per file and ten files' worth in all.
    resolved : earlier quarantine records that this ingest's reading of their file no longer produces (the
        file or the settings were fixed); they are marked resolved, not deleted.
    """

    source: str
    files: int = 0
    stored: int = 0
    known: int = 0
    revised: int = 0
    quarantined: int = 0
    failed_files: list[tuple[str, str]] = field(default_factory=list)
    skipped: int = 0
    unavailable: list[str] = field(default_factory=list)
    skipped_retracted: int = 0
    quarantine_files: dict[str, int] = field(default_factory=dict)
    quarantine_first: list[tuple[str, int, str, str, str]] = field(default_factory=list)
    resolved: int = 0

    def as_dict(self) -> dict[str, Any]:
        """Plain dict (JSON-ready) of the fields."""
        d = asdict(self)
        d["failed_files"] = [list(x) for x in self.failed_files]
        d["quarantine_first"] = [list(x) for x in self.quarantine_first]
        return d

    def quarantine_lines(self, files: int = 3) -> list[str]:
        """Per file with new quarantine records (at most ``files`` files): its count and its first reason."""
        first: dict[str, tuple[str, int, str, str, str]] = {}
        for rec in self.quarantine_first:
            first.setdefault(rec[0], rec)
        out = []
        for f, n in list(self.quarantine_files.items())[:files]:
            line = f"{f}: {n} quarantined"
            if f in first:
                _, row, column, _, reason = first[f]
                line += f", first: row {row}, column '{column}': {reason}"
            out.append(line)
        if len(self.quarantine_files) > files:
            out.append(f"... and {len(self.quarantine_files) - files} more files with quarantined cells")
        return out

    def describe(self) -> str:
        """One sentence for the CLI."""
        s = (f"{self.source}: {self.files} file{'s' if self.files != 1 else ''}, {self.stored} new, "
             f"{self.revised} revised, {self.known} already known, {self.quarantined} quarantined")
        if self.skipped:
            s += f", {self.skipped} unchanged file{'s' if self.skipped != 1 else ''} skipped"
            if self.skipped_retracted:
                s += (f" ({self.skipped_retracted} of them retracted earlier; --reread reads "
                      f"{'them' if self.skipped_retracted != 1 else 'it'} again)")
        if self.resolved:
            s += f", {self.resolved} earlier quarantine record{'s' if self.resolved != 1 else ''} resolved"
        if self.failed_files:
            n = len(self.failed_files)
            s += f"; {n} failed (unreadable, nothing stored from {'them' if n != 1 else 'it'})"
        return s + "."

    def __add__(self, other: IngestSummary) -> IngestSummary:
        return replace(self, files=self.files + other.files, stored=self.stored + other.stored,
                       known=self.known + other.known, revised=self.revised + other.revised,
                       quarantined=self.quarantined + other.quarantined,
                       failed_files=[*self.failed_files, *other.failed_files],
                       skipped=self.skipped + other.skipped,
                       unavailable=[*self.unavailable, *other.unavailable],
                       skipped_retracted=self.skipped_retracted + other.skipped_retracted,
                       quarantine_files={**self.quarantine_files, **other.quarantine_files},
                       quarantine_first=[*self.quarantine_first, *other.quarantine_first][:10 * FIRST_REASONS],
                       resolved=self.resolved + other.resolved)


def ingest_all(cfg: Config, store: Store, *, sources: list[str] | None = None, now: datetime | None = None,
               progress: bool | None = None, reread: bool = False) -> list[IngestSummary]:
    """Ingest every configured source (or the named ones), in config order.

    Parameters
    ----------
    cfg : the configuration.
    store : the open store.
    sources : names of the sources to ingest; None = all.
    now : the ingest time (tz-aware); default the current time. It is the ``ingested_at`` of every row and
        the ``available_at`` of revisions.
    progress : show a rich progress bar on stderr; None = when stderr is a terminal and the ingest is long.
    reread : read every file again even when this content was already stored with these settings (or was
        retracted): its values are compared with the latest live vintages as usual.

    Returns
    -------
    list of IngestSummary
        one per source.

    Raises
    ------
    ConfigError
        when a name in ``sources`` is not a configured source.
    ValueError
        when ``now`` is naive.
    """
    now = _check_now(now)
    with _Progress(progress) as bar:
        run = _Run(store, now, SeriesRules(cfg), bar, reread)
        return [_ingest(cfg, run, s) for s in _choose(cfg, sources)]


def readmit(cfg: Config, store: Store, *, sources: list[str] | None = None, now: datetime | None = None,
            progress: bool | None = None) -> list[IngestSummary]:
    """Read again the files that hold open quarantine records, with the current settings, whatever changed.

    Cells that now pass are stored and their records resolved; the other files are not touched. Query
    (``sql``) sources are left out: a query cannot return an earlier result again. Same parameters and
    errors as :func:`ingest_all`; one summary per file source chosen.
    """
    now = _check_now(now)
    chosen = [s for s in _choose(cfg, sources) if s.kind != "sql"]
    only: dict[str, frozenset[str]] = {}
    for s in chosen:
        only[s.name] = frozenset(r["file"] for r in store.quarantine_records(source=s.name))
    with _Progress(progress) as bar:
        run = _Run(store, now, SeriesRules(cfg), bar, True, only)
        return [_ingest(cfg, run, s) for s in chosen]


def _choose(cfg: Config, sources: list[str] | None) -> list[SourceConfig]:
    if sources is None:
        return list(cfg.sources)
    known = {s.name: s for s in cfg.sources}
    for name in sources:
        if name not in known:
            raise ConfigError(f"no source named '{name}'; configured: {', '.join(known) or 'none'}",
                              file=str(cfg.file) if cfg.file else None, key="sources")
    return [known[n] for n in sources]


def ingest_source(cfg: Config, store: Store, source: str | SourceConfig, *, now: datetime | None = None,
                  progress: bool | None = None, reread: bool = False) -> IngestSummary:
    """Ingest one source (by name or config); see :func:`ingest_all`."""
    name = source if isinstance(source, str) else source.name
    if isinstance(source, SourceConfig) and source not in cfg.sources:
        now = _check_now(now)
        with _Progress(progress) as bar:
            return _ingest(cfg, _Run(store, now, SeriesRules(cfg), bar, reread), source)
    return ingest_all(cfg, store, sources=[name], now=now, progress=progress, reread=reread)[0]


def _check_now(now: datetime | None) -> datetime:
    if now is None:
        return datetime.now(timezone.utc)
    if not isinstance(now, datetime):
        raise TypeError(f"now must be a tz-aware datetime, got {type(now).__name__}")
    if now.tzinfo is None or now.utcoffset() is None:
        raise ValueError("now must be tz-aware (e.g. datetime.now(timezone.utc)), got a naive datetime")
    return now.astimezone(timezone.utc)


@dataclass(frozen=True)
class _Run:
    """What every batch of one ingest shares."""

    store: Store
    now: datetime
    rules: SeriesRules
    bar: _Progress
    reread: bool
    #: per source, the only files to read (None: every file the source's path matches)
    only: dict[str, frozenset[str]] | None = None


def settings_hash(source: SourceConfig, rules: SeriesRules) -> str:
    """Hash of everything that decides how a source's cells become observations: the source's parsing keys,
    the calendars and delays of the configured series, and :data:`READER_VERSION`."""
    keys = source.model_dump(mode="json", exclude=set(_NOT_PARSING))
    blob = json.dumps({"reader": READER_VERSION, "source": keys, "series": rules.fingerprint()},
                      sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()


def claim_key(source: SourceConfig, content_hash: str, settings: str) -> str:
    """The unique claim of a batch: this source, this content, these settings."""
    return hashlib.sha256(f"{source.name}\0{content_hash}\0{settings}".encode()).hexdigest()


# ----------------------------------------------------------------------------------------- per source

def _ingest(cfg: Config, run: _Run, source: SourceConfig) -> IngestSummary:
    total = IngestSummary(source=source.name)
    settings = settings_hash(source, run.rules)
    if source.kind == "sql":
        since = _since(run.store, source)
        log.info("ingesting source %s (query, since %s)", source.name, since.isoformat())
        try:
            raw = read_sql(source, since)
            if not run.reread:
                held = run.store.find_claim(claim_key(source, raw.content_hash, settings))
                if held is not None:  # the query returned exactly what an earlier batch stored
                    return total + _skipped(source, raw.label, held)
            return total + _ingest_batch(run, source, raw, settings)
        except InputError as exc:
            log.warning("source %s: %s", source.name, exc)
            return total + _failed(source, sql_label(source), exc)
    files = cfg.source_files(source)
    if run.only is not None:
        files = [p for p in files if str(p) in run.only.get(source.name, frozenset())]
    elif not files:
        log.warning("source %s: no file matches %s", source.name, source.path)
    if not files:
        return total
    log.info("ingesting source %s: %d file(s)", source.name, len(files))
    reader = READERS[source.kind]
    task = run.bar.task(f"{source.name}", len(files), show=len(files) >= PROGRESS_FILES)
    # files stored before under these settings, by name, size and modification time: one query
    seen = {} if run.reread else run.store.known_files(source.name, settings)
    for path in files:
        try:
            st = _stat(path)
            if st is not None and (str(path), *st) in seen:  # unchanged since it was stored: not even read
                total = total + _skipped(source, str(path), seen[(str(path), *st)])
                continue
            file = read_file(path)  # read once: hashed for the check below, then parsed
            if not run.reread:
                held = run.store.find_claim(claim_key(source, file.digest, settings))
                if held is not None:
                    if st is not None and held["file"] == str(path) and held["status"] == "ok":
                        run.store.note_file_stat(held["id"], *st)  # touched, same content: remember it
                    total = total + _skipped(source, str(path), held)
                    continue
            raw = reader(path, source, file)
            total = total + _ingest_batch(run, source, raw, settings, st)
        except InputError as exc:
            log.warning("source %s: %s", source.name, exc)
            total = total + _failed(source, str(path), exc)
        finally:
            run.bar.advance(task)
    return total


def _stat(path: Path) -> tuple[int, int] | None:
    """(size, modification time in ns) of a file, or None when it cannot be stat'ed (read_file says why)."""
    try:
        st = path.stat()
    except OSError:
        return None
    return int(st.st_size), int(st.st_mtime_ns)


def _skipped(source: SourceConfig, label: str, held: dict[str, Any]) -> IngestSummary:
    """A file whose content was stored (or retracted) with the same settings: not parsed again."""
    values = int((held["stored"] or 0) + (held["known"] or 0) + (held["revised"] or 0))
    if held.get("retracted_at") is not None:
        log.info("source %s: %s was retracted (batch %s) and has not changed, skipped", source.name, label,
                 held["id"])
        return IngestSummary(source.name, files=1, skipped=1, skipped_retracted=1)
    log.info("source %s: %s already ingested with this content and these settings (batch %s), skipped",
             source.name, label, held["id"])
    return IngestSummary(source.name, files=1, known=values, skipped=1)


def _failed(source: SourceConfig, label: str, exc: InputError) -> IngestSummary:
    return IngestSummary(source.name, files=1, failed_files=[(label, str(exc))],
                         unavailable=[label] if exc.unavailable else [])


def _since(store: Store, source: SourceConfig) -> datetime:
    """Lower bound bound to ``:since``: latest ingested_at of the source, else ``since``, else the epoch."""
    o = observations
    with store.connect() as conn:
        last = conn.execute(sa.select(sa.func.max(o.c.ingested_at)).where(o.c.source == source.name)).scalar()
    if last is not None:
        return last if isinstance(last, datetime) and last.tzinfo else _as_utc(pd.Timestamp(last))
    if source.since:
        try:
            return _as_utc(pd.Timestamp(source.since))
        except ValueError:
            raise ConfigError(f"since '{source.since}' is not a date or time (ISO 8601)",
                              key=f"sources[{source.name}].since") from None
    return EPOCH


def _as_utc(ts: pd.Timestamp) -> datetime:
    ts = ts.tz_localize("UTC") if ts.tzinfo is None else ts.tz_convert("UTC")
    return ts.to_pydatetime()


# ----------------------------------------------------------------------------------------- per batch

def _ingest_batch(run: _Run, source: SourceConfig, raw: RawTable, settings: str,
                  stat: tuple[int, int] | None = None) -> IngestSummary:
    """Validate a batch, then claim it and store it in one transaction (see the module docstring)."""
    t0 = time.monotonic()
    store, now, bar = run.store, run.now, run.bar
    parts = _column_parts(raw, source)
    # one part (most files): validated before the claim, so the store's write lock is held only to write
    first: Validated | None = validate(parts[0], source, run.rules) if len(parts) == 1 else None
    claim = claim_key(source, raw.content_hash, settings)
    with store.begin() as conn:
        batch_id = store.claim_batch(conn, source=source.name, file=raw.label, content_hash=raw.content_hash,
                                     settings_hash=settings, claim=claim, started_at=now, reread=run.reread,
                                     file_size=stat[0] if stat else None, file_mtime_ns=stat[1] if stat else None)
        if batch_id is None:
            log.info("source %s: %s was stored by another ingest running at the same time, skipped",
                     source.name, raw.label)
            known = len(first.good) if first is not None else sum(len(validate(p, source, run.rules).good)
                                                                  for p in parts)
            return IngestSummary(source.name, files=1, known=known, skipped=1)
        cells = int(raw.frame.shape[0]) * max(int(raw.frame.shape[1]) - 1, 1)
        task = bar.task(f"{source.name}: {Path(raw.label).name}", cells, show=cells >= PROGRESS_CELLS)
        n_known = n_revised = n_new = 0
        short = False
        qframes: list[pd.DataFrame] = []
        # a large wide file streams through validate -> classify -> insert by groups of series columns,
        # inside this one transaction: memory follows the group, and the file is still stored whole or not
        for part in parts:
            checked = first if first is not None else validate(part, source, run.rules)
            good = checked.good
            qframes.append(checked.quarantine)
            latest = None
            if len(good):  # the keys of the incoming periods only (a daily file reads one period, not the history)
                span = pd.to_datetime(good["period"])
                latest = store.latest_vintages(conn, pd.unique(good["series"]).tolist(),
                                               (span.min().date(), span.max().date()))
            new, k, r = _classify(good, latest, now, run.rules.forward)
            del good, latest, checked
            n_known += k
            n_revised += r
            n_new += len(new)
            if len(new):
                inserted = store.insert_observations(conn, _observation_columns(new, source.name, batch_id, now),
                                                     lambda k: bar.advance(task, k))
                if inserted < len(new):
                    # another writer stored some of these keys and vintages first (the database refused the
                    # copies): count what this batch really stored
                    log.warning("source %s, %s: %d values were already stored by a concurrent writer and were "
                                "skipped", source.name, raw.label, len(new) - inserted)
                    n_known += len(new) - inserted
                    short = True
            del new
        n_stored = n_new - n_revised
        if short:
            n_stored, n_revised = store.batch_counts(conn, batch_id)
        # row-level records (a bad period) repeat in every group of columns: kept once
        qall = qframes[0] if len(qframes) == 1 else pd.concat(qframes, ignore_index=True).drop_duplicates(
            ignore_index=True)
        qrows, resolve = _quarantine_delta(conn, store, source, raw.label, qall)
        if len(qrows):
            recs = [{"batch": batch_id, "source": source.name, "file": raw.label, "row": int(r.row),
                     "column": r.column, "raw_value": r.raw_value, "reason": r.reason, "created_at": now}
                    for r in qrows.itertuples(index=False)]
            for i in range(0, len(recs), INSERT_CHUNK):
                conn.execute(quarantine.insert(), recs[i:i + INSERT_CHUNK])
                bar.advance(task, len(recs[i:i + INSERT_CHUNK]))
        if resolve:
            store.resolve_quarantine(conn, resolve, batch_id, now)
        conn.execute(batches.update().where(batches.c.id == batch_id).values(
            finished_at=now + timedelta(seconds=time.monotonic() - t0), stored=n_stored, known=n_known,
            revised=n_revised, quarantined=len(qrows), status="ok"))
    log.info("source %s, %s: %d new, %d revised, %d known, %d quarantined (%.2fs)", source.name, raw.label,
             n_stored, n_revised, n_known, len(qrows), time.monotonic() - t0)
    first = [(raw.label, int(r.row), str(r.column), str(r.raw_value), str(r.reason))
             for r in qrows.head(FIRST_REASONS).itertuples(index=False)]
    return IngestSummary(source.name, files=1, stored=n_stored, known=n_known, revised=n_revised,
                         quarantined=len(qrows), quarantine_files={raw.label: len(qrows)} if len(qrows) else {},
                         quarantine_first=first, resolved=len(resolve))


def _column_parts(raw: RawTable, source: SourceConfig) -> list[RawTable]:
    """A wide table of more than :data:`PART_CELLS` cells as groups of its series columns (each with the
    period / available / issued columns), so that validation and writing hold one group at a time; other
    tables whole. A series is one column, so no key spans two groups."""
    frame = raw.frame
    if source.long_format or frame.size <= PART_CELLS:
        return [raw]
    keep = [c for c in (source.period_column, source.available_column, source.issued_column)
            if c is not None and c in frame.columns]
    values = [c for c in frame.columns if c not in keep]
    per = max(1, PART_CELLS // max(len(frame), 1))
    if len(values) <= per:
        return [raw]
    out = []
    for i in range(0, len(values), per):
        cols = keep + values[i:i + per]
        out.append(replace(raw, frame=frame[cols], empty={c: m for c, m in raw.empty.items() if c in cols},
                           unnamed=frozenset(u for u in raw.unnamed if u in cols)))
    return out


def _classify(good: pd.DataFrame, latest: pd.DataFrame | None, now: datetime,
              forward_series: frozenset[str] = frozenset()) -> tuple[pd.DataFrame, int, int]:
    """The rows to write (with their available_at, vintage number and a ``revised`` flag), and the known /
    revised counts.

    A value equal to the latest live vintage of its key is known; a different one, or any value of a key
    whose vintages were all retracted, is a revision (vintage number one past the highest used, available
    when ingested); a key never stored gets its first vintage (available at its period's end plus the
    delay).
    """
    if good.empty:
        return good.assign(revised=np.zeros(0, dtype=bool), vintage=np.zeros(0, dtype=np.int64)), 0, 0
    g = good.copy()
    g["_p"] = _period_key(g["period"])
    g["_i"] = _issued_key(g["issued_at"])
    if latest is not None and len(latest):
        lv = pd.DataFrame({"series": latest["series"].astype(object).to_numpy(),
                           "_p": _period_key(latest["period"]), "_i": _issued_key(latest["issued_at"]),
                           "_old": latest["value"].astype(np.float64).to_numpy(),
                           "_top": latest["vintage"].astype(np.int64).to_numpy()})
        g = g.merge(lv, on=["series", "_p", "_i"], how="left", sort=False)
    else:
        g["_old"] = np.nan
        g["_top"] = np.nan
    seen = g["_old"].notna().to_numpy()
    same = seen & (g["_old"].to_numpy() == g["value"].to_numpy())
    # a key with history but no live vintage (all retracted) gets a correction: like a revision, it becomes
    # known when ingested, so as-of queries before now still see what was known then
    revised = g["_top"].notna().to_numpy() & ~same
    out = g.loc[~same].copy()
    rev = revised[~same]
    now_ts = pd.Timestamp(now)
    default = out["default_available_at"].copy()
    is_fc = out["issued_at"].notna().to_numpy()
    default[is_fc] = out["issued_at"][is_fc]
    default = default.fillna(now_ts)
    # a plan (or a forecast without an issue time) of a period that has not ended yet cannot wait for its
    # period's end: it is available from when it was ingested
    forward = out["series"].isin(forward_series).to_numpy() & (default > now_ts).to_numpy()
    default[forward] = now_ts
    default[rev] = now_ts
    out["available_at"] = out["available_at"].fillna(default) if len(out) else out["available_at"]
    out["revised"] = rev
    out["vintage"] = out["_top"].fillna(0).to_numpy(dtype=np.int64) + 1
    return out.drop(columns=["_p", "_i", "_old", "_top"]), int(same.sum()), int(revised.sum())


def _period_key(col: pd.Series) -> np.ndarray:
    """Days since the epoch of a period column (datetime64 or date objects)."""
    return pd.to_datetime(pd.Series(col)).to_numpy(dtype="datetime64[D]").astype(np.int64)


def _issued_key(col: pd.Series) -> np.ndarray:
    """Microseconds since the epoch of issued_at (UTC); int64 min where there is none."""
    return np.asarray(pd.DatetimeIndex(pd.to_datetime(pd.Series(col), utc=True)).as_unit("us").asi8,
                      dtype=np.int64)


def _observation_columns(new: pd.DataFrame, source: str, batch_id: int, now: datetime) -> dict[str, np.ndarray]:
    n = len(new)
    return {
        "series": new["series"].to_numpy(dtype=object),
        "period": _python_values(pd.DatetimeIndex(new["period"]), dates=True),
        "issued_at": _python_values(pd.DatetimeIndex(new["issued_at"])),
        "value": new["value"].to_numpy(dtype=np.float64).astype(object),
        "available_at": _python_values(pd.DatetimeIndex(new["available_at"])),
        "ingested_at": np.full(n, now, dtype=object),
        "source": np.full(n, source, dtype=object),
        "batch": np.full(n, batch_id, dtype=object),
        "vintage": new["vintage"].to_numpy(dtype=np.int64).astype(object),
    }


def _python_values(idx: pd.DatetimeIndex, *, dates: bool = False) -> np.ndarray:
    """Python datetimes (or dates) per row, None for NaT, converting each distinct value once."""
    codes, uniq = pd.factorize(idx, use_na_sentinel=True)
    done = np.empty(len(uniq) + 1, dtype=object)
    done[:-1] = list(pd.DatetimeIndex(uniq).date) if dates else list(pd.DatetimeIndex(uniq).to_pydatetime())
    done[-1] = None
    return done[codes]


_QKEY = ["row", "column", "raw_value", "reason"]


def _quarantine_delta(conn: Any, store: Store, source: SourceConfig, label: str, records: pd.DataFrame
                      ) -> tuple[pd.DataFrame, list[int]]:
    """(records to write, open records to resolve) for a batch of one source and file.

    A record already open for this source and file (same row, column, raw value and reason) is not written
    again. An open record this read no longer produces - the file or the settings were fixed - is resolved;
    only for files, since a query returns just what changed.
    """
    old = store.open_quarantine(conn, source.name, label)
    if old.empty:
        return records, []
    old = old.assign(row=old["row"].astype(np.int64))
    if records.empty:
        gone = old
        fresh = records
    else:
        m = records.merge(old[_QKEY].drop_duplicates(), on=_QKEY, how="left", indicator=True)
        fresh = records.loc[(m["_merge"] == "left_only").to_numpy()].reset_index(drop=True)
        g = old.merge(records[_QKEY].drop_duplicates(), on=_QKEY, how="left", indicator=True)
        gone = old.loc[(g["_merge"] == "left_only").to_numpy()]
    resolve = [] if source.kind == "sql" else [int(i) for i in gone["id"]]
    return fresh, resolve


# ----------------------------------------------------------------------------------------- progress

class _Progress:
    """A rich progress bar on stderr, started only when wanted (auto: stderr is a terminal)."""

    def __init__(self, enabled: bool | None) -> None:
        self._enabled = enabled
        self._bar: Any = None

    def __enter__(self) -> _Progress:  # noqa: PYI034
        return self

    def __exit__(self, *exc: object) -> None:
        if self._bar is not None:
            self._bar.stop()
            self._bar = None

    def _want(self, show: bool) -> bool:
        if self._enabled is None:
            return show and bars.stderr_is_terminal()
        return self._enabled

    def task(self, description: str, total: int, *, show: bool) -> int | None:
        if not self._want(show) or total <= 0:
            return None
        if self._bar is None:
            from rich.console import Console
            from rich.progress import Progress

            self._bar = Progress(console=Console(stderr=True, force_terminal=True), transient=True)  # as check's
            self._bar.start()
        return int(self._bar.add_task(description, total=total))

    def advance(self, task: int | None, n: int = 1) -> None:
        if task is not None and self._bar is not None:
            self._bar.advance(task, n)


__all__: Sequence[str] = ["READERS", "IngestSummary", "ingest_all", "ingest_source", "readmit"]
