"""Offline change-point search in a regression (or a 1-D series) with penalised least-squares costs.

Wraps ``ruptures`` (PELT, binary segmentation, dynamic programming) behind one function and one
convention.

Convention
----------
A change point is the index, in the coordinates of the input arrays, of the **first observation of the
new regime**. A partition of a model's usable rows ``0..n-1`` is a strictly increasing tuple of change
points in ``1..n-1``, each segment at least ``min_size`` rows long; :func:`check_partition` is the one
place that validates a partition. (ruptures reports the same thing, with ``n`` appended.) Rows with NaN
are dropped per model before the search; change points are mapped back to input indices.

Search and cost
---------------
``cost="linear"``: segment cost is the RSS of the OLS fit of y on X within the segment (``X=None``
means a constant only). ``cost="l2"``: segment cost is the sum of squared deviations from the segment
mean of a 1-D series (e.g. recursive residuals). The linear cost is computed from explicit residuals
(ruptures' ``CostLinear`` reports 0 for rank-deficient segments). ``ruptures`` is always called with ``jump=1`` (its
default ``jump=5`` only allows breaks at multiples of 5).

Penalty ``"bic"`` (per change, on the RSS scale): ``(p + 1) * sigma2 * ln(n)`` with p the number of
regression coefficients (p = 1 for ``"l2"``, giving ``2 sigma2 ln n``); Yao (1988). ``sigma2`` is
estimated robustly unless given: with e the full-sample OLS residuals (l2: deviations from the mean),
``sigma = MAD(diff(e)) / (Phi^{-1}(3/4) sqrt(2))`` -- differencing removes the level shifts a break
leaves in e, the MAD ignores the few large differences at the breaks. If that is zero (noise-free
data), the full-sample residual variance RSS / (n - p) is used instead.

ruptures is not batched, so the search loops over models; it is meant for models already flagged by
the batched tests. PELT with the l2 cost (the break dating of the check) runs ``_pelt_l2``, ruptures'
Pelt recursion without its per-candidate dictionaries: the same breakpoints by the same arithmetic
(tested against ruptures), at about half the time.
"""

from __future__ import annotations

import itertools
import math
import sys
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from drift.engine.results import TestResult
from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray, IntArray

__all__ = ["COSTS", "METHODS", "ChangePointResult", "Segment", "change_points", "check_partition"]  # noqa: F822 - METHODS: __getattr__

#: the searches change_points takes (``METHODS``, short name -> ruptures search class, is built on first use:
#: importing ruptures costs ~0.5 s, and the check's l2 PELT search does not need it)
_METHOD_NAMES = ("pelt", "binseg", "dynp")
COSTS = ("linear", "l2")
DEFAULT_TRIM = 0.15  # minimum segment as a fraction of n: the usual break-test trimming (Andrews 1993)


@dataclass(frozen=True)
class Segment:
    """One regime: rows ``start <= t < stop`` (input coordinates), its OLS coefficients and RSS."""

    start: int
    stop: int
    nobs: int
    coef: FloatArray
    rss: float


@dataclass(frozen=True)
class ChangePointResult(TestResult):
    """Result of :func:`change_points`.

    ``statistic`` is the number of change points found (no p-value: NaN); ``break_index`` the first one
    (-1 if none).

    Attributes
    ----------
    break_indices : tuple of int (single model) or tuple of such tuples (one per model).
    break_array : ndarray of int, (M, max_found) or (max_found,), padded with -1.
    segments : tuple of :class:`Segment` (single model) or tuple of such tuples.
    sigma2 : float or ndarray (M,), the noise variance used in the penalty.
    penalty_value : float or ndarray (M,), the penalty per change point actually used.
    """

    break_indices: Any = None
    break_array: Any = None
    segments: Any = None
    sigma2: Any = None
    penalty_value: Any = None


