"""The CUSUM family: recursive-residual CUSUM, CUSUM of squares, and the OLS-residual CUSUM.

All three take residuals already computed (batched, model axis first, NaN where undefined) and return
a :class:`~drift.engine.results.TestResult`; the first two return a :class:`CusumResult` carrying the
path, its boundaries and the first crossing of each level.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from drift.engine.results import TestResult
from drift.engine.tables import bde, edgerton_wells, ploberger_kramer
from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray, IntArray

__all__ = ["CusumResult", "cusum", "cusum_squares", "first_signal", "ols_cusum"]

_DEFAULT_LEVELS = (0.10, 0.05, 0.01)
# fewest defined recursive residuals: the sample standard deviation needs two
_MIN_CUSUM = 2
# fewest defined recursive residuals for the Edgerton-Wells approximation (n = m/2 - 1 >= MIN_N)
_MIN_CUSUMSQ = int(np.ceil(2.0 * (edgerton_wells.MIN_N + 1.0)))
# fewest residuals for the OLS-residual CUSUM (beyond ddof)
_MIN_OLS = 2


@dataclass(frozen=True)
class CusumResult(TestResult):
    """A CUSUM-type test result with its path.

    Attributes
    ----------
    path : ndarray (M, n) or (n,)
        The CUSUM (or CUSUM-of-squares) path aligned to the input index, NaN where undefined.
    bounds : mapping level -> ndarray like ``path``
        Upper boundary at each defined position.
    lower_bounds : mapping level -> ndarray like ``path``
        Lower boundary (the negative of ``bounds`` for the CUSUM; ``line - c0`` for the CUSUM of squares).
    first_crossing : mapping level -> int or ndarray (M,)
        Index into the input of the first position where the path leaves the band (-1: never).
    """

    path: Any = None
    bounds: Mapping[float, Any] = field(default_factory=dict)
    lower_bounds: Mapping[float, Any] = field(default_factory=dict)
    first_crossing: Mapping[float, Any] = field(default_factory=dict)


def _as_resid(w: object, name: str) -> tuple[FloatArray, bool]:
    a = np.asarray(w, dtype=np.float64)
    if a.ndim == 1:
        return a[None, :], False
    if a.ndim == 2:
        return a, True
    raise ValueError(f"{name} must be 1-D (n,) or 2-D (M, n); got ndim={a.ndim}")


def _check_levels(levels: Iterable[float]) -> tuple[float, ...]:
    try:
        out = tuple(float(x) for x in levels)
    except TypeError:
        raise TypeError(f"levels must be an iterable of floats in (0, 1); got {levels!r}") from None
    if not out or any(not (0.0 < x < 1.0) for x in out):
        raise ValueError(f"levels must be non-empty floats in (0, 1); got {levels!r}")
    return out


def _check_k(k: int | None) -> int | None:
    if k is None:
        return None
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 0:
        raise ValueError(f"k must be None or a non-negative int (number of regressors); got {k!r}")
    return int(k)


def _first_true(mask: np.ndarray) -> IntArray:
    return np.where(mask.any(axis=1), mask.argmax(axis=1), -1).astype(np.int64)


def _squeeze(x: Any, batched: bool) -> Any:
    if batched:
        return x
    a = np.asarray(x)
    if a.ndim == 0:
        return a.item()
    return a[0] if a.ndim >= 1 and a.shape[0] == 1 else a


def _scalarise(x: np.ndarray, batched: bool) -> Any:
    return x if batched else x[0].item()


def _positions(w: FloatArray, need: int, what: str) -> tuple[np.ndarray, IntArray, np.ndarray, IntArray]:
    """Defined mask, running count r - k at defined positions, models with enough data, counts."""
    d = np.isfinite(w)
    m = d.sum(axis=1).astype(np.int64)
    enough = m >= need
    if not enough.any():
        raise InsufficientDataError(what, need, int(m.max(initial=0)),
                                    hint="counting defined (non-NaN) recursive residuals")
    j = np.cumsum(d, axis=1)
    return d, m, enough, j


def cusum(w: object, *, k: int | None = None,
          levels: Iterable[float] = _DEFAULT_LEVELS) -> CusumResult:
    r"""Brown-Durbin-Evans CUSUM test on recursive residuals.

    Parameters
    ----------
    w : array_like, (n,) or (M, n)
        Recursive residuals with NaN where undefined; the defined ones, in order, are
        :math:`w_{k+1}, \dots, w_T` (e.g. :attr:`RecursiveFit.resid`).
    k : int, optional
        Number of regressors; recorded in ``params`` only (the boundaries depend on :math:`T - k`,
        which is the count of defined residuals).
    levels : iterable of float, default (0.10, 0.05, 0.01)
        Two-sided significance levels for the boundaries (any level in (0, 1); see
        :func:`drift.engine.tables.bde.cusum_a`).

    Returns
    -------
    CusumResult
        ``statistic`` is the smallest ``a`` at which the path touches the lines, ``pvalue`` from the
        BDE crossing formula, ``critical_values`` maps level -> ``a``, ``nobs`` the number of residuals
        :math:`T-k`. Models with fewer than 2 defined residuals, or with constant residuals, get NaN.

    Raises
    ------
    InsufficientDataError
        When no model has at least 2 defined residuals.
    ValueError, TypeError
        Bad ``w``, ``k`` or ``levels``.

    Notes
    -----
    With :math:`m = T - k` defined residuals and :math:`r - k = 1, \dots, m` their running count,

    .. math:: W_r = \frac{1}{\hat\sigma}\sum_{j=k+1}^{r} w_j, \qquad
              \text{bounds } \pm a\sqrt{m}\,\Bigl(1 + 2\frac{r-k}{m}\Bigr),

    and the statistic is :math:`\max_r |W_r| / (\sqrt{m}(1 + 2(r-k)/m))`, with p-value
    :math:`\min\{1, 2[1-\Phi(3a)+e^{-4a^2}\Phi(a)]\}`.

    :math:`\hat\sigma` convention: the sample standard deviation of the recursive residuals about their
    mean, ``std(w, ddof=1)``, as statsmodels 0.15.0 ``RecursiveLSResults.cusum`` does, so the path equals
    statsmodels'. (BDE write :math:`\hat\sigma^2 = S_T/(T-k)`, the uncentred mean square; the centred
    version is smaller when the residuals drift, which makes the test somewhat more sensitive.)
    Boundaries use the BDE constants (0.850 at 10%; statsmodels uses 0.950 there).

    References
    ----------
    Brown, R. L., Durbin, J. & Evans, J. M. (1975). Techniques for testing the constancy of regression
    relationships over time. JRSS B 37(2), 149-192.
    """
    kk = _check_k(k)
    lv = _check_levels(levels)
    wa, batched = _as_resid(w, "w")
    d, m, enough, j = _positions(wa, _MIN_CUSUM, "recursive CUSUM")
    wz = np.where(d, wa, 0.0)
    S = np.cumsum(wz, axis=1)
    ms = np.maximum(m, 1).astype(float)
    mean = S[:, -1] / ms
    dev = np.where(d, wa - mean[:, None], 0.0)
    var = (dev * dev).sum(axis=1) / np.maximum(m - 1, 1)
    sigma = np.sqrt(var)
    good = enough & (sigma > 0.0)
    sig = np.where(good, sigma, 1.0)
    dg = d & good[:, None]
    path = np.where(dg, S / sig[:, None], np.nan)
    shape = np.where(dg, np.sqrt(ms)[:, None] * (1.0 + 2.0 * j / ms[:, None]), np.nan)
    with np.errstate(invalid="ignore"):
        ratio = np.where(dg, np.abs(path) / np.where(dg, shape, 1.0), -np.inf)
    stat = np.where(good, ratio.max(axis=1), np.nan)
    pval = bde.crossing_probability(stat)

    crit: dict[float, float] = {}
    bounds: dict[float, Any] = {}
    lower: dict[float, Any] = {}
    crossing: dict[float, Any] = {}
    for lvl in lv:
        a = bde.cusum_a(lvl)
        crit[lvl] = a
        ub = a * shape
        bounds[lvl] = _squeeze(ub, batched)
        lower[lvl] = _squeeze(-ub, batched)
        with np.errstate(invalid="ignore"):
            crossing[lvl] = _scalarise(_first_true(dg & (np.abs(np.where(dg, path, 0.0)) > np.where(dg, ub, 0.0))),
                                       batched)
    return CusumResult(
        statistic=_scalarise(stat, batched),
        pvalue=_scalarise(pval, batched),
        critical_values=crit,
        nobs=_scalarise(m, batched),
        null="coefficients and error variance constant over time",
        alternative="systematic drift in the recursive residuals (coefficient change)",
        method="Recursive CUSUM (Brown, Durbin & Evans 1975)",
        params={"k": kk, "sigma": "std(w, ddof=1)", "levels": lv},
        path=_squeeze(path, batched),
        bounds=bounds,
        lower_bounds=lower,
        first_crossing=crossing,
    )


def cusum_squares(w: object, *, k: int | None = None,
                  levels: Iterable[float] = _DEFAULT_LEVELS) -> CusumResult:
    r"""CUSUM-of-squares test on recursive residuals with Edgerton-Wells critical values.

    Parameters
    ----------
    w : array_like, (n,) or (M, n)
        Recursive residuals with NaN where undefined.
    k : int, optional
        Number of regressors; recorded in ``params`` only.
    levels : iterable of float, default (0.10, 0.05, 0.01)
        Two-sided levels; each must be one of 0.20, 0.10, 0.05, 0.02, 0.01 (the table's one-sided
        columns doubled).

    Returns
    -------
    CusumResult
        ``statistic`` = :math:`D = \max_r |s_r - (r-k)/(T-k)|`, ``pvalue`` by inverting the
        approximation (:func:`drift.engine.tables.edgerton_wells.pvalue`), ``critical_values`` level ->
        ``c0`` per model. Models with fewer than 6 defined residuals (or all zero) get NaN.

    Raises
    ------
    InsufficientDataError
        When no model has at least 6 defined residuals.
    ValueError, TypeError
        Bad ``w``, ``k`` or ``levels``.

    Notes
    -----
    .. math:: s_r = \sum_{j=k+1}^{r} w_j^2 \Big/ \sum_{j=k+1}^{T} w_j^2, \qquad
              \text{bounds } \frac{r-k}{T-k} \pm c_0(n, \alpha/2), \quad n = \tfrac12(T-k) - 1.

    The path equals statsmodels 0.15.0 ``RecursiveLSResults.cusum_squares``.

    References
    ----------
    Brown, Durbin & Evans (1975), JRSS B 37(2), 149-192.
    Edgerton, D. & Wells, C. (1994). Oxford Bulletin of Economics and Statistics 56(3), 355-365.
    """
    kk = _check_k(k)
    lv = _check_levels(levels)
    for lvl in lv:
        edgerton_wells.c0(10.0, lvl, sided=2)  # validates the level against the table's columns
    wa, batched = _as_resid(w, "w")
    d, m, enough, j = _positions(wa, _MIN_CUSUMSQ, "CUSUM of squares")
    sq = np.where(d, wa * wa, 0.0)
    C = np.cumsum(sq, axis=1)
    total = C[:, -1]
    good = enough & (total > 0.0)
    dg = d & good[:, None]
    tot = np.where(good, total, 1.0)
    ms = np.maximum(m, 1).astype(float)
    path = np.where(dg, C / tot[:, None], np.nan)
    line = np.where(dg, j / ms[:, None], np.nan)
    dev = np.where(dg, np.abs(path - np.where(dg, line, 0.0)), -np.inf)
    stat = np.where(good, dev.max(axis=1), np.nan)
    n_ew = np.where(good, edgerton_wells.ew_n(m), np.nan)
    pval = edgerton_wells.pvalue(stat, n_ew)

    crit: dict[float, Any] = {}
    bounds: dict[float, Any] = {}
    lower: dict[float, Any] = {}
    crossing: dict[float, Any] = {}
    for lvl in lv:
        c = edgerton_wells.c0(n_ew, lvl, sided=2)
        crit[lvl] = _scalarise(c, batched)
        bounds[lvl] = _squeeze(line + c[:, None], batched)
        lower[lvl] = _squeeze(line - c[:, None], batched)
        cc = np.where(good, c, np.inf)
        crossing[lvl] = _scalarise(_first_true(dg & (np.where(dg, dev, 0.0) > cc[:, None])), batched)
    return CusumResult(
        statistic=_scalarise(stat, batched),
        pvalue=_scalarise(pval, batched),
        critical_values=crit,
        nobs=_scalarise(m, batched),
        null="error variance (and coefficients) constant over time",
        alternative="the squared recursive residuals accumulate unevenly (variance or coefficient change)",
        method="CUSUM of squares (Brown, Durbin & Evans 1975; Edgerton & Wells 1994 critical values)",
        params={"k": kk, "levels": lv},
        path=_squeeze(path, batched),
        bounds=bounds,
        lower_bounds=lower,
        first_crossing=crossing,
    )


def ols_cusum(resid: object, *, ddof: int = 0) -> TestResult:
    r"""Ploberger-Krämer CUSUM test on full-sample OLS residuals.

    Parameters
    ----------
    resid : array_like, (n,) or (M, n)
        OLS residuals, NaN where a row was not used (those positions are dropped).
    ddof : int, default 0
        Degrees-of-freedom correction of the error variance (the number of regressors ``k`` for
        :math:`\hat\sigma^2 = \sum\hat u^2/(T-k)`; 0 for :math:`\sum\hat u^2/T`).

    Returns
    -------
    TestResult
        ``statistic`` :math:`\sup_r |\sum_{t\le r}\hat u_t| / (\hat\sigma\sqrt T)`, ``pvalue`` from the
        Kolmogorov law (``scipy.stats.kstwobign``), critical values 10/5/1%, ``nobs`` :math:`T`,
        ``break_index`` the position of the supremum. Models with zero residuals get NaN.

    Raises
    ------
    InsufficientDataError
        When no model has more than ``ddof + 1`` residuals.
    ValueError
        Bad ``resid`` or ``ddof``.

    Notes
    -----
    Under constant coefficients the scaled cumulated OLS residuals converge to a Brownian bridge, so the
    statistic converges to :math:`\sup|B^0|`. Same convention as statsmodels 0.15.0
    ``breaks_cusumolsresid(resid, ddof)``. Nile flow, constant only, ``ddof=1``: 2.9518, p = 5.409e-08.

    References
    ----------
    Ploberger, W. & Krämer, W. (1992). The CUSUM test with OLS residuals. Econometrica 60(2), 271-285.
    """
    if isinstance(ddof, bool) or not isinstance(ddof, (int, np.integer)) or ddof < 0:
        raise ValueError(f"ddof must be a non-negative int; got {ddof!r}")
    ua, batched = _as_resid(resid, "resid")
    if np.isinf(ua).any():
        raise ValueError("resid must not contain infinite values; mark unused rows as NaN")
    d = np.isfinite(ua)
    T = d.sum(axis=1).astype(np.int64)
    need = max(_MIN_OLS, int(ddof) + 1)
    enough = T >= need
    if not enough.any():
        raise InsufficientDataError("OLS-residual CUSUM", need, int(T.max(initial=0)))
    uz = np.where(d, ua, 0.0)
    ss = (uz * uz).sum(axis=1)
    Tf = T.astype(float)
    tsig2 = ss / np.maximum(Tf - ddof, 1.0) * Tf if ddof > 0 else ss
    good = enough & (tsig2 > 0.0)
    cs = np.abs(np.cumsum(uz, axis=1)) / np.sqrt(np.where(good, tsig2, 1.0))[:, None]
    cs = np.where(d, cs, -np.inf)
    stat = np.where(good, cs.max(axis=1), np.nan)
    where = np.where(good, cs.argmax(axis=1), -1).astype(np.int64)
    pval = ploberger_kramer.pvalue(stat)
    return TestResult(
        statistic=_scalarise(stat, batched),
        pvalue=_scalarise(np.asarray(pval, dtype=float), batched),
        critical_values=dict(ploberger_kramer.OLS_CUSUM_CRITICAL),
        nobs=_scalarise(T, batched),
        null="coefficients constant over the sample",
        alternative="coefficient change (cumulated OLS residuals wander from zero)",
        method="OLS-residual CUSUM (Ploberger & Kramer 1992)",
        params={"ddof": int(ddof)},
        break_index=_scalarise(where, batched),
    )


def first_signal(w: object, test: str = "cusum", level: float = 0.05, *, standing: bool = True,
                 block: int = 32) -> Any:
    """The first position at which a check would have seen ``test`` cross its ``level`` boundary.

    The CUSUM and the CUSUM of squares normalise their whole path with the whole sample (the scale, the
    number of residuals), so the first crossing of today's path can lie before the data that make it
    cross existed. This replays the test as of every position ``n`` on the residuals up to ``n`` only
    (those a check run then had).

    Parameters
    ----------
    w : (n,) or (M, n) recursive residuals, NaN where undefined.
    test : "cusum" (:func:`cusum`) or "cusum_squares" (:func:`cusum_squares`).
    level : boundary level (any level the test accepts).
    standing : True: the first position of the run of checks, ending with the last position, that all
        crossed (when the alarm that stands today was first raised; -1 when the test does not cross as of
        the last position). False: the first position at which any replayed check crossed.
    block : as-of positions replayed at once (vectorised over models and positions).

    Returns
    -------
    int or (M,) int array: index of that as-of position, -1 if none.
    """
    fns = {"cusum": (cusum, _MIN_CUSUM), "cusum_squares": (cusum_squares, _MIN_CUSUMSQ)}
    if test not in fns:
        raise ValueError(f"test must be 'cusum' or 'cusum_squares', got {test!r}")
    if not isinstance(block, int) or block < 1:
        raise ValueError(f"block must be a positive integer, got {block!r}")
    fn, need = fns[test]
    wa, batched = _as_resid(w, "w")
    M, T = wa.shape
    d = np.isfinite(wa)
    # as-of positions worth replaying: a defined residual (the test changes only there), enough of them
    cand = d & (np.cumsum(d, axis=1) >= need)
    crossed = np.zeros((M, T), dtype=bool)
    cols = np.arange(T)
    for start in range(0, T, block):
        stop = min(T, start + block)
        mi, ni = np.nonzero(cand[:, start:stop])
        if mi.size == 0:
            continue
        ni = ni + start
        batch = np.where(cols[None, :] <= ni[:, None], wa[mi], np.nan)
        with np.errstate(invalid="ignore", divide="ignore"):
            res = fn(batch, levels=(level,))
        crossed[mi, ni] = np.asarray(res.first_crossing[level]) >= 0
    if not standing:
        out = np.where(crossed.any(axis=1), crossed.argmax(axis=1), -1)
    else:
        last = np.where(cand.any(axis=1), T - 1 - np.argmax(cand[:, ::-1], axis=1), -1)
        quiet = cand & ~crossed  # replayed checks that did not signal
        last_quiet = np.where(quiet.any(axis=1), T - 1 - np.argmax(quiet[:, ::-1], axis=1), -1)
        after = crossed & (cols[None, :] > last_quiet[:, None])
        first_after = np.where(after.any(axis=1), after.argmax(axis=1), -1)
        standing_now = (last >= 0) & crossed[np.arange(M), np.maximum(last, 0)]
        out = np.where(standing_now, first_after, -1)
    out = out.astype(np.int64)
    return out if batched else int(out[0])
