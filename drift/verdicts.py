"""Turn test results into a small set of actions with plain-language reasons and the numbers behind them.

Verdicts, most pressing first (:data:`ORDER`): ``error`` (not checked) > ``refit`` > ``relag`` >
``drop-driver`` > ``data-late`` > ``watch`` > ``keep``. The model's verdict is ``keep`` or its most pressing
action, or ``error`` when the model could not be checked at all (its data cannot support the check; the
entry says why). A confirmed change outranks a late feed: a model with both a refit and a late feed has the
verdict ``refit`` and lists the late feed beside it. Deterministic: same evidence, same verdict.

The vocabulary is defined here once: the codes (``ORDER``, used in the JSON and the store), the word
shown for each (:data:`LABEL`, e.g. in tables), and the headline of a model's section (:data:`HEADLINE`).
Every output (messages, digest, report, terminal tables, status) takes its words from here.

False-alarm control (per model, over the monitoring horizon)
-----------------------------------------------------------
``refit`` needs a member of the *monitor family* to cross its boundary (:func:`drift.engine.family_levels`):
on the recursive residuals the Chu–Stinchcombe–White recursive CUSUM (small persistent changes), an
abrupt-shift monitor (Page CUSUM with a reference value) and an error-variance monitor; per driver its
effect monitor (the recursive residuals weighted by the driver's orthogonalised column: its coefficient's
fluctuation process, which has power against changes the residual mean does not show) and an abrupt-shift
monitor of it. All are sequential (each period's statistic uses data up to it), so an alarm's date is when
a check would have raised it. Their levels are calibrated together (jointly simulated within a stream,
weighted Šidák across streams) so that the chance that a stable model is ever told to refit within the
horizon (``check.horizon``, default 2 years) is at most ``level``; beyond it they keep running without the
guarantee, and the reason says so. The family at ``warn_level`` only gives ``watch``; the retrospective
CUSUM and CUSUM of squares are reported in ``tests`` (dated by replay) but raise nothing (re-run on every
check, their crossings would accumulate on stable models). Change
points and the sup-F search only *date* a break that the monitors found; they never raise one alone.
``drop-driver`` and ``relag`` have their own out-of-sample tests; ``data-late`` is a fact about the feed,
not a test.

Out-of-sample comparisons (``drop-driver``, ``relag``) use one-step forecasts of models re-estimated on a
rolling window (``rolling_window``, default ``recent_window``) and scored over the recent window. An
expanding fit would carry the reference period's effects forward: after a driver's effect vanished, the
model with it would keep forecasting with the stale coefficient (the Clark–West adjustment then counts that
stale difference as a gain), and every other lag would look better than the current one.

- ``drop-driver``: Clark–West finds no gain at ``level`` and the recent coefficient interval covers zero.
  A driver that still helps (Clark–West gain at ``level``) is never proposed for dropping. A feed missing
  for more than ``feed_limit`` periods is ``data-late``, whose reason gives the cost of running without it
  (the action's ``without`` figures), never ``drop-driver`` on that ground.
- ``relag``: the recent lag-profile peak is at another lag and clears a Bonferroni band over the scanned
  lags, the model at the new lag beats the current one (Diebold–Mariano/HLN, one-sided at ``level``) *and*
  beats the model without the driver (Clark–West at ``level``). A relag replaces a ``drop-driver`` of the
  same driver: a driver that forecasts better at another lag still earns its place. A relag also replaces
  the ``refit`` when the moved lag explains the monitors' break (the reference coefficients at the new lag
  fit the data since the break: :func:`drift.checking.actions._relag_explains_break`); the count of hard
  actions, and so the false-alarm rule, is unchanged.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from drift.engine.tables import monitoring as _mon_table

#: actions, most pressing first: a confirmed change of the relationship outranks a late feed
PRIORITY = ("refit", "relag", "drop-driver", "data-late", "watch")
#: half-width, in standard errors, of the 95% intervals drift shows and reasons on (a driver's recent
#: coefficient, the refit's before/after effects): the normal 0.975 quantile, rounded as tables print it
Z95 = 1.96
#: the verdict of a model that could not be checked (its entry gives the ``reason``); not an action
ERROR = "error"
#: the verdict of a model with no action
KEEP = "keep"
#: every verdict a model can get, most pressing first
ORDER = (ERROR, *PRIORITY, KEEP)
#: every verdict a model can get: ``keep``, the most pressing action, or ``error``
VERDICTS = (KEEP, *PRIORITY, ERROR)
#: the word shown for each verdict (tables, lists, subjects): one spelling everywhere
LABEL: dict[str, str] = {
    ERROR: "not checked", "refit": "refit", "relag": "re-lag", "drop-driver": "drop a driver",
    "data-late": "data late", "watch": "watch", KEEP: "keep",
}
#: the headline of a model's section: the label and what it means
HEADLINE: dict[str, str] = {
    ERROR: "not checked: its data cannot support the check",
    "refit": "refit: the relationship changed",
    "relag": "re-lag: a driver fits better at another lag",
    "drop-driver": "drop a driver: it no longer helps the forecast",
    "data-late": "data late: a feed is overdue",
    "watch": "watch: an early sign, not confirmed",
    KEEP: "keep: no change found",
}


def rank(verdict: str | None) -> int:
    """How pressing a verdict is: 0 for ``error``, up to ``len(ORDER) - 1`` for ``keep``; an unknown
    code ranks with ``watch``, ``None`` after ``keep``."""
    if verdict is None:
        return len(ORDER)
    return ORDER.index(verdict) if verdict in ORDER else ORDER.index("watch")


def label(verdict: str | None) -> str:
    """The word shown for a verdict or action code (an unknown code is shown as it is)."""
    return LABEL.get(str(verdict), str(verdict))


def headline(verdict: str | None) -> str:
    """The headline of a model's section for its verdict."""
    return HEADLINE.get(str(verdict), label(verdict))


