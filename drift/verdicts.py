"""Turn test results into a small set of actions with plain-language reasons and the numbers behind them.

Actions, most pressing first: ``data-late`` > ``refit`` > ``relag`` > ``drop-driver`` > ``watch``.
The model's verdict is ``keep`` or the most pressing action, or ``error`` when the model could not be
checked at all (its data cannot support the check; the entry says why). Deterministic: same evidence, same verdict.

False-alarm control (per model, over the monitoring horizon)
-----------------------------------------------------------
``refit`` needs a *sequential* monitoring detector to cross its boundary. The detectors that watch every
model are the Chu–Stinchcombe–White recursive CUSUM (quick on early changes) and a detector quick on late
changes (Page-type CUSUM by default) on the recursive residuals, plus one score monitor per driver (the
recursive residuals weighted by the driver's orthogonalised column: its coefficient's fluctuation process,
which has power against changes the residual mean does not show). Each runs at ``level / (number of
monitors)`` (Bonferroni, floored at the tables' 0.5%), so the chance that a stable model is ever told to
refit within the horizon is at most ``level``. Monitoring at ``warn_level`` and the CUSUM of squares of
the monitored residuals beyond its 1% bound (a variance change) only give ``watch``; the retrospective CUSUM
and CUSUM of squares at 5% are reported but raise nothing alone (re-run on every check, their crossings
would accumulate on stable models). Change
points and the sup-F search only *date* a break that the monitors found; they never raise one alone.
``drop-driver`` and ``relag`` have their own out-of-sample tests; ``data-late`` is a fact about the feed,
not a test.

Out-of-sample comparisons (``drop-driver``, ``relag``) use one-step forecasts of models re-estimated on a
rolling window (``rolling_window``, default ``recent_window``) and scored over the recent window. An
expanding fit would carry the reference period's effects forward: after a driver's effect vanished, the
model with it would keep forecasting with the stale coefficient (the Clark–West adjustment then counts that
stale difference as a gain), and every other lag would look better than the current one.

- ``drop-driver``: Clark–West finds no gain at ``level`` and the recent coefficient interval covers zero,
  or the feed has been missing for more than ``feed_limit`` periods.
- ``relag``: the recent lag-profile peak is at another lag and clears a Bonferroni band over the scanned
  lags, the model at the new lag beats the current one (Diebold–Mariano/HLN, one-sided at ``level``) *and*
  beats the model without the driver (Clark–West at ``level``). A relag replaces a ``drop-driver`` of the
  same driver: a driver that forecasts better at another lag still earns its place.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

PRIORITY = ("data-late", "refit", "relag", "drop-driver", "watch")
#: the verdict of a model that could not be checked (its entry gives the ``reason``); not an action
ERROR = "error"
#: every verdict a model can get: ``keep``, the most pressing action, or ``error``
VERDICTS = ("keep", *PRIORITY, ERROR)


@dataclass
class Action:
    action: str
    reason: str
    severity: str = "act"  # act | watch
    extra: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        return {"action": self.action, "severity": self.severity, **self.extra, "reason": self.reason}


def overall(actions: list[Action]) -> str:
    """``keep`` or the name of the most pressing action."""
    if not actions:
        return "keep"
    return min(actions, key=lambda a: PRIORITY.index(a.action)).action


def sort_actions(actions: list[Action]) -> list[Action]:
    return sorted(actions, key=lambda a: (PRIORITY.index(a.action), str(a.extra.get("driver", ""))))


def fmt_num(x: float | None, digits: int = 3) -> str:
    """A number for a sentence: 3 significant digits, thousands separators for large values."""
    if x is None:
        return "n/a"
    ax = abs(x)
    if ax >= 1000:
        return f"{x:,.0f}"
    if ax >= 100:
        return f"{x:.0f}"
    if ax == 0:
        return "0"
    return f"{x:.{digits}g}"


def pct_change(before: float, after: float) -> str:
    if before == 0:
        return ""
    ch = (after - before) / abs(before) * 100
    word = "rose" if ch > 0 else "fell"
    return f"{word} by about {abs(ch):.0f}%"