def check_partition(breaks: Sequence[int], n: int, min_size: int = 1) -> tuple[int, ...]:
    """Validate a partition of rows ``0..n-1`` given as change points (first rows of new regimes).

    Returns the change points as a tuple of int. Raises ``ValueError`` if they are not strictly
    increasing integers in ``1..n-1`` or a segment is shorter than ``min_size``.
    """
    b = tuple(int(x) for x in breaks)
    if any(int(x) != x for x in breaks):
        raise ValueError(f"change points must be integers, got {list(breaks)!r}")
    edges = (0, *b, n)
    if any(lo >= hi for lo, hi in itertools.pairwise(edges)):
        raise ValueError(f"change points must be strictly increasing in 1..{n - 1}, got {list(b)!r}")
    short = [hi - lo for lo, hi in itertools.pairwise(edges) if hi - lo < min_size]
    if short:
        raise ValueError(f"segments of {short} rows are shorter than min_size={min_size}: {list(b)!r}")
    return b


def _robust_sigma2(e: FloatArray, p: int) -> float:
    """sigma^2 from the MAD of first differences of residuals; residual variance if that is zero."""
    d = np.diff(e)
    mad = float(np.median(np.abs(d - np.median(d)))) if d.size else 0.0
    sigma = mad / (stats.norm.ppf(0.75) * math.sqrt(2.0))
    if sigma > 0:
        return sigma**2
    dof = max(e.size - p, 1)
    return float(e @ e) / dof


_RUPTURES: dict[str, Any] = {}


def _ruptures() -> dict[str, Any]:
    """ruptures and what is built on it (``rpt``, ``METHODS``, the costs ``_LinearRSS`` and ``_CumL2``),
    imported on first use; also what the module's ``__getattr__`` gives for those names."""
    if _RUPTURES:
        return _RUPTURES
    import ruptures as rpt

    class _LinearRSS(rpt.base.BaseCost):  # type: ignore[misc]
        """Regression RSS of a segment, computed from explicit residuals.

        ruptures' own ``CostLinear`` takes the RSS from ``numpy.linalg.lstsq``, which returns an empty
        residual (cost 0) whenever the segment's regressors are rank deficient; this cost does not.
        """

        model = "linear_rss"
        min_size = 2

        def fit(self, signal: FloatArray) -> _LinearRSS:
            self.signal = signal[:, 0]
            self.covar = signal[:, 1:]
            return self

        def error(self, start: int, end: int) -> float:
            if end - start < self.min_size:
                raise rpt.costs.NotEnoughPoints
            _, r = _ols(self.signal[start:end], self.covar[start:end])
            return float(r @ r)


    class _CumL2(rpt.base.BaseCost):  # type: ignore[misc]
        """Sum of squared deviations from the segment mean, O(1) per segment from cumulative sums.

        Same value as ruptures' ``CostL2`` (which recomputes the variance of every candidate segment, the
        dominant cost of a jump=1 search); the series is centred first so the running sums stay accurate.
        """

        model = "l2_cumulative"
        min_size = 1

        def fit(self, signal: FloatArray) -> _CumL2:
            self.signal = np.asarray(signal, dtype=float).reshape(len(signal), -1)
            v = self.signal[:, 0] - self.signal[:, 0].mean()
            self.s1 = np.concatenate([[0.0], np.cumsum(v)])
            self.s2 = np.concatenate([[0.0], np.cumsum(v * v)])
            return self

        def error(self, start: int, end: int) -> float:
            if end - start < self.min_size:
                raise rpt.costs.NotEnoughPoints
            s1 = self.s1[end] - self.s1[start]
            return float(max(self.s2[end] - self.s2[start] - s1 * s1 / (end - start), 0.0))

    _RUPTURES.update(rpt=rpt, METHODS={"pelt": rpt.Pelt, "binseg": rpt.Binseg, "dynp": rpt.Dynp},
                     _LinearRSS=_LinearRSS, _CumL2=_CumL2)
    return _RUPTURES