@dataclass
class Action:
    action: str
    reason: str
    severity: str = "act"  # act | watch
    extra: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        return {"action": self.action, "severity": self.severity, **self.extra, "reason": self.reason}


def overall(actions: list[Action]) -> str:
    """``keep`` or the name of the most pressing action (:data:`PRIORITY`)."""
    if not actions:
        return KEEP
    return min(actions, key=lambda a: rank(a.action)).action


def sort_actions(actions: list[Action]) -> list[Action]:
    """Most pressing first (:data:`PRIORITY`), then by driver."""
    return sorted(actions, key=lambda a: (rank(a.action), str(a.extra.get("driver", ""))))


def fmt_num(x: float | None, digits: int = 3) -> str:
    """A number for a sentence: 3 significant digits, thousands separators for large values, powers of ten
    beyond a billion or below 1e-4 (``1.23e+97``, not 98 digits)."""
    if x is None or not math.isfinite(float(x)):
        return "n/a"
    ax = abs(x)
    if ax >= 1e9 or 0 < ax < 1e-4:
        return f"{x:.{digits}g}"
    if ax >= 1000:
        return f"{x:,.0f}"
    if ax >= 100:
        return f"{x:.0f}"
    if ax == 0:
        return "0"
    return f"{x:.{digits}g}"


#: p-value range of each family of tabulated tests (test-name prefix -> (smallest, largest) p-value the
#: table can give): a p-value at an edge was clipped there and only bounds the true one
#: (drift.engine.tables.monitoring.pvalue and drift.engine.tables.family.pvalue clip to their tail
#: probabilities, both 0.001 .. 0.5)
_EDGES = (float(min(_mon_table.TAIL_PROBS)), float(max(_mon_table.TAIL_PROBS)))
PVALUE_EDGES: dict[str, tuple[float, float]] = {"monitor-": _EDGES, "forecast-": _EDGES}


def pvalue_edges(test: str | None) -> tuple[float, float] | None:
    """The table range a test's p-value was clipped to, or None for a p-value that is not clipped."""
    for prefix, edges in PVALUE_EDGES.items():
        if test and str(test).startswith(prefix):
            return edges
    return None


def fmt_p(p: float | None, test: str | None = None) -> str:
    """A p-value for people; one clipped at its table's edge is shown as a bound (``< 0.005``, ``> 0.5``).

    Parameters
    ----------
    p : the p-value (None/NaN: ``n/a``).
    test : the test's name in the payload (``monitor-cusum``, ``forecast-mean``, ...): it says which table
        the p-value came from (:data:`PVALUE_EDGES`).
    """
    if p is None or not math.isfinite(float(p)):
        return "n/a"
    p = float(p)
    edges = pvalue_edges(test)
    if edges is not None:
        lo, hi = edges
        if p <= lo * (1 + 1e-9):
            return f"< {lo:g}"
        if p >= hi * (1 - 1e-9):
            return f"> {hi:g}"
    if p == 0:
        return "0"
    if p < 0.001:
        return f"{p:.1e}"
    return f"{p:.2g}" if p < 0.1 else f"{p:.2f}"


