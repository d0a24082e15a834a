"""What the ingest and repair commands show: batches, quarantine records, retractions, ingest summaries.

Plain-text and JSON forms of what :mod:`drift.store` returns, so the CLI stays a thin layer (parse, call,
print). Times are shown in UTC to the minute in text and as ISO 8601 in JSON.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

from drift.exceptions import ConfigError
from drift.ingest.base import IngestSummary
from drift.store import Store

#: what retract_batches answers, and whether it is a usage error
_RETRACT_FAILS = {"unknown": "no batch {id} in the store (drift batches lists them)",
                  "not finished": "batch {id} did not finish, so it stored nothing to retract"}


def _when(t: datetime | None) -> str:
    return t.strftime("%Y-%m-%d %H:%M") if t is not None else "-"


def _json_value(v: Any) -> Any:
    return v.isoformat() if isinstance(v, datetime) else v


def as_json_rows(rows: Sequence[dict[str, Any]], keys: Sequence[str]) -> list[dict[str, Any]]:
    """The given keys of each row, JSON-ready."""
    return [{k: _json_value(r.get(k)) for k in keys} for r in rows]


BATCH_KEYS = ("id", "source", "file", "started_at", "finished_at", "status", "stored", "revised", "known",
              "quarantined", "retracted_at", "retract_note")
QUARANTINE_KEYS = ("id", "source", "file", "row", "column", "raw_value", "reason", "batch", "created_at",
                   "resolved_at", "resolved_batch")


def format_batches(rows: Sequence[dict[str, Any]]) -> str:
    """One line per batch, newest first."""
    if not rows:
        return "no batches in the store"
    out = []
    for b in rows:
        line = (f"batch {b['id']:>5}  {_when(b['started_at'])}  {b['source']}  {b['file'] or '-'}  "
                f"{b['status']}: {b['stored'] or 0} new, {b['revised'] or 0} revised, {b['known'] or 0} known, "
                f"{b['quarantined'] or 0} quarantined")
        if b.get("retracted_at") is not None:
            line += f"  retracted {_when(b['retracted_at'])}"
            if b.get("retract_note"):
                line += f" ({b['retract_note']})"
        out.append(line)
    return "\n".join(out)


def format_quarantine(rows: Sequence[dict[str, Any]], *, include_resolved: bool = False,
                      limit: int | None = None) -> str:
    """Records grouped by source and file: row, column, raw value, reason (the first ``limit`` records)."""
    if not rows:
        return "no quarantine records" if include_resolved else "no open quarantine records"
    out: list[str] = []
    last: tuple[str, str] | None = None
    for r in rows[:limit]:
        if (r["source"], r["file"]) != last:
            last = (r["source"], r["file"])
            out.append(f"{r['source']}: {r['file']}")
        text = f"  row {r['row']}, column '{r['column']}', value '{r['raw_value']}': {r['reason']}"
        if r.get("resolved_at") is not None:
            text += f" [resolved {_when(r['resolved_at'])} by batch {r['resolved_batch']}]"
        out.append(text)
    if limit is not None and len(rows) > limit:
        out.append(f"... and {len(rows) - limit} more (--limit to show more, --json for all)")
    return "\n".join(out)


def retract(store: Store, ids: Sequence[int], *, note: str | None = None) -> list[str]:
    """Retract batches; one line per id.

    Raises
    ------
    ConfigError
        when an id names no batch, or one that did not finish (nothing of any id is retracted then).
    """
    found = {int(b["id"]): b for b in store.list_batches(ids=ids)}
    for i in ids:
        if i not in found:
            raise ConfigError(_RETRACT_FAILS["unknown"].format(id=i), key="--batch")
        if found[i]["status"] != "ok":
            raise ConfigError(_RETRACT_FAILS["not finished"].format(id=i), key="--batch")
    done = store.retract_batches(list(ids), note=note)
    lines = []
    for i in ids:
        b = found[i]
        what = f"batch {i} ({b['source']}, {Path(b['file']).name if b['file'] else '-'})"
        if done[i] == "retracted":
            n = (b["stored"] or 0) + (b["revised"] or 0)
            lines.append(f"{what} retracted: its {n} stored value{' is' if n == 1 else 's are'} ignored from "
                         "now on (as-of queries before now still see them)")
        else:
            lines.append(f"{what} was already retracted on {_when(b['retracted_at'])}")
    return lines


def summary_lines(s: IngestSummary, config: str) -> list[str]:
    """The lines printed after an ingest of one source: the summary sentence, then per file the new
    quarantine records and the first reason, and the command that lists them all."""
    lines = [s.describe()]
    q = s.quarantine_lines()
    if q:
        lines += [f"  {x}" for x in q]
        lines.append(f"  list them with: drift quarantine --config {config} --source {s.source}")
    return lines
