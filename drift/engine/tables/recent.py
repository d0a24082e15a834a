"""The last few table lookups, remembered by their arguments' bytes.

A screening batch asks the simulated tables for the same rows (one horizon and scale dof per model) for
each level, warning level, reported level and p-value of every monitor; :class:`Recent` keeps the last
few results (read-only arrays) so each is interpolated once per batch.
"""

from __future__ import annotations

from collections.abc import Callable, Hashable
from typing import Any

import numpy as np


def array_key(a: Any) -> tuple[Any, ...] | None:
    """A hashable key of an array-like's dtype, shape and bytes (None stays None)."""
    if a is None:
        return None
    arr = np.asarray(a)
    return (arr.dtype.str, arr.shape, arr.tobytes())


class Recent:
    """At most ``size`` results by key, the oldest forgotten first; each result made read-only."""

    def __init__(self, size: int = 16) -> None:
        self.size = size
        self._got: dict[Hashable, np.ndarray] = {}

    def get(self, key: Hashable, make: Callable[[], np.ndarray]) -> np.ndarray:
        """The result remembered for ``key``, else ``make()`` (remembered unless it raises)."""
        got = self._got.get(key)
        if got is None:
            got = make()
            got.setflags(write=False)
            if len(self._got) >= self.size:
                self._got.pop(next(iter(self._got)), None)
            self._got[key] = got
        return got