#: beyond this ratio of the new to the old value (or below its inverse), or across zero, a change is said in
#: words ("from 0.02 to 2.5"), not as a percentage (common practice, no source)
PCT_RATIO_MAX = 10.0


def change_words(before: float, after: float) -> str:
    """How a value moved, in words: ``fell by about 45%``, ``reversed sign, from 3.53 to -8.64``,
    ``rose from 0.01 to 2.5`` (a base near zero), ``fell from 2.1 to 0.03``; never a fall of over 100%."""
    if not (math.isfinite(before) and math.isfinite(after)):
        return ""
    if before == after:
        return "unchanged"
    if before * after < 0:
        return f"reversed sign, from {fmt_num(before)} to {fmt_num(after)}"
    word = "rose" if abs(after) > abs(before) else "fell"
    if before == 0 or after == 0 or not 1 / PCT_RATIO_MAX <= after / before <= PCT_RATIO_MAX:
        return f"{word} from {fmt_num(before)} to {fmt_num(after)}"
    return f"{word} by about {abs((after - before) / before) * 100:.0f}%"


def window_words(used: int, window: int) -> str:
    """The window a figure covers, as used: ``the last 52 periods``, or ``48 of the last 52 periods`` when
    some periods had no value."""
    if used >= window:
        return f"the last {window} period{'s' if window != 1 else ''}"
    return f"{used} of the last {window} periods"


def as_map(x: Any) -> Mapping[str, Any]:
    """``x`` when it is a mapping, else an empty one (payload blocks may be missing or null)."""
    return x if isinstance(x, Mapping) else {}


def _window_of(acc: Mapping[str, Any], n: int | None) -> str:
    window = acc.get("window")
    if not isinstance(window, int) or window <= 0:
        return f"{n} periods" if n is not None else "the recent periods"
    return window_words(int(n if n is not None else window), window)


def accuracy_sentence(acc: Mapping[str, Any] | None, unit: str | None = None) -> str:
    """The accuracy block of a payload in one paragraph: the window as used (periods scored, first and last),
    the model's MAE, RMSE and bias, the seasonal-naive baseline's MAE on the same periods, and the MASE of
    both on the one scale it says (the reference period's seasonal-naive MAE). "" without figures."""
    if not isinstance(acc, Mapping):
        return ""
    m = as_map(acc.get("model"))
    b = as_map(acc.get("baseline"))
    if not m or m.get("mae") is None:
        return ""
    u = f" {unit}" if unit else ""
    span = f" ({acc['start']} to {acc['end']})" if acc.get("start") and acc.get("end") else ""
    out = (f"One-step as-deployed accuracy over {_window_of(acc, m.get('n'))}{span}: MAE {fmt_num(m.get('mae'))}"
           f"{u}, RMSE {fmt_num(m.get('rmse'))}, bias {fmt_num(m.get('bias'))}.")
    if b.get("mae") is not None:
        out += f" A seasonal-naive forecast on the same periods: MAE {fmt_num(b.get('mae'))}{u}."
    scale = as_map(acc.get("scale"))
    if m.get("mase") is not None:
        vs = f" vs {fmt_num(b.get('mase'))} for the seasonal-naive forecast" if b.get("mase") is not None else ""
        on = (f" (each MAE divided by the seasonal-naive MAE of the reference period, {fmt_num(scale['mae'])}{u})"
              if scale.get("mae") is not None else " (MAE divided by the reference period's "
              "seasonal-naive MAE)")
        out += f" MASE {fmt_num(m.get('mase'))}{vs}{on}."
    return out


def accuracy_short(acc: Mapping[str, Any] | None) -> str:
    """A table cell: ``MASE 1.46 vs 1.57 seasonal naive (52 of 52)``; MAE when there is no MASE."""
    if not isinstance(acc, Mapping):
        return ""
    m = as_map(acc.get("model"))
    b = as_map(acc.get("baseline"))
    key, name = ("mase", "MASE") if m.get("mase") is not None else ("mae", "MAE")
    if m.get(key) is None:
        return ""
    out = f"{name} {fmt_num(m.get(key))}"
    if b.get(key) is not None:
        out += f" vs {fmt_num(b.get(key))} seasonal naive"
    return out + f" ({_window_of(acc, m.get('n'))})"
