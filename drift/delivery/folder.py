"""Folder sink: one JSON line per notice in ``<path>/alerts.jsonl``, plus a page per run.

Appending is atomic and idempotent: under a file lock (``alerts.jsonl.lock``) the file is scanned for the
notice's key; only if absent is the line written with ``os.open(O_APPEND)``, one ``write`` and ``fsync``.
So a row found "sending" after a crash can simply be sent again (``idempotent = True``).

After each delivery round, the pages ``<path>/run-<as_of>-<run_id>.md`` and ``.html`` of every run that got
new lines are rewritten (atomically, via a temporary file and ``os.replace``) from the lines of that run in
``alerts.jsonl``: the file is the record, the pages are views of it. ``path`` is relative to the config
file.
"""

from __future__ import annotations

import json
import os
import re
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import filelock

from drift.config import Config, FolderChannel
from drift.delivery.messages import render_page
from drift.delivery.outbox import Channel, DeliveryError, OutboxMessage, register_channel

#: how long to wait for another process's lock on alerts.jsonl before giving up for this round (seconds)
LOCK_TIMEOUT = 30.0
JSONL = "alerts.jsonl"
_SAFE = re.compile(r"[^A-Za-z0-9_.-]+")


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

    def _lock(self) -> filelock.BaseFileLock:
        return filelock.FileLock(str(self.folder / (JSONL + ".lock")), timeout=LOCK_TIMEOUT)

    def _lines(self) -> Iterator[dict[str, Any]]:
        try:
            with open(self.jsonl, encoding="utf-8") as fh:
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
        except FileNotFoundError:
            return

    def has_key(self, key: str) -> bool:
        return any(d.get("key") == key for d in self._lines())

    def send(self, msg: OutboxMessage) -> None:
        data = (json.dumps(line_for(msg), ensure_ascii=False, sort_keys=True, default=str) + "\n").encode("utf-8")
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            with self._lock():
                if self.has_key(msg.key):
                    return
                fd = os.open(self.jsonl, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
                try:
                    written = os.write(fd, data)
                    if written != len(data):
                        raise OSError(f"short write: {written} of {len(data)} bytes")
                    os.fsync(fd)
                finally:
                    os.close(fd)
        except filelock.Timeout:
            raise DeliveryError(f"{self.jsonl} is locked by another process; will retry") from None
        except OSError as exc:
            raise DeliveryError(f"cannot append to {self.jsonl}: {exc}") from None

    def page_paths(self, as_of: Any, run_id: Any) -> tuple[Path, Path]:
        stem = f"run-{_safe(as_of)}-{_safe(run_id)}"
        return self.folder / f"{stem}.md", self.folder / f"{stem}.html"

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


def _atomic_write(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
