"""Fewer garbage-collector passes while a check builds its payloads.

A check allocates millions of small containers (each model's tests, alarms and chart lists) and keeps most
of them until the verdicts are saved. CPython's cyclic collector runs a young-generation pass every 700
net allocations and, as the kept payloads pile up, full passes over all of them: at 10,000 models that was
4–5 s of a 28 s check (measured with ``gc.disable()`` against the default, ``benchmarks/README.md``), and
none of those passes frees anything (payloads hold no reference cycles).

:func:`fewer_collections` is used around a check (:func:`drift.check.run_check`) and around each chunk's
analysis (so process-pool and Dask workers get it too): it moves every object alive on entry out of the
collector's sight (``gc.freeze``: the configuration, the imported modules) and raises the young-generation
threshold, so passes are rare and short. The collector still runs (cycles made during the check are
freed), and everything is restored on exit, so a long-lived daemon is unaffected between checks. Nested
and concurrent uses share one pause: the first to enter sets it, the last to leave restores it.
"""

from __future__ import annotations

import gc
import threading
from collections.abc import Iterator
from contextlib import contextmanager

#: young-generation threshold while paused (CPython's default is 700 net allocations of containers)
PAUSED_THRESHOLD = 50_000

_lock = threading.Lock()
_depth = 0
_saved: tuple[int, int, int] | None = None


@contextmanager
def fewer_collections() -> Iterator[None]:
    """Run the body with rare collector passes over the objects it creates (see the module docstring)."""
    global _depth, _saved
    with _lock:
        if _depth == 0:
            _saved = gc.get_threshold()
            gc.freeze()
            gc.set_threshold(max(_saved[0], PAUSED_THRESHOLD), *_saved[1:])
        _depth += 1
    try:
        yield
    finally:
        with _lock:
            _depth -= 1
            if _depth == 0 and _saved is not None:
                gc.set_threshold(*_saved)
                gc.unfreeze()
                _saved = None
