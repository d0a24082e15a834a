"""drift.gcpause: the collector's settings are restored after a check, also when nested, raised or
entered from several threads (behaviour of CPython's ``gc`` module, Python 3.11 documentation)."""

from __future__ import annotations

import gc
import threading

import pytest

from drift import gcpause
from drift.gcpause import PAUSED_THRESHOLD, fewer_collections


def test_paused_then_restored() -> None:
    before = gc.get_threshold()
    frozen_before = gc.get_freeze_count()
    with fewer_collections():
        assert gc.get_threshold()[0] == max(before[0], PAUSED_THRESHOLD)
        assert gc.get_freeze_count() >= frozen_before
        assert gc.isenabled()  # the collector still runs, only less often
    assert gc.get_threshold() == before
    assert gc.get_freeze_count() == frozen_before


def test_nested_and_raising_restore_once() -> None:
    before = gc.get_threshold()
    with pytest.raises(RuntimeError), fewer_collections():
        with fewer_collections():
            assert gc.get_threshold()[0] == max(before[0], PAUSED_THRESHOLD)
        assert gc.get_threshold()[0] == max(before[0], PAUSED_THRESHOLD)  # the outer pause still holds
        raise RuntimeError("a failing check")
    assert gc.get_threshold() == before
    assert gcpause._depth == 0


def test_cycles_made_meanwhile_are_still_collected() -> None:
    class Node:
        pass

    with fewer_collections():
        a, b = Node(), Node()
        a.other, b.other = b, a  # type: ignore[attr-defined]
        del a, b
        assert gc.collect() >= 2


def test_threads_share_one_pause() -> None:
    before = gc.get_threshold()
    inside = threading.Barrier(3)
    leave = threading.Event()

    def work() -> None:
        with fewer_collections():
            inside.wait()
            leave.wait(5)

    threads = [threading.Thread(target=work) for _ in range(2)]
    for t in threads:
        t.start()
    inside.wait()
    assert gcpause._depth == 2
    leave.set()
    for t in threads:
        t.join()
    assert gc.get_threshold() == before and gcpause._depth == 0
