"""Break tests and parameter-stability tests for linear regressions, batched over models.

* :func:`chow` -- Chow (1960) test of a break at a known date (both regimes estimable).
* :func:`predictive_failure` -- Chow (1960) predictive-failure test (any post-break length >= 1).
* :func:`sup_f` -- Andrews (1993) sup-Wald test of a break at an unknown date, with the ave- and exp-Wald
  statistics of Andrews & Ploberger (1994).
* :func:`nyblom` -- Nyblom (1989) / Hansen (1992) L_c tests of parameter constancy.

Conventions
-----------
``y`` is (M, n) or (n,), ``X`` is (M, n, k) or (n, k); the first axis is the model. A row with a NaN in
``y`` or in any column of ``X`` is dropped for that model only (models may thus have different usable
sample sizes). A break index is the index, in the coordinates of the input arrays, of the *first
observation of the new regime*.

Models of a batch whose data cannot support a test (too few usable rows, collinear regressors within a
regime, regressors that fit y exactly: ``params["exact_fit"]``) get NaN statistics and p-values (break
index -1); :class:`~drift.exceptions.InsufficientDataError`
is raised only when no model of the batch can be tested, so a single model that cannot be tested raises.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats
from scipy.special import logsumexp

from drift.engine.results import TestResult
from drift.engine.tables import andrews as andrews_tables
from drift.engine.tables import nyblom as nyblom_tables
from drift.exceptions import InsufficientDataError
from drift.typing import BoolArray, FloatArray, IntArray

__all__ = ["BreakResult", "NyblomResult", "chow", "nyblom", "predictive_failure", "sup_f"]

LEVELS = (0.10, 0.05, 0.01)
# Numerical tolerances (not statistical constants):
# singular values below _RANK_RTOL * largest (on unit-norm columns) count as zero (collinearity);
_RANK_RTOL = 1e-10
# sup_f: an eigenvalue of a candidate's Schur complement below _EIG_EPS * n * machine epsilon counts as
# zero (a regime that cannot estimate the tested coefficients). In orthonormal coordinates the eigenvalues
# lie in [0, 1/4] and the suffix sums that form them carry rounding of about n * eps, so this threshold sits
# a hundred times above the rounding and far below any regime that carries information.
_EIG_EPS = 100.0
# a residual sum of squares below _RSS_RTOL * the restricted RSS counts as an exact (noise-free) fit.
_RSS_RTOL = 1e-13
# a restricted (no-break) RSS below _EXACT_RTOL * y'y (residual norm under 1e-10 of y's, far above the
# rounding of about n * eps^2 * y'y) means the regressors fit y exactly: every RSS is then rounding and each
# F is 0/0, so the model cannot be tested (it was reported as a certain break, F = inf).
_EXACT_RTOL = 1e-20
_EXACT_HINT = ("the regressors fit y exactly (residual norm below 1e-10 of y's), so there is no residual "
               "variation to test")
# cap on elements of the (models x time x q x k) cumulative arrays held at once by sup_f
_CHUNK_ELEMENTS = 4_000_000


@dataclass(frozen=True)
class BreakResult(TestResult):
    """Result of :func:`sup_f`.

    ``statistic`` is the sup-Wald statistic on the chi-square scale (``q`` times the largest F, ``q`` the
    number of tested coefficients) and ``critical_values`` are on the same scale.

    Attributes
    ----------
    f_path : ndarray (M, n) or (n,)
        Chow-type F statistic (F scale) for a break at each candidate index; NaN at non-candidates.
    ave_f, exp_f : float or ndarray (M,)
        Andrews & Ploberger (1994) ave-Wald (mean of ``q*F``) and exp-Wald (``ln mean exp(q*F/2)``)
        statistics over the candidates, chi-square scale.
    ave_pvalue, exp_pvalue : float or ndarray (M,)
        Their approximate asymptotic p-values (simulated tables).
    ave_critical_values, exp_critical_values : mapping level -> value (chi-square scale).
    """

    f_path: Any = None
    ave_f: Any = None
    ave_pvalue: Any = None
    exp_f: Any = None
    exp_pvalue: Any = None
    ave_critical_values: Any = None
    exp_critical_values: Any = None


@dataclass(frozen=True)
class NyblomResult(TestResult):
    """Result of :func:`nyblom`.

    ``statistic`` is the joint L_c over the k coefficients *and* the error variance (m = k + 1
    parameters, as statsmodels ``breaks_hansen``); ``critical_values`` are for m = k + 1.

    Attributes
    ----------
    individual : ndarray (M, k) or (k,)
        L_c of each coefficient alone (m = 1).
    individual_pvalue : ndarray like ``individual``.
    variance, variance_pvalue : float or ndarray (M,)
        L_c of the error variance alone, and its p-value.
    individual_critical_values : mapping level -> value (m = 1), shared by ``variance``.
    """

    individual: Any = None
    individual_pvalue: Any = None
    variance: Any = None
    variance_pvalue: Any = None
    individual_critical_values: Any = None


# --------------------------------------------------------------------------------------------------
# input normalisation and least-squares helpers
# --------------------------------------------------------------------------------------------------
def _prepare(y: object, X: object) -> tuple[FloatArray, FloatArray, BoolArray, bool]:
    """Return float64 (M,n) y, (M,n,k) X with unusable rows zeroed, the usable-row mask, batched flag."""
    if X is None:
        raise TypeError("X must be an array of regressors, shape (n, k) or (M, n, k); got None")
    try:
        ya = np.asarray(y, dtype=np.float64)
        Xa = np.asarray(X, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"y and X must be numeric arrays: {exc}") from None
    if ya.ndim == 1 and Xa.ndim == 2:
        batched = False
        ya, Xa = ya[None], Xa[None]
    elif ya.ndim == 2 and Xa.ndim == 3:
        batched = True
    else:
        raise ValueError(
            f"y must be (n,) with X (n, k), or y (M, n) with X (M, n, k); got y {ya.shape}, X {Xa.shape}")
    if Xa.shape[:2] != ya.shape:
        raise ValueError(f"X shape {Xa.shape} does not match y shape {ya.shape} on (models, time)")
    if Xa.shape[2] < 1:
        raise ValueError("X must have at least one column (k >= 1)")
    if np.isinf(ya).any() or np.isinf(Xa).any():
        raise ValueError("y and X must not contain infinite values (mark missing values as NaN)")
    mask = np.isfinite(ya) & np.isfinite(Xa).all(axis=2)
    ya = np.where(mask, ya, 0.0)
    Xa = np.where(mask[:, :, None], Xa, 0.0)
    return ya, Xa, mask, batched


def _unit_columns(X: FloatArray) -> FloatArray:
    """Scale each column of each model to unit norm (zero columns left at zero); for conditioning and
    so that every statistic is exactly invariant to rescaling a regressor."""
    norm = np.sqrt(np.einsum("mnk,mnk->mk", X, X))
    return X / np.where(norm > 0, norm, 1.0)[:, None, :]


@dataclass(frozen=True)
class _Fit:
    coef: FloatArray  # (M, k), in the units of the unit-norm columns
    resid: FloatArray  # (M, n), zero at unusable rows
    rss: FloatArray  # (M,)
    rank: IntArray  # (M,)
    basis: FloatArray  # (M, n, k) orthonormal basis of the column space (zeroed beyond rank)
    factor: FloatArray | None = None  # (M, k, k) R with X = basis @ R on the usable rows (full rank)


def _masked_ols(y: FloatArray, X: FloatArray, mask: BoolArray) -> _Fit:
    """Least squares of y on X over the rows in ``mask``, per model, by a batched SVD (rank-revealing)."""
    Xm = np.where(mask[:, :, None], X, 0.0)
    ym = np.where(mask, y, 0.0)
    U, s, Vt = np.linalg.svd(Xm, full_matrices=False)
    smax = s.max(axis=-1, keepdims=True)
    keep = s > _RANK_RTOL * np.where(smax > 0, smax, 1.0)
    keep &= s > 0
    U = U * keep[:, None, :]
    uty = np.einsum("mnk,mn->mk", U, ym)
    coef = np.einsum("mkj,mk->mj", Vt, uty / np.where(keep, s, 1.0))
    resid = np.where(mask, ym - np.einsum("mnk,mk->mn", U, uty), 0.0)
    rss = np.einsum("mn,mn->m", resid, resid)
    return _Fit(coef=coef, resid=resid, rss=rss, rank=keep.sum(axis=-1), basis=U, factor=s[:, :, None] * Vt)


def _f_ratio(num: FloatArray, df1: Any, den: FloatArray, df2: Any, total: FloatArray) -> FloatArray:
    """F = (num/df1)/(den/df2) with exact fits handled: den ~ 0 gives +inf (num > 0) or NaN."""
    num = np.clip(num, 0.0, None)
    tiny = _RSS_RTOL * total
    with np.errstate(divide="ignore", invalid="ignore"):
        F = (num / df1) / (den / df2)
    exact = den <= tiny
    return np.where(exact, np.where(num > tiny, np.inf, np.nan), F)


def _exact_fit(rss: FloatArray, y: FloatArray) -> BoolArray:
    """Per model: the restricted fit is exact (y zeroed at unusable rows, as :func:`_prepare` leaves it)."""
    return np.asarray(rss <= _EXACT_RTOL * np.einsum("mn,mn->m", y, y))


def _squeeze(a: Any, batched: bool) -> Any:
    if batched:
        return a
    a = np.asarray(a)[0]
    return a.item() if a.ndim == 0 else a


def _cv_squeeze(cv: dict[float, Any], batched: bool) -> dict[float, Any]:
    return {lv: _squeeze(v, batched) for lv, v in cv.items()}


def _break_at(at: object, M: int, n: int) -> IntArray:
    a = np.asarray(at)
    if a.dtype.kind not in "iu" and not (a.dtype.kind == "f" and np.all(np.isfinite(a)) and np.all(a == np.round(a))):
        raise TypeError(f"at must be an integer index or an (M,) integer array, got {at!r}")
    a = np.broadcast_to(a.astype(np.int64), (M,)) if a.ndim == 0 else a.astype(np.int64)
    if a.shape != (M,):
        raise ValueError(f"at must be a scalar or have shape ({M},), got shape {a.shape}")
    if np.any(a < 1) or np.any(a > n - 1):
        raise ValueError(f"at must be in 1..{n - 1} (index of the first observation after the break), got {at!r}")
    return a


# --------------------------------------------------------------------------------------------------
# known-date tests
# --------------------------------------------------------------------------------------------------
def _three_fits(y: FloatArray, X: FloatArray, mask: BoolArray, at: IntArray) -> tuple[_Fit, _Fit, _Fit]:
    M, n = y.shape
    t = np.arange(n)
    pre = mask & (t[None, :] < at[:, None])
    post = mask & (t[None, :] >= at[:, None])
    Xs = _unit_columns(X)
    fit = _masked_ols(np.concatenate([y, y, y]), np.concatenate([Xs, Xs, Xs]),
                      np.concatenate([mask, pre, post]))
    parts = []
    for i in range(3):
        sl = slice(i * M, (i + 1) * M)
        parts.append(_Fit(fit.coef[sl], fit.resid[sl], fit.rss[sl], fit.rank[sl], fit.basis[sl]))
    return parts[0], parts[1], parts[2]


def chow(y: object, X: object, at: object) -> TestResult:
    r"""Chow (1960) test of a break in all coefficients at a known date.

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
        Target; NaN rows are dropped per model.
    X : array_like, (n, k) or (M, n, k)
        Regressors (include a constant column if wanted).
    at : int or array_like of int (M,)
        Index of the first observation after the break (input coordinates), in 1..n-1.

    Returns
    -------
    TestResult
        ``statistic`` F, ``pvalue`` from F(k, n - 2k), ``critical_values`` of that F keyed by level,
        ``nobs`` usable rows, ``break_index`` = ``at``; ``params``: ``at``, ``k``, ``n1``, ``n2``,
        ``df`` = (k, n - 2k), ``rss`` = (S, S1, S2).

    Raises
    ------
    InsufficientDataError
        When no model has more than k usable rows in each regime with full-rank regressors in each, or
        every such model is fitted exactly by its regressors (``params["exact_fit"]``).
    ValueError, TypeError
        Bad shapes, infinite values, or ``at`` out of range.

    Notes
    -----
    With S the full-sample RSS and S1, S2 those of separate fits before and from ``at``,

    .. math:: F = \frac{(S - S_1 - S_2)/k}{(S_1 + S_2)/(n - 2k)} \sim F(k, n - 2k)

    under iid normal errors and no break. Requires n1 > k and n2 > k; for a short post-break
    segment use :func:`predictive_failure`.

    References
    ----------
    Chow, G. C. (1960). Tests of equality between sets of coefficients in two linear regressions.
    Econometrica 28(3), 591-605.
    """
    ya, Xa, mask, batched = _prepare(y, X)
    M, n, k = Xa.shape
    atv = _break_at(at, M, n)
    full, f1, f2 = _three_fits(ya, Xa, mask, atv)
    t = np.arange(n)
    n1 = (mask & (t < atv[:, None])).sum(axis=1)
    n2 = mask.sum(axis=1) - n1
    nn = n1 + n2
    enough = (n1 > k) & (n2 > k)
    valid = enough & (full.rank == k) & (f1.rank == k) & (f2.rank == k)
    exact = _exact_fit(full.rss, ya)
    ok = valid & ~exact
    if not ok.any():
        if not enough.any():
            raise InsufficientDataError(
                "Chow break test (each regime needs more than k observations)", k + 1,
                int(np.minimum(n1, n2).max()),
                hint="use predictive_failure when the post-break segment is short")
        if valid.any():
            raise InsufficientDataError("Chow break test (residual variation)", 2 * k + 1, int(nn.max()),
                                        hint=_EXACT_HINT)
        raise InsufficientDataError(
            "Chow break test (regressors must have full rank k in each regime)", k, int(np.minimum(f1.rank, f2.rank).max()),
            hint="regressors are collinear within a regime; drop a column or use predictive_failure")
    df2 = nn - 2 * k
    den = f1.rss + f2.rss
    F = _f_ratio(full.rss - den, k, den, np.where(df2 > 0, df2, 1), full.rss)
    F = np.where(ok, F, np.nan)
    with np.errstate(invalid="ignore"):
        p = np.where(ok, stats.f.sf(F, k, np.where(df2 > 0, df2, 1)), np.nan)
        cv = {lv: np.where(ok, stats.f.isf(lv, k, np.where(df2 > 0, df2, 1)), np.nan) for lv in LEVELS}
    return TestResult(
        statistic=_squeeze(F, batched), pvalue=_squeeze(p, batched),
        critical_values=_cv_squeeze(cv, batched), nobs=_squeeze(nn, batched),
        null="coefficients are equal before and after the break date",
        alternative="all coefficients change at the break date",
        method="Chow break test (Chow 1960)",
        params={"at": _squeeze(atv, batched), "k": k, "n1": _squeeze(n1, batched), "n2": _squeeze(n2, batched),
                "df": (k, _squeeze(df2, batched)),
                "rss": (_squeeze(full.rss, batched), _squeeze(f1.rss, batched), _squeeze(f2.rss, batched)),
                "exact_fit": _squeeze(exact, batched)},
        break_index=_squeeze(np.where(ok, atv, -1), batched),
    )


def predictive_failure(y: object, X: object, at: object) -> TestResult:
    r"""Chow (1960) predictive-failure test: do the rows from ``at`` on fit the model of the rows before?

    Parameters
    ----------
    y, X : as in :func:`chow`.
    at : int or array_like of int (M,)
        Index of the first observation after the break; any post-break length n2 >= 1 is allowed.

    Returns
    -------
    TestResult
        ``statistic`` F, ``pvalue`` from F(n2, n1 - k); ``params``: ``at``, ``k``, ``n1``, ``n2``,
        ``df`` = (n2, n1 - k), ``rss`` = (S, S1).

    Raises
    ------
    InsufficientDataError
        When no model has n1 > k pre-break rows with full-rank regressors and n2 >= 1, or every such
        model is fitted exactly by its regressors (``params["exact_fit"]``).

    Notes
    -----
    .. math:: F = \frac{(S - S_1)/n_2}{S_1/(n_1 - k)} \sim F(n_2, n_1 - k),

    S the RSS of the full sample, S1 of the pre-break rows. S - S1 equals the sum of the squared
    recursive residuals of the post-break rows.

    References
    ----------
    Chow, G. C. (1960). Econometrica 28(3), 591-605.
    """
    ya, Xa, mask, batched = _prepare(y, X)
    M, n, k = Xa.shape
    atv = _break_at(at, M, n)
    full, f1, _ = _three_fits(ya, Xa, mask, atv)
    t = np.arange(n)
    n1 = (mask & (t < atv[:, None])).sum(axis=1)
    n2 = mask.sum(axis=1) - n1
    enough = (n1 > k) & (n2 >= 1)
    exact = _exact_fit(full.rss, ya)
    ok = enough & (f1.rank == k) & ~exact
    if not ok.any():
        if not enough.any():
            raise InsufficientDataError("predictive-failure test (pre-break rows must exceed k, one post-break row)",
                                        k + 1, int(n1.max()))
        if (enough & (f1.rank == k)).any():
            raise InsufficientDataError("predictive-failure test (residual variation)", k + 2,
                                        int((n1 + n2).max()), hint=_EXACT_HINT)
        raise InsufficientDataError("predictive-failure test (pre-break regressors must have full rank k)",
                                    k, int(f1.rank.max()), hint="regressors are collinear before the break")
    df1 = np.where(n2 >= 1, n2, 1)
    df2 = np.where(n1 > k, n1 - k, 1)
    F = np.where(ok, _f_ratio(full.rss - f1.rss, df1, f1.rss, df2, full.rss), np.nan)
    with np.errstate(invalid="ignore"):
        p = np.where(ok, stats.f.sf(F, df1, df2), np.nan)
        cv = {lv: np.where(ok, stats.f.isf(lv, df1, df2), np.nan) for lv in LEVELS}
    return TestResult(
        statistic=_squeeze(F, batched), pvalue=_squeeze(p, batched),
        critical_values=_cv_squeeze(cv, batched), nobs=_squeeze(n1 + n2, batched),
        null="the post-break rows follow the pre-break model",
        alternative="the post-break rows are not predicted by the pre-break model",
        method="Chow predictive-failure test (Chow 1960)",
        params={"at": _squeeze(atv, batched), "k": k, "n1": _squeeze(n1, batched), "n2": _squeeze(n2, batched),
                "df": (_squeeze(df1, batched), _squeeze(df2, batched)),
                "rss": (_squeeze(full.rss, batched), _squeeze(f1.rss, batched)),
                "exact_fit": _squeeze(exact, batched)},
        break_index=_squeeze(np.where(ok, atv, -1), batched),
    )


# --------------------------------------------------------------------------------------------------
# unknown-date test
# --------------------------------------------------------------------------------------------------
def _check_trim(trim: object) -> float:
    if isinstance(trim, bool) or not isinstance(trim, (int, float, np.floating)):
        raise TypeError(f"trim must be a float, got {trim!r}")
    lo, hi = andrews_tables.supf_sim.TRIMS[0], andrews_tables.supf_sim.TRIMS[-1]
    if not lo - 1e-12 <= float(trim) <= hi + 1e-12:
        raise ValueError(f"trim must be in [{lo}, {hi}] (fraction of the sample cut at each end), got {trim!r}")
    return float(trim)


def _check_columns(test_columns: Sequence[int] | None, k: int) -> list[int]:
    if test_columns is None:
        return list(range(k))
    cols = [int(c) for c in test_columns] if not isinstance(test_columns, (int, np.integer)) else [int(test_columns)]
    if not cols or len(set(cols)) != len(cols) or any(c < 0 or c >= k for c in cols):
        raise ValueError(f"test_columns must be distinct column indices in 0..{k - 1}, got {test_columns!r}")
    return sorted(cols)


def _candidates(mask: BoolArray, trim: float, k: int) -> tuple[BoolArray, IntArray, IntArray]:
    """Candidate break rows: usable rows m with n1 = #usable rows before m in [lo, n - lo]."""
    nn = mask.sum(axis=1)
    lo = np.maximum(np.ceil(trim * nn - 1e-9).astype(np.int64), k + 1)
    before: IntArray = np.cumsum(mask, axis=1) - mask
    cand = mask & (before >= lo[:, None]) & (before <= (nn - lo)[:, None])
    return cand, nn, lo


