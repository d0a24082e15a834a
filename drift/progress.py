"""A progress bar for long runs (rich, on stderr), shown only when someone is watching.

``enabled``: True = always, drawn as on a terminal even when stderr is not one; False = never (``--json``,
the daemon); None = when stderr is a terminal and the run is long enough to be worth a bar. The bar is
transient: it leaves nothing behind on the terminal.
"""

from __future__ import annotations

import sys
from typing import Any

#: auto mode shows a check's bar from this many models
AUTO_MODELS = 1_000


def stderr_is_terminal() -> bool:
    """Whether stderr, where the bar is drawn, is a terminal (someone is watching)."""
    try:
        return sys.stderr.isatty()
    except (AttributeError, ValueError):  # replaced by an object without isatty, or closed
        return False


class Progress:
    """A context manager around one rich task; :meth:`advance` is a no-op when no bar is shown."""

    def __init__(self, enabled: bool | None, description: str, total: int, *, auto_from: int | None = None) -> None:
        least = AUTO_MODELS if auto_from is None else auto_from
        want = stderr_is_terminal() and total >= least if enabled is None else bool(enabled)
        self._want = want and total > 0
        self._description = description
        self._total = total
        self._bar: Any = None
        self._task: Any = None

    def __enter__(self) -> Progress:  # noqa: PYI034
        if self._want:
            from rich.console import Console
            from rich.progress import Progress as RichProgress

            # wanted means drawn: rich would otherwise print nothing but a newline on a stream it does not
            # take for a terminal (a forced bar, a log captured by ``script``)
            self._bar = RichProgress(console=Console(stderr=True, force_terminal=True), transient=True)
            self._bar.start()
            self._task = self._bar.add_task(self._description, total=self._total)
        return self

    def __exit__(self, *exc: object) -> None:
        if self._bar is not None:
            self._bar.stop()
            self._bar = None

    def advance(self, n: int = 1) -> None:
        if self._bar is not None:
            self._bar.advance(self._task, n)
