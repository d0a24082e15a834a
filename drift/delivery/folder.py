"""Folder sink: one JSON line per notice in ``<path>/alerts.jsonl``, plus a page per run.

Appending is atomic and idempotent: under a lock (``alerts.jsonl.lock``) the file is scanned for the
notice's key; only if absent is the line written with ``os.open(O_APPEND)``, one ``write`` and ``fsync``.
So a row found "sending" after a crash can simply be sent again (``idempotent = True``).

After each delivery round, the pages ``<path>/run-<as_of>-<run_id>.md`` and ``.html`` of every run that got
new lines are rewritten (atomically, via a temporary file and ``os.replace``) from the lines of that run in
``alerts.jsonl``: the file is the record, the pages are views of it. ``path`` is relative to the config
file.

Staying inside the folder
    Every file is created directly in the folder, under a fixed name or a page name built from the as-of
    date and run id with anything but ``[A-Za-z0-9_.-]`` replaced (so ``../../x`` or ``/etc/x`` in a value
    cannot name another place), and the final path is checked to sit in the folder. Files are opened with
    ``O_NOFOLLOW``: a symbolic link planted in the folder under one of these names is refused (the row stays
    pending, with the reason), never followed; a page replaces a link by a file instead of writing through
    it. The folder is created ``0700`` and every file ``0600``: alert contents are for the owner only. (The
    configured folder itself may be a link: that is the operator's choice.)
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import re
import time
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

try:  # POSIX: an flock on a lock file opened without following links
    import fcntl
except ImportError:  # pragma: no cover - not POSIX: the filelock package's lock
    fcntl = None  # type: ignore[assignment]

from drift.config import Config, FolderChannel
from drift.delivery.messages import render_page
from drift.delivery.outbox import Channel, DeliveryError, OutboxMessage, register_channel

#: how long to wait for another process's lock on alerts.jsonl before giving up for this round (seconds)
LOCK_TIMEOUT = 30.0
JSONL = "alerts.jsonl"
_SAFE = re.compile(r"[^A-Za-z0-9_.-]+")
#: modes of what the sink creates: alert contents are for the owner only
FOLDER_MODE, FILE_MODE = 0o700, 0o600
_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0)
_LOCK_POLL = 0.05


class LockTimeout(Exception):
    """Another process held the folder's lock for longer than :data:`LOCK_TIMEOUT`."""


@contextlib.contextmanager
def _locked(path: Path, timeout: float) -> Iterator[None]:
    """An exclusive lock on ``path`` (created 0600, never through a symbolic link)."""
    if fcntl is None:  # pragma: no cover - not POSIX
        import filelock

        try:
            with filelock.FileLock(str(path), timeout=timeout):
                yield
        except filelock.Timeout:
            raise LockTimeout(str(path)) from None
        return
    fd = os.open(path, os.O_RDWR | os.O_CREAT | _NOFOLLOW, FILE_MODE)
    try:
        deadline = time.monotonic() + timeout
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except OSError as exc:
                if exc.errno not in (errno.EAGAIN, errno.EACCES) or time.monotonic() >= deadline:
                    if exc.errno in (errno.EAGAIN, errno.EACCES):
                        raise LockTimeout(str(path)) from None
                    raise
                time.sleep(_LOCK_POLL)
        yield
    finally:
        os.close(fd)  # closing releases the flock


def _safe(text: Any) -> str:
    return _SAFE.sub("_", str(text)) or "none"


def line_for(msg: OutboxMessage) -> dict[str, Any]:
    """The JSON document written for one notice (everything but chart data)."""
    n = msg.notice
    detail = n.get("detail") or {}
    return {
        "key": msg.key, "event": n.get("event"), "model": n.get("model"), "condition": n.get("condition"),
        "action": n.get("action"), "severity": n.get("severity"), "as_of": n.get("as_of"),
        "run_id": n.get("run_id"), "alert_id": n.get("alert_id"), "subject": msg.subject,
        "reason": detail.get("reason"), "detail": detail, "previous": n.get("previous"),
        "context": n.get("context") or {},
    }