def _sup_f_path(y: FloatArray, X: FloatArray, mask: BoolArray, cols: list[int],
                cand: BoolArray) -> tuple[FloatArray, FloatArray, FloatArray, IntArray, IntArray]:
    """F path (M, n) for a break in the ``cols`` coefficients at each candidate row (NaN elsewhere), and
    the number of candidate rows per model where a regime cannot estimate the tested coefficients.

    Frisch-Waugh form: with e the full-sample residuals, U an orthonormal basis of the regressors and
    W_m = Z * 1(t >= m), the RSS reduction from adding W_m is g'D^{-1}g, g = W_m'e,
    D = W_m'W_m - (W_m'U)(U'W_m); all three are suffix sums, so the path costs O(n q k) per model.
    Z spans the tested columns in the orthonormal coordinates: X[:, cols] = U R[:, cols], and Z = U Q_z
    with Q_z an orthonormal basis of R[:, cols] (the F statistic depends only on the span of W_m). Working
    there rather than on the raw columns keeps D well scaled for ill-conditioned designs (e.g. Longley's),
    where forming D from collinear columns cancelled most of its digits.
    """
    M, n, k = X.shape
    q = len(cols)
    Xs = _unit_columns(X)
    full = _masked_ols(y, Xs, mask)
    Rz = full.factor[:, :, cols]  # type: ignore[index]
    Qz, _ = np.linalg.qr(Rz)  # (M, k, q)
    Z = np.einsum("mnk,mkq->mnq", full.basis, Qz)
    out = np.full((M, n), np.nan)
    singular = np.zeros(M, dtype=np.int64)
    tol = _EIG_EPS * np.finfo(float).eps * mask.sum(axis=1)[:, None, None]
    step = max(1, _CHUNK_ELEMENTS // max(1, n * q * (k + q)))
    for a in range(0, M, step):  # chunks of models, to bound memory (not a per-model loop)
        sl = slice(a, min(M, a + step))
        z, u, e = Z[sl], full.basis[sl], full.resid[sl]
        A = np.cumsum((z[:, :, :, None] * z[:, :, None, :])[:, ::-1], axis=1)[:, ::-1]
        C = np.cumsum((z[:, :, :, None] * u[:, :, None, :])[:, ::-1], axis=1)[:, ::-1]
        g = np.cumsum((z * e[:, :, None])[:, ::-1], axis=1)[:, ::-1]
        D = A - np.einsum("mtqk,mtpk->mtqp", C, C)
        lam, vec = np.linalg.eigh(D)
        good = lam > tol[sl]
        proj = np.einsum("mtqp,mtq->mtp", vec, g)
        with np.errstate(divide="ignore", invalid="ignore"):
            quad = np.where(good, proj**2 / np.where(good, lam, 1.0), 0.0).sum(axis=-1)
        estimable = good.all(axis=-1)
        S = full.rss[sl][:, None]
        df2 = (mask[sl].sum(axis=1) - k - q)[:, None]
        F = _f_ratio(quad, q, S - quad, np.where(df2 > 0, df2, 1), np.broadcast_to(S, quad.shape))
        ok = estimable & cand[sl] & (df2 > 0) & (full.rank[sl] == k)[:, None]
        out[sl] = np.where(ok, F, np.nan)
        singular[sl] = np.sum(cand[sl] & ~estimable & (full.rank[sl] == k)[:, None], axis=1)
    return out, full.rss, full.coef, full.rank, singular


def sup_f(y: object, X: object, trim: float = 0.15, *,
          test_columns: Sequence[int] | None = None) -> BreakResult:
    r"""Andrews (1993) sup-Wald test of a break at an unknown date, with ave- and exp-Wald.

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
    X : array_like, (n, k) or (M, n, k)
    trim : float, default 0.15
        Fraction pi0 of the usable sample cut at each end: candidate breaks have
        n1 in [max(ceil(pi0 n), k+1), n - max(ceil(pi0 n), k+1)] usable rows before them. Must be in
        [0.05, 0.45] (range of the p-value table).
    test_columns : sequence of int, optional
        Columns whose coefficients may break (partial structural change; the others are held constant
        over the whole sample). Default: all k columns.

    Returns
    -------
    BreakResult
        ``statistic``: sup-Wald on the **chi-square scale**, q * max F (q = number of tested
        coefficients); ``critical_values`` on the same scale (Andrews 1993/2003 Table 1 for q <= 5 and
        trim 0.15, otherwise the simulated table); ``pvalue``: approximate asymptotic p-value from the
        simulated table; ``break_index``: argmax of the F path (-1 where none); ``f_path`` (F scale);
        ``ave_f``, ``exp_f`` with p-values and critical values (chi-square scale). ``params`` records
        the number of candidate dates (``candidates``) and how many of them were left out because a
        regime cannot estimate the tested coefficients (``singular_candidates``: exact collinearity within
        a regime, e.g. a dummy that is zero on one side; never an ill-conditioned but valid design). The
        sup, ave and exp statistics run over the others. ``exact_fit`` marks models whose regressors fit
        y exactly without a break (every F is 0/0): they get NaN, like models that cannot be tested.

    Raises
    ------
    InsufficientDataError
        When no model has a candidate break with both regimes estimable, or every such model is fitted
        exactly by its regressors.
    ValueError, TypeError
        Bad shapes, ``trim`` or ``test_columns``.

    Notes
    -----
    At candidate m the unrestricted model adds ``X[:, cols] * 1(t >= m)``; with S the restricted and
    S_u the unrestricted RSS,

    .. math:: F_m = \frac{(S - S_u)/q}{S_u / (n - k - q)}, \quad
              \sup W = q \max_m F_m, \quad \mathrm{ave}W = \overline{q F_m}, \quad
              \exp W = \ln \overline{\exp(q F_m / 2)}.

    With all columns tested S_u = S1 + S2 and F_m is the :func:`chow` statistic at m. Under the null,
    sup W converges to the sup over [pi0, 1 - pi0] of ||B_q(r)||^2/(r(1-r)), B_q a Brownian bridge.

    References
    ----------
    Andrews, D. W. K. (1993). Econometrica 61(4), 821-856; corrigendum (2003) Econometrica 71(1), 395-397.
    Andrews, D. W. K. & Ploberger, W. (1994). Econometrica 62(6), 1383-1414.
    """
    ya, Xa, mask, batched = _prepare(y, X)
    M, _, k = Xa.shape
    tr = _check_trim(trim)
    cols = _check_columns(test_columns, k)
    q = len(cols)
    if q > andrews_tables.supf_sim.MAX_P:
        raise ValueError(f"at most {andrews_tables.supf_sim.MAX_P} tested coefficients are supported, got {q}")
    cand, nn, lo = _candidates(mask, tr, k)
    if not cand.any():
        raise InsufficientDataError(f"sup-F break test (trim {tr}: each regime needs max(ceil(trim*n), k+1) rows)",
                                    int(2 * (k + 1)), int(nn.max()))
    F, rss, _, rank, singular = _sup_f_path(ya, Xa, mask, cols, cand)
    exact = _exact_fit(rss, ya)
    tested = ~np.all(np.isnan(F), axis=1)
    F = np.where(exact[:, None], np.nan, F)
    has = tested & ~exact
    if not has.any():
        if tested.any():
            raise InsufficientDataError("sup-F break test (residual variation)", int(2 * (k + 1)), int(nn.max()),
                                        hint=_EXACT_HINT)
        raise InsufficientDataError("sup-F break test (regressors must have full rank in each regime)", k,
                                    int(rank.max()), hint=f"regressors are collinear or constant in a regime "
                                    f"({int(singular.max())} candidate dates with a singular regime)")
    W = q * F
    finite_w = np.where(np.isnan(W), -np.inf, W)
    idx = np.argmax(finite_w, axis=1)
    sup = np.where(has, finite_w[np.arange(M), idx], np.nan)
    bidx = np.where(has, idx, -1)
    ncand = (~np.isnan(W)).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ave = np.where(has, np.nansum(W, axis=1) / np.maximum(ncand, 1), np.nan)
        lse = logsumexp(np.where(np.isnan(W), -np.inf, W / 2), axis=1)
        ex = np.where(has, lse - np.log(np.maximum(ncand, 1)), np.nan)
    p_sup = andrews_tables.pvalue(sup, q, tr, "sup")
    p_ave = andrews_tables.pvalue(ave, q, tr, "ave")
    p_exp = andrews_tables.pvalue(ex, q, tr, "exp")
    return BreakResult(
        statistic=_squeeze(sup, batched), pvalue=_squeeze(p_sup, batched),
        critical_values=andrews_tables.critical_values(q, tr, "sup"),
        nobs=_squeeze(nn, batched),
        null="coefficients are constant over the sample",
        alternative="the tested coefficients change once at an unknown date",
        method="Andrews sup-Wald break test (Andrews 1993)",
        params={"trim": tr, "test_columns": tuple(cols), "q": q, "k": k, "scale": "chi2",
                "min_segment": _squeeze(lo, batched),
                "candidates": _squeeze(cand.sum(axis=1), batched),
                "singular_candidates": _squeeze(singular, batched),
                "exact_fit": _squeeze(exact, batched)},
        break_index=_squeeze(bidx, batched),
        f_path=_squeeze(F, batched),
        ave_f=_squeeze(ave, batched), ave_pvalue=_squeeze(p_ave, batched),
        exp_f=_squeeze(ex, batched), exp_pvalue=_squeeze(p_exp, batched),
        ave_critical_values=andrews_tables.critical_values(q, tr, "ave"),
        exp_critical_values=andrews_tables.critical_values(q, tr, "exp"),
    )


# --------------------------------------------------------------------------------------------------
# parameter stability
# --------------------------------------------------------------------------------------------------
def nyblom(y: object, X: object) -> NyblomResult:
    r"""Nyblom (1989) / Hansen (1992) L_c tests of parameter constancy, joint and per coefficient.

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
    X : array_like, (n, k) or (M, n, k)

    Returns
    -------
    NyblomResult
        ``statistic``: joint L_c over the k coefficients and the error variance (m = k + 1, the
        definition of statsmodels ``breaks_hansen``); ``critical_values`` for m = k + 1 (REFERENCES
        values for m <= 5, simulated table beyond); ``pvalue`` from the simulated table;
        ``individual`` (M, k) per-coefficient L_c; ``variance`` the error-variance L_c.

    Raises
    ------
    InsufficientDataError
        When no model has n > k + 1 usable rows with full-rank regressors and non-degenerate scores.

    Notes
    -----
    With OLS residuals e_t, sigma^2 = S/n, scores f_t = (x_t e_t, e_t^2 - sigma^2) (length m = k+1),
    partial sums S_t = sum_{s<=t} f_s and V = sum_t f_t f_t',

    .. math:: L_c = \frac{1}{n} \sum_t S_t' V^{-1} S_t, \qquad
              L_i = \frac{1}{n V_{ii}} \sum_t S_{it}^2 .

    Under constancy L_c converges to int_0^1 ||B_m(r)||^2 dr.

    References
    ----------
    Nyblom, J. (1989). JASA 84(405), 223-230. Hansen, B. E. (1992). Journal of Policy Modeling 14(4),
    517-533.
    """
    ya, Xa, mask, batched = _prepare(y, X)
    k = Xa.shape[2]
    m = k + 1
    if m > nyblom_tables.nyblom_sim.MAX_M:
        raise ValueError(f"nyblom supports at most {nyblom_tables.nyblom_sim.MAX_M - 1} regressors, got {k}")
    nn = mask.sum(axis=1)
    Xs = _unit_columns(Xa)
    fit = _masked_ols(ya, Xs, mask)
    ok = (nn > m) & (fit.rank == k)
    if not ok.any():
        if not (nn > m).any():
            raise InsufficientDataError("Nyblom-Hansen stability test", m + 1, int(nn.max()))
        raise InsufficientDataError("Nyblom-Hansen stability test (regressors must have full rank k)", k,
                                    int(fit.rank.max()), hint="regressors are collinear")
    e = fit.resid
    with np.errstate(invalid="ignore", divide="ignore"):
        s2 = fit.rss / np.maximum(nn, 1)
    f = np.concatenate([Xs * e[:, :, None], np.where(mask, e**2 - s2[:, None], 0.0)[:, :, None]], axis=2)
    S = np.cumsum(f, axis=1) * mask[:, :, None]
    V = np.einsum("mti,mtj->mij", f, f)
    lam, vec = np.linalg.eigh(V)
    lmax = lam.max(axis=-1, keepdims=True)
    good = lam > _RANK_RTOL * np.where(lmax > 0, lmax, 1.0)
    ok &= good.all(axis=-1)
    proj = np.einsum("mij,mti->mtj", vec, S)
    with np.errstate(invalid="ignore", divide="ignore"):
        joint = (proj**2 / np.where(good, lam, 1.0)[:, None, :]).sum(axis=(1, 2)) / np.maximum(nn, 1)
        diag = np.diagonal(V, axis1=1, axis2=2)
        indiv_all = (S**2).sum(axis=1) / (np.maximum(nn, 1)[:, None] * np.where(diag > 0, diag, np.nan))
    if not ok.any():
        raise InsufficientDataError("Nyblom-Hansen stability test (scores are degenerate: exact fit or constant "
                                    "residuals)", m + 1, int(nn.max()))
    joint = np.where(ok, joint, np.nan)
    indiv_all = np.where(ok[:, None], indiv_all, np.nan)
    indiv, var = indiv_all[:, :k], indiv_all[:, k]
    p = nyblom_tables.pvalue(joint, m)
    pi = nyblom_tables.pvalue(indiv, 1)
    pv = nyblom_tables.pvalue(var, 1)
    return NyblomResult(
        statistic=_squeeze(joint, batched), pvalue=_squeeze(p, batched),
        critical_values=nyblom_tables.critical_values(m), nobs=_squeeze(nn, batched),
        null="coefficients and error variance are constant",
        alternative="parameters follow a martingale (random walk) over the sample",
        method="Nyblom-Hansen L_c stability test (Nyblom 1989; Hansen 1992)",
        params={"k": k, "m": m, "joint": "coefficients and error variance"},
        individual=_squeeze(indiv, batched), individual_pvalue=_squeeze(pi, batched),
        variance=_squeeze(var, batched), variance_pvalue=_squeeze(pv, batched),
        individual_critical_values=nyblom_tables.critical_values(1),
    )

