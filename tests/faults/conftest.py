"""Fault tests: a summary of the kill trials printed at the end of every run that includes them."""

from __future__ import annotations

from typing import Any

import pytest

#: one line per fault kind, appended by the kill trials (tests/faults/test_kill.py)
FAULT_SUMMARY: list[str] = []


@pytest.fixture(scope="session")
def fault_summary() -> list[str]:
    return FAULT_SUMMARY


def pytest_terminal_summary(terminalreporter: Any, exitstatus: int, config: Any) -> None:
    if FAULT_SUMMARY:
        terminalreporter.section("kill -9 trials (tests/faults/test_kill.py)")
        for line in FAULT_SUMMARY:
            terminalreporter.write_line(line)