@register_channel
class FolderSink(Channel):
    """Write notices to a folder (see the module docstring)."""

    kind = "folder"
    idempotent = True

    def __init__(self, cfg: Config, spec: FolderChannel, name: str) -> None:
        super().__init__(cfg, spec, name)
        self.folder = cfg.resolve(spec.path)

    @property
    def jsonl(self) -> Path:
        return self.folder / JSONL

    def _lock(self) -> contextlib.AbstractContextManager[None]:
        return _locked(self.folder / (JSONL + ".lock"), LOCK_TIMEOUT)

    def _make_folder(self) -> None:
        self.folder.mkdir(mode=FOLDER_MODE, parents=True, exist_ok=True)

    def _lines(self) -> Iterator[dict[str, Any]]:
        try:
            fd = os.open(self.jsonl, os.O_RDONLY | _NOFOLLOW)
        except FileNotFoundError:
            return
        with os.fdopen(fd, encoding="utf-8") as fh:
            for raw in fh:
                raw = raw.strip()
                if not raw:
                    continue
                try:
                    doc = json.loads(raw)
                except ValueError:
                    continue  # a torn line from a crash mid-write: not ours to repair
                if isinstance(doc, dict):
                    yield doc

    def has_key(self, key: str) -> bool:
        return any(d.get("key") == key for d in self._lines())

    def send(self, msg: OutboxMessage) -> None:
        data = (json.dumps(line_for(msg), ensure_ascii=False, sort_keys=True, default=str) + "\n").encode("utf-8")
        try:
            self._make_folder()
            with self._lock():
                if self.has_key(msg.key):
                    return
                fd = os.open(self.jsonl, os.O_WRONLY | os.O_APPEND | os.O_CREAT | _NOFOLLOW, FILE_MODE)
                try:
                    written = os.write(fd, data)
                    if written != len(data):
                        raise OSError(f"short write: {written} of {len(data)} bytes")
                    os.fsync(fd)
                finally:
                    os.close(fd)
        except LockTimeout:
            raise DeliveryError(f"{self.jsonl} is locked by another process; will retry") from None
        except OSError as exc:
            raise DeliveryError(f"cannot append to {self.jsonl}: {_why(exc)}") from None

    def page_paths(self, as_of: Any, run_id: Any) -> tuple[Path, Path]:
        stem = f"run-{_safe(as_of)}-{_safe(run_id)}"
        paths = self.folder / f"{stem}.md", self.folder / f"{stem}.html"
        for p in paths:  # _safe leaves no separator; this says so for every future change of the names
            if p.parent != self.folder:
                raise ValueError(f"page name {p.name!r} would leave {self.folder}")
        return paths

    def flush(self, delivered: Sequence[OutboxMessage]) -> None:
        runs = sorted({(str(m.notice.get("as_of")), str(m.notice.get("run_id"))) for m in delivered})
        if not runs:
            return
        with self._lock():
            lines = list(self._lines())
        for as_of, run_id in runs:
            mine = [d for d in lines if str(d.get("as_of")) == as_of and str(d.get("run_id")) == run_id]
            notices = [{"model": d.get("model"), "event": d.get("event"), "action": d.get("action"),
                        "severity": d.get("severity"), "as_of": d.get("as_of"), "subject": d.get("subject"),
                        "detail": d.get("detail") or {}, "previous": d.get("previous"),
                        "context": d.get("context") or {}, "key": d.get("key")} for d in mine]
            md_path, html_path = self.page_paths(as_of, run_id)
            for path, kind in ((md_path, "md"), (html_path, "html")):
                _atomic_write(path, render_page(notices, as_of=as_of, run_id=run_id, fmt_=kind))


def _why(exc: OSError) -> str:
    if exc.errno == errno.ELOOP:
        return f"{exc.filename or 'a file'} is a symbolic link; drift does not write through links (remove it)"
    return str(exc)


def _atomic_write(path: Path, text: str) -> None:
    """Write ``path`` whole or not at all: a new 0600 file beside it, then ``os.replace`` (which replaces a
    link by the file rather than writing through it)."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with contextlib.suppress(FileNotFoundError):
        os.unlink(tmp)  # a leftover of a crashed run of this pid number (a link is removed, not followed)
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | _NOFOLLOW, FILE_MODE)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
