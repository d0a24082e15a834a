"""A daemon with fake jobs, run as a real process by the tests.

``python -m tests.scheduler.daemon_helper DB OUT [GRACE]``: jobs ``ingest`` and ``check`` every second; each
appends a line to OUT; ``ingest`` sleeps ``DRIFT_TEST_SLOW`` seconds between its start and end lines, and
returns a result that takes ``DRIFT_TEST_SUMMARY_SLOW`` seconds to print (as a check's outcome with many
models' payloads does). ``DRIFT_TEST_INGEST_EVERY`` replaces the ingest schedule (default ``every 1s``).
"""

from __future__ import annotations

import os
import sys
import time

from drift.config import Config, ScheduleConfig
from drift.scheduler import run_daemon


def _append(text: str) -> None:
    with open(os.environ["DRIFT_TEST_OUT"], "a", encoding="utf-8") as fh:
        fh.write(f"{text} {os.getpid()}\n")


class SlowToPrint:
    """A job result whose text takes a while to build."""

    def __str__(self) -> str:
        time.sleep(float(os.environ.get("DRIFT_TEST_SUMMARY_SLOW", "0")))
        return "a large result"

    __repr__ = __str__


def ingest(cfg: Config, store: object) -> SlowToPrint:
    _append("ingest-start")
    time.sleep(float(os.environ.get("DRIFT_TEST_SLOW", "0")))
    _append("ingest-end")
    return SlowToPrint()


def check(cfg: Config, store: object) -> None:
    _append("check")


def main(argv: list[str]) -> int:
    db, out = argv[0], argv[1]
    grace = float(argv[2]) if len(argv) > 2 else 30.0
    os.environ["DRIFT_TEST_OUT"] = out
    every = os.environ.get("DRIFT_TEST_INGEST_EVERY", "every 1s")
    cfg = Config(store=f"sqlite:///{db}",
                 schedule=ScheduleConfig(ingest=every, check="every 1s", retry=None, misfire_grace="1h",
                                         job_timeout="60s"))
    return run_daemon(cfg, jobs={"ingest": ingest, "check": check}, stop_grace=grace,
                      lock_heartbeat=0.5, lock_stale_after=5.0)


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
