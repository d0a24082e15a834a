"""Who owns a row (a run, the daemon lock) and whether that process still lives.

A pid alone does not name a process: after a crash the kernel hands the same number to the next process
that asks, and ``kill(pid, 0)`` then answers for a stranger. A process is named here by its host, its pid
and its *start*: on Linux the boot id and the start time in clock ticks since boot (``/proc/<pid>/stat``
field 22), elsewhere psutil's creation time when psutil is installed. Two processes with one pid have
different starts, so a row whose recorded start differs from the live process's start belongs to a dead
process.

A zombie (killed, not yet reaped by its parent) still answers ``kill(pid, 0)``; it counts as dead.
"""

from __future__ import annotations

import os
import socket
from functools import lru_cache

#: longest start token (column width in the store)
START_MAX_LEN = 80


@lru_cache(maxsize=1)
def _boot_id() -> str:
    try:
        with open("/proc/sys/kernel/random/boot_id", encoding="ascii") as fh:
            return fh.read().strip()
    except OSError:
        return "boot"


def _linux_stat(pid: int) -> tuple[str, str] | None:
    """(state, start ticks) from ``/proc/<pid>/stat``; None when there is no such process (or no /proc)."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            text = fh.read()
    except OSError:
        return None
    # field 2 (the command) is in parentheses and may itself hold spaces or parentheses: split after the last
    rest = text[text.rfind(")") + 2:].split()
    if len(rest) < 20:
        return None
    return rest[0], rest[19]  # field 3 (state) and field 22 (starttime)


def process_start(pid: int | None = None) -> str | None:
    """The start token of process ``pid`` (default: this one), or None when it cannot be told."""
    pid = os.getpid() if pid is None else pid
    if os.path.isdir("/proc/self"):
        st = _linux_stat(pid)
        return None if st is None else f"{_boot_id()}:{st[1]}"
    try:
        import psutil
    except ImportError:
        return None
    try:
        return f"ct:{psutil.Process(pid).create_time():.2f}"
    except Exception:  # noqa: BLE001 - gone or not visible: cannot be told
        return None


def _pid_exists(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by another user
        return True
    except OSError:
        return False
    return True


def _zombie(pid: int) -> bool:
    if os.path.isdir("/proc/self"):
        st = _linux_stat(pid)
        return st is not None and st[0] in ("Z", "X")
    try:
        import psutil

        return bool(psutil.Process(pid).status() == psutil.STATUS_ZOMBIE)
    except Exception:  # noqa: BLE001 - psutil missing or the process gone
        return False


def why_dead(pid: int, start: str | None = None) -> str | None:
    """Why process ``pid`` (on this host) is not the one recorded with ``start``; None while it lives.

    ``start`` None (a row written before starts were recorded) checks the pid only.
    """
    if not _pid_exists(pid) or _zombie(pid):
        return "is no longer running"
    if start:
        now = process_start(pid)
        if now is None and not _pid_exists(pid):
            return "is no longer running"
        if now is not None and now != start:
            return "now belongs to another process (the pid was reused)"
    return None


def this_host() -> str:
    return socket.gethostname()