def __getattr__(name: str) -> Any:
    if name in ("rpt", "METHODS", "_LinearRSS", "_CumL2"):
        return _ruptures()[name]
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


#: Python's ``sum`` of floats adds left to right before 3.12 (compensated summation since): a partition's
#: total is then its parent's total plus the new segment's cost, computed for all candidates at once
_SEQUENTIAL_SUM = sys.version_info < (3, 12)
#: most admissible starts for which _pelt_l2 forms the costs in Python floats (numpy beyond)
_PELT_PY_MAX = 40


def _first_min(tot: list[float]) -> int:
    """Index of the first minimum by ``min()``'s own comparisons (NaN included); ValueError when empty
    (every start pruned on NaN totals), as ``np.argmin`` of nothing raised."""
    if not tot:
        raise ValueError("attempt to get argmin of an empty sequence")
    best = 0
    for j in range(1, len(tot)):
        if tot[j] < tot[best]:
            best = j
    return best


def _pelt_l2(signal: FloatArray, pen: float, min_size: int) -> list[int]:
    """``rpt.Pelt(custom_cost=_CumL2(), min_size=min_size, jump=1).fit(signal).predict(pen=pen)``: the same
    breakpoints by the same arithmetic, without ruptures' per-candidate dictionaries.

    ruptures keeps, for every candidate end ``t``, the optimal partition of ``0..t`` as a dictionary of
    segment costs (each ``error + pen``, after a first entry 0) and compares partitions by the Python
    ``sum`` of those values. Here the segment costs of the candidate starts are computed by ``_CumL2``'s
    formula (the same floating-point operations), a partition's total is formed as
    ``sum`` forms it (its parent's total plus the new cost while ``sum`` adds left to right; the summed
    list of costs otherwise), the first minimum wins as in ``min`` and the admissible starts are pruned by
    the same test. A start ``t`` with no partition of ``0..t`` (``0 < t < min_size``) is skipped, as
    ruptures skips it.
    """
    n = int(signal.shape[0])
    if min_size > n:  # ruptures' sanity check for no change
        raise _ruptures()["rpt"].exceptions.BadSegmentationParameters
    # _CumL2's running sums (its fit, the same operations). While the admissible starts are few (the usual
    # case after pruning) the costs are formed in Python floats, below numpy's per-call overhead; when many
    # are left (long series without change) in numpy: the same IEEE operations either way
    sig = np.asarray(signal, dtype=float).reshape(len(signal), -1)
    v = sig[:, 0] - sig[:, 0].mean()
    s1a = np.concatenate([[0.0], np.cumsum(v)])
    s2a = np.concatenate([[0.0], np.cumsum(v * v)])
    s1, s2 = s1a.tolist(), s2a.tolist()
    sequential = _SEQUENTIAL_SUM
    total = [0.0] * (n + 1)  # total cost of the optimal partition of 0..t
    total_a = np.zeros(n + 1)  # the same, for the numpy branch
    values: dict[int, list[float]] = {0: [0]}  # its segment costs in order (compensated sum only)
    back = [0] * (n + 1)
    adm: list[int] | IntArray = []  # a list while short, an array once long
    for bkp in [*range(min_size, n), n]:
        new = bkp - min_size
        if new == 0 or new >= min_size:
            adm = adm + [new] if isinstance(adm, list) else np.append(adm, new)
        if len(adm) > _PELT_PY_MAX:
            ad = np.asarray(adm, dtype=np.int64)
            d1a = s1a[bkp] - s1a[ad]
            err_a = np.maximum(s2a[bkp] - s2a[ad] - d1a * d1a / (bkp - ad), 0.0) + pen
            tot_a = (total_a[ad] + err_a if sequential
                     else np.array([sum([*values[t], e]) for t, e in zip(ad.tolist(), err_a.tolist())]))
            # the first minimum, as min() takes it (min()'s own comparisons when a total is NaN)
            best = int(np.argmin(tot_a)) if np.isfinite(tot_a).all() else _first_min(tot_a.tolist())
            total[bkp] = total_a[bkp] = float(tot_a[best])
            err_best = float(err_a[best])
            back[bkp] = int(ad[best])
            adm = ad[tot_a <= total[bkp] + pen]
        else:
            al = adm if isinstance(adm, list) else adm.tolist()
            a1, a2 = s1[bkp], s2[bkp]
            err = []
            for t in al:
                d1 = a1 - s1[t]
                e = a2 - s2[t] - d1 * d1 / (bkp - t)
                err.append((e if e >= 0.0 or math.isnan(e) else 0.0) + pen)  # np.maximum(e, 0.0)
            if sequential:
                tot = [total[t] + e for t, e in zip(al, err)]
            else:
                tot = [sum([*values[t], e]) for t, e in zip(al, err)]
            best = _first_min(tot)
            total[bkp] = total_a[bkp] = tot[best]
            err_best = err[best]
            back[bkp] = al[best]
            bound = total[bkp] + pen
            adm = [t for t, x in zip(al, tot) if x <= bound]
        if not sequential:
            values[bkp] = [*values[back[bkp]], err_best]
    bkps = []
    t = n
    while t > 0:
        bkps.append(t)
        t = back[t]
    return sorted(bkps)


