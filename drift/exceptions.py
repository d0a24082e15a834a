"""Every error drift raises on purpose.

Hierarchy::

    DriftError                      base of everything below
    ├── ConfigError                 bad configuration (file, key path, line)   -> CLI exit 2
    ├── InputError                  a data file / query cannot be read as a whole (file, row, column)
    ├── StoreError                  the store cannot be used
    │   └── SchemaVersionError      the store was written by a newer drift
    ├── InsufficientDataError       data cannot support a test: says needed vs available  (also a ValueError)
    ├── DeliveryError               a channel failed to deliver (kept pending, retried later)
    ├── DecisionError               a refit/accept/snooze that does not fit the store's state  -> CLI exit 2
    ├── LockError                   another daemon holds the store
    └── ClusterError                the Dask cluster at check.executor.address answers not, or has no worker

Bad *arguments* to library functions raise the built-in ``ValueError`` / ``TypeError`` naming the
parameter and the allowed values; these classes are for conditions a user has to act on.
"""

from __future__ import annotations


class DriftError(Exception):
    """Base class of drift's own errors."""


class ConfigError(DriftError):
    """A configuration problem, located by file, key path and line.

    Parameters
    ----------
    message : what is wrong and what was expected.
    file, key, line : where; any may be None when unknown.
    """

    def __init__(self, message: str, *, file: str | None = None, key: str | None = None,
                 line: int | None = None) -> None:
        self.message = message
        self.file = file
        self.key = key
        self.line = line
        super().__init__(str(self))

    def __str__(self) -> str:
        where = []
        if self.file:
            where.append(str(self.file) + (f":{self.line}" if self.line else ""))
        if self.key:
            where.append(f"key '{self.key}'")
        prefix = ", ".join(where)
        return f"{prefix}: {self.message}" if prefix else self.message


class InputError(DriftError):
    """A source (file or query) that cannot be read as a whole; nothing from it was written.

    ``unavailable`` is True when the source could not be reached (a query that failed to run, a file the
    system would not read) rather than refused for its content: the CLI exits 1 for those, 2 for the rest.
    """

    def __init__(self, message: str, *, file: str | None = None, row: int | None = None,
                 column: str | None = None, unavailable: bool = False) -> None:
        self.message = message
        self.file = file
        self.row = row
        self.column = column
        self.unavailable = unavailable
        super().__init__(str(self))

    def __str__(self) -> str:
        parts = []
        if self.file:
            parts.append(str(self.file))
        if self.row is not None:
            parts.append(f"row {self.row}")
        if self.column is not None:
            parts.append(f"column '{self.column}'")
        prefix = ", ".join(parts)
        return f"{prefix}: {self.message}" if prefix else self.message


class StoreError(DriftError):
    """The store cannot be opened or used."""


class SchemaVersionError(StoreError):
    """The store's schema is newer than this drift understands."""


class InsufficientDataError(DriftError, ValueError):
    """Too few usable observations for a computation.

    Parameters
    ----------
    what : the computation.
    needed, available : observation counts.
    """

    def __init__(self, what: str, needed: int, available: int, hint: str = "") -> None:
        self.what = what
        self.needed = int(needed)
        self.available = int(available)
        msg = f"{what} needs at least {self.needed} usable observations, {self.available} available"
        if hint:
            msg += f"; {hint}"
        super().__init__(msg)


class DeliveryError(DriftError):
    """A channel could not deliver a message; the outbox keeps it pending."""


class DecisionError(DriftError):
    """A decision command (``drift refit``, ``accept``, ``snooze``) whose arguments do not fit what the store
    holds: no verdict to take a date from, a date before the current epoch, no open alert to snooze, too
    few rows since the date asked for. The message says what to give instead; nothing was changed."""


class LockError(DriftError):
    """Another drift daemon holds this store."""


class ClusterError(DriftError):
    """The Dask cluster named by ``check.executor.address`` (``check.dask_scheduler``) cannot run the check:
    no scheduler answers there, or it has no worker. Nothing was checked."""
