from __future__ import annotations

from collections.abc import Iterator
from datetime import datetime, timezone
from pathlib import Path

import pytest

from drift.store import Store, open_store


class Clock:
    """A controlled clock: aware UTC, moved by hand."""

    def __init__(self, start: datetime) -> None:
        self.now = start

    def __call__(self) -> datetime:
        return self.now

    def set(self, *args: int) -> None:
        self.now = datetime(*args, tzinfo=timezone.utc)  # type: ignore[misc]


@pytest.fixture
def store(tmp_path: Path) -> Iterator[Store]:
    st = open_store(f"sqlite:///{tmp_path / 'drift.db'}")
    yield st
    st.dispose()


@pytest.fixture
def clock() -> Clock:
    return Clock(datetime(2026, 3, 1, tzinfo=timezone.utc))
