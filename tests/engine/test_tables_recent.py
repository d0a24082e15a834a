"""drift.engine.tables.recent: a remembered lookup is the same read-only array, the oldest is forgotten
first, and the tables' answers do not change with it (common practice, no source)."""

from __future__ import annotations

import numpy as np
import pytest

from drift.engine.tables import family, monitoring
from drift.engine.tables.recent import Recent, array_key


def test_remembers_read_only_and_forgets_the_oldest() -> None:
    made: list[int] = []
    r = Recent(size=2)

    def make(i: int):
        def f() -> np.ndarray:
            made.append(i)
            return np.arange(3.0) + i
        return f

    a = r.get(("a",), make(1))
    assert r.get(("a",), make(99)) is a and made == [1]
    with pytest.raises(ValueError):
        a[0] = 5.0  # read-only: a caller cannot change what the next one gets
    r.get(("b",), make(2))
    r.get(("c",), make(3))  # "a" is forgotten
    assert r.get(("a",), make(4))[0] == 4.0 and made == [1, 2, 3, 4]
    assert array_key(None) is None and array_key([1.0, 2.0]) != array_key([1.0, 2.5])


def test_tables_answer_the_same_remembered_or_not() -> None:
    steps, dof = np.array([52.0, 104.0, 104.0]), np.array([40.0, np.inf, 12.0])
    first = family.quantiles("shift", steps, dof)
    again = family.quantiles("shift", steps.copy(), dof.copy())
    assert again is first
    assert np.array_equal(family._quantiles("shift", steps, dof), first)
    hz = np.array([0.5, 0.5, 1.0])
    m1 = monitoring.quantiles("page", 0.0, hz, dof)
    assert monitoring.quantiles("page", 0.0, hz.copy(), dof.copy()) is m1
    assert np.array_equal(monitoring._distinct_quantiles("page", 0.0, hz, dof), m1)