def _ols(y: FloatArray, X: FloatArray) -> tuple[FloatArray, FloatArray]:
    coef, *_ = np.linalg.lstsq(X, y, rcond=None)
    return np.asarray(coef, dtype=np.float64), np.asarray(y - X @ coef, dtype=np.float64)


def _penalised_fixed_k(algo: Any, pen: float, kmax: int) -> list[int]:
    """Best partition over 0..kmax changes for searches that take a number of changes."""
    n = algo.n_samples
    best, best_val = [n], algo.cost.sum_of_costs([n])
    for k in range(1, kmax + 1):
        try:
            bk = algo.predict(n_bkps=k)
        except _ruptures()["rpt"].exceptions.BadSegmentationParameters:
            break
        val = algo.cost.sum_of_costs(bk) + pen * k
        if val < best_val:
            best, best_val = bk, val
    return best


def change_points(y: object, X: object = None, *, method: str = "pelt", cost: str = "linear",
                  penalty: str | float = "bic", min_size: int | None = None, max_breaks: int | None = None,
                  sigma2: float | Sequence[float] | None = None) -> ChangePointResult:
    r"""Find change points in a regression of y on X (or in a 1-D series) by penalised least squares.

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
    X : array_like, (n, k) or (M, n, k), optional
        Regressors for ``cost="linear"``; None means a constant only. Must be None for ``"l2"``.
    method : {"pelt", "binseg", "dynp"}
        Search: PELT (exact, Killick et al. 2012), binary segmentation, or dynamic programming (exact,
        over at most ``max_breaks`` changes).
    cost : {"linear", "l2"}
        Segment cost: regression RSS, or squared deviations from the segment mean.
    penalty : "bic" or float > 0
        Penalty per change point on the RSS scale ("bic": (p+1) sigma2 ln n, see the module notes).
    min_size : int, optional
        Minimum segment length; default max(p + 1, ceil(0.15 n)); must be >= p + 1.
    max_breaks : int, optional
        For "binseg" and "dynp": the most changes considered (default: as many as ``min_size``
        allows); the penalised best number in 0..max_breaks is chosen. Not accepted by "pelt".
    sigma2 : float or sequence of float (M,), optional
        Noise variance for the "bic" penalty; estimated robustly when None.

    Returns
    -------
    ChangePointResult
        Change points (first observation of each new regime, input coordinates), per-segment OLS
        coefficients and RSS, and the sigma2 / penalty used.

    Raises
    ------
    InsufficientDataError
        When no model has at least ``min_size`` usable rows.
    ValueError, TypeError
        Unknown method/cost, bad penalty, min_size, max_breaks or sigma2, bad shapes.

    Notes
    -----
    Minimises :math:`\sum_{j=0}^{K} C(y_{\tau_j:\tau_{j+1}}) + K \beta` over partitions with segments of
    at least ``min_size`` rows, C the segment RSS and beta the penalty.

    References
    ----------
    Killick, R., Fearnhead, P. & Eckley, I. A. (2012). JASA 107(500), 1590-1598.
    Yao, Y.-C. (1988). Estimating the number of change-points via Schwarz' criterion. Statistics &
    Probability Letters 6(3), 181-189.
    Truong, C., Oudre, L. & Vayatis, N. (2020). Selective review of offline change point detection
    methods. Signal Processing 167 (the ruptures package).
    """
    if method not in _METHOD_NAMES:
        raise ValueError(f"method must be one of {sorted(_METHOD_NAMES)}, got {method!r}")
    if cost not in COSTS:
        raise ValueError(f"cost must be one of {COSTS}, got {cost!r}")
    try:
        ya = np.asarray(y, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"y must be a numeric array: {exc}") from None
    if ya.ndim not in (1, 2):
        raise ValueError(f"y must be (n,) or (M, n), got shape {ya.shape}")
    batched = ya.ndim == 2
    if not batched:
        ya = ya[None]
    M, n = ya.shape
    if X is None:
        Xa = np.ones((M, n, 1))
    else:
        if cost == "l2":
            raise ValueError("cost='l2' works on a 1-D series per model: pass X=None (or use cost='linear')")
        Xa = np.asarray(X, dtype=np.float64)
        if Xa.ndim != (3 if batched else 2):
            raise ValueError(f"X must be (n, k) for y (n,) or (M, n, k) for y (M, n); got {Xa.shape}")
        if not batched:
            Xa = Xa[None]
        if Xa.shape[:2] != (M, n) or Xa.shape[2] < 1:
            raise ValueError(f"X shape {Xa.shape} does not match y shape {ya.shape}")
    if np.isinf(ya).any() or np.isinf(Xa).any():
        raise ValueError("y and X must not contain infinite values (mark missing values as NaN)")
    k = Xa.shape[2]
    p = 1 if cost == "l2" else k
    if isinstance(penalty, str):
        if penalty != "bic":
            raise ValueError(f"penalty must be 'bic' or a positive number, got {penalty!r}")
    elif isinstance(penalty, bool) or not isinstance(penalty, (int, float, np.floating)) or not penalty > 0 \
            or not math.isfinite(penalty):
        raise ValueError(f"penalty must be 'bic' or a positive finite number, got {penalty!r}")
    if min_size is not None and (isinstance(min_size, bool) or not isinstance(min_size, (int, np.integer))
                                 or min_size < p + 1):
        raise ValueError(f"min_size must be an integer >= p + 1 = {p + 1}, got {min_size!r}")
    if max_breaks is not None:
        if method == "pelt":
            raise ValueError("max_breaks is accepted by method 'binseg' and 'dynp', not 'pelt'")
        if isinstance(max_breaks, bool) or not isinstance(max_breaks, (int, np.integer)) or max_breaks < 0:
            raise ValueError(f"max_breaks must be a non-negative integer, got {max_breaks!r}")
    s2_given: FloatArray | None = None
    if sigma2 is not None:
        s2_given = np.broadcast_to(np.asarray(sigma2, dtype=float), (M,)).copy() if np.ndim(sigma2) <= 1 else None
        if s2_given is None or not np.all(np.isfinite(s2_given)) or np.any(s2_given <= 0):
            raise ValueError(f"sigma2 must be a positive float or ({M},) array of them, got {sigma2!r}")

    mask = np.isfinite(ya) & np.isfinite(Xa).all(axis=2)
    nn = mask.sum(axis=1)
    ms_all = [min_size if min_size is not None else max(p + 1, math.ceil(DEFAULT_TRIM * int(m) - 1e-9))
              for m in nn]
    if not any(int(m) >= ms for m, ms in zip(nn, ms_all)):
        raise InsufficientDataError(f"change-point search (min_size {ms_all[0]})", ms_all[0], int(nn.max()))

    all_breaks: list[tuple[int, ...]] = []
    all_segments: list[tuple[Segment, ...]] = []
    s2_out = np.full(M, np.nan)
    pen_out = np.full(M, np.nan)
    for i in range(M):  # ruptures is not batched (see module notes)
        rows = np.flatnonzero(mask[i])
        ms = ms_all[i]
        if rows.size < ms:
            all_breaks.append(())
            all_segments.append(())
            continue
        yi, Xi = ya[i, rows], Xa[i, rows]
        m = rows.size
        _, e = _ols(yi, Xi)
        s2 = float(s2_given[i]) if s2_given is not None else _robust_sigma2(e, p)
        pen = (p + 1) * s2 * math.log(m) if penalty == "bic" else float(penalty)
        s2_out[i], pen_out[i] = s2, pen
        if rows.size < 2 * ms or pen <= 0:
            bk: list[int] = [m]
        else:
            signal = yi[:, None] if cost == "l2" else np.column_stack([yi, Xi])
            if cost == "l2" and method == "pelt":
                bk = _pelt_l2(signal, pen, ms)  # ruptures' Pelt, the same arithmetic, without its overhead
            else:
                rp = _ruptures()
                algo = rp["METHODS"][method](custom_cost=rp["_CumL2"]() if cost == "l2" else rp["_LinearRSS"](),
                                             min_size=ms, jump=1).fit(signal)
                if method == "pelt":
                    bk = algo.predict(pen=pen)
                else:
                    kmax = m // ms - 1 if max_breaks is None else int(max_breaks)
                    bk = _penalised_fixed_k(algo, pen, kmax)
        local = check_partition(bk[:-1], m, ms)
        edges = (0, *local, m)
        segs = []
        for a, b in itertools.pairwise(edges):
            coef, r = _ols(yi[a:b], Xi[a:b])
            segs.append(Segment(start=int(rows[a]), stop=int(rows[b]) if b < m else n, nobs=b - a,
                                coef=coef, rss=float(r @ r)))
        all_breaks.append(tuple(int(rows[j]) for j in local))
        all_segments.append(tuple(segs))

    width = max((len(b) for b in all_breaks), default=0)
    arr: IntArray = np.full((M, width), -1, dtype=np.int64)
    for i, bks in enumerate(all_breaks):
        arr[i, :len(bks)] = bks
    count = np.array([len(b) for b in all_breaks], dtype=np.int64)
    first = np.where(count > 0, arr[:, 0] if width else -1, -1)
    sq = (lambda a: a) if batched else (lambda a: a[0])
    return ChangePointResult(
        statistic=sq(count) if batched else int(count[0]), pvalue=sq(np.full(M, np.nan)) if batched else math.nan,
        nobs=sq(nn) if batched else int(nn[0]),
        null="no change in the regression over the sample",
        alternative="piecewise-constant coefficients with changes at the reported indices",
        method=f"penalised least-squares change points ({method}, {cost} cost)",
        params={"method": method, "cost": cost, "penalty": penalty, "min_size": sq(np.array(ms_all)),
                "max_breaks": max_breaks, "jump": 1, "p": p},
        break_index=sq(first) if batched else int(first[0]),
        break_indices=tuple(all_breaks) if batched else all_breaks[0],
        break_array=arr if batched else arr[0],
        segments=tuple(all_segments) if batched else all_segments[0],
        sigma2=s2_out if batched else float(s2_out[0]),
        penalty_value=pen_out if batched else float(pen_out[0]),
    )
