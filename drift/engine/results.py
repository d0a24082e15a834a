"""The one immutable result type of every statistical test in drift.

Every test returns a :class:`TestResult` (or a subclass adding paths, e.g. the CUSUM path and its
bounds). Results are *batched*: for a batch of ``M`` models ``statistic`` and ``pvalue`` are arrays of
shape ``(M,)``; when a function was given a single model (1-D ``y``) they are plain floats. One
vocabulary everywhere: ``statistic``, ``pvalue``, ``critical_values`` keyed by level (0.10, 0.05, 0.01),
``nobs``, ``null`` / ``alternative`` (hypotheses as text), ``method``, ``params`` (parameters actually
used). A test that locates a break also sets ``break_index`` (index of the first observation of the new
regime, in the coordinates of the input arrays; -1 where none).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np


def _fmt(v: Any) -> str:
    a = np.asarray(v)
    if a.ndim == 0:
        x = float(a)
        return f"{x:.4g}" if np.isfinite(x) else "nan"
    if a.size <= 6:
        return "[" + ", ".join(_fmt(x) for x in a.ravel()) + "]"
    return f"array{a.shape}"


@dataclass(frozen=True)
class TestResult:
    """Result of one statistical test (possibly over a batch of models).

    Attributes
    ----------
    statistic : float or ndarray (M,)
    pvalue : float or ndarray (M,); NaN where not defined.
    critical_values : mapping level -> critical value (float or ndarray (M,) when it depends on n).
    nobs : int or ndarray (M,) of observations used.
    null, alternative : hypotheses in words.
    method : short name of the test, e.g. "Recursive CUSUM (Brown, Durbin & Evans 1975)".
    params : parameters actually used (trimming, window, level, ...).
    break_index : located break, index of first observation of the new regime (-1: none), or None.
    """

    __test__ = False  # not a pytest test class

    statistic: Any
    pvalue: Any
    critical_values: Mapping[float, Any] = field(default_factory=dict)
    nobs: Any = None
    null: str = ""
    alternative: str = ""
    method: str = ""
    params: Mapping[str, Any] = field(default_factory=dict)
    break_index: Any = None

    def reject(self, level: float = 0.05) -> Any:
        """True where the p-value is below ``level`` (False where it is NaN)."""
        p = np.asarray(self.pvalue, dtype=float)
        out = np.where(np.isnan(p), False, p < level)
        return bool(out) if out.ndim == 0 else out

    def summary(self) -> str:
        """A few lines of plain text describing the result."""
        lines = [self.method or type(self).__name__]
        if self.null:
            lines.append(f"  H0: {self.null}")
        if self.alternative:
            lines.append(f"  H1: {self.alternative}")
        lines.append(f"  statistic = {_fmt(self.statistic)}, p-value = {_fmt(self.pvalue)}")
        if self.critical_values:
            cv = ", ".join(f"{lvl:.0%}: {_fmt(v)}" for lvl, v in sorted(self.critical_values.items()))
            lines.append(f"  critical values: {cv}")
        if self.nobs is not None:
            lines.append(f"  nobs = {_fmt(self.nobs)}")
        if self.break_index is not None:
            lines.append(f"  break index = {_fmt(self.break_index)}")
        if self.params:
            lines.append("  params: " + ", ".join(f"{k}={v}" for k, v in self.params.items()))
        return "\n".join(lines)

    def __str__(self) -> str:  # pragma: no cover - convenience
        return self.summary()
