"""The library's entry points for each step, as the CLI and the daemon call them.

They orchestrate; the statistics live in :mod:`drift.engine` and :mod:`drift.check`, the SQL in
:mod:`drift.store`.
"""

from __future__ import annotations

from typing import Any

from drift.check import CheckOutcome, run_check
from drift.config import Config

__all__ = ["CheckOutcome", "run_check", "run_deliver", "run_digest", "run_ingest"]


def run_ingest(cfg: Config, store: Any, *, sources: list[str] | None = None,
               progress: bool | None = None, reread: bool = False, readmit: bool = False) -> list[Any]:
    """Ingest every configured source (or the named ones) and record the run.

    ``reread``: read files again even when unchanged (:func:`drift.ingest.ingest_all`); ``readmit``: only
    the files holding open quarantine records, read again (:func:`drift.ingest.readmit`).
    """
    from drift.ingest import ingest_all
    from drift.ingest import readmit as readmit_files

    detail: dict[str, Any] = {"sources": sources or [s.name for s in cfg.sources]}
    if reread or readmit:
        detail["mode"] = "readmit" if readmit else "reread"
    run_id = store.start_run("ingest", detail=detail)
    try:
        if readmit:
            summaries = readmit_files(cfg, store, sources=sources, progress=progress)
        else:
            summaries = ingest_all(cfg, store, sources=sources, progress=progress, reread=reread)
    except BaseException as exc:
        store.finish_run(run_id, "failed", error=f"{type(exc).__name__}: {exc}")
        raise
    failed = [f for s in summaries for f in s.failed_files]
    store.finish_run(run_id, "ok" if not failed else "partial",
                     detail={**detail, "summaries": [s.as_dict() for s in summaries]})
    return summaries


def run_deliver(cfg: Config, store: Any) -> Any:
    """Send whatever is pending in the outbox now, also rows still waiting out a retry backoff."""
    from drift.delivery.outbox import deliver_pending

    return deliver_pending(cfg, store, all_pending=True)


def run_digest(cfg: Config, store: Any, *, since: Any = None, send: bool = False) -> Any:
    from drift.delivery.digest import run_digest as _run

    return _run(cfg, store, since=since, send=send)
