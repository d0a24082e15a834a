"""Coefficients before and after a date, estimated in one regression with interaction columns.

For a break at row ``at`` the regression ``y = X b + (D * X_S) d + u`` (``D`` the post-break indicator,
``S`` the columns allowed to change) gives the before-coefficient ``b_S`` and the after-coefficient
``b_S + d`` with their standard errors from the one OLS covariance matrix, while the other columns
(trend, season) are estimated on the whole sample. This is more stable than refitting each side
separately when the post-break sample is short.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray


@dataclass(frozen=True)
class SplitCoefficients:
    """Per tested column: before/after estimates, standard errors and 95% (``level``) intervals."""

    before: FloatArray
    after: FloatArray
    se_before: FloatArray
    se_after: FloatArray
    ci_before: FloatArray  # (len(cols), 2)
    ci_after: FloatArray
    diff: FloatArray  # after - before
    se_diff: FloatArray
    pvalue_diff: FloatArray  # two-sided t test of no change, per column
    nobs_before: int
    nobs_after: int
    df: int


def split_coefficients(y: FloatArray, X: FloatArray, at: int, cols: list[int], *, level: float = 0.95,
                       intercept_shift: bool = True) -> SplitCoefficients:
    """Before/after coefficients of columns ``cols`` around row ``at`` (first row of the new regime).

    Parameters
    ----------
    y : (n,) target; X : (n, k) regressors (rows with NaN are dropped).
    at : index of the first observation after the break.
    cols : columns allowed to change at the break.
    intercept_shift : also let the level shift (adds the post-break indicator itself).

    Raises
    ------
    InsufficientDataError : too few rows on either side, or the augmented design is rank deficient.
    """
    y = np.asarray(y, float)
    X = np.asarray(X, float)
    n, k = X.shape
    ok = np.isfinite(y) & np.isfinite(X).all(axis=1)
    post = (np.arange(n) >= at).astype(float)
    extra = [X[:, c] * post for c in cols]
    if intercept_shift:
        extra.append(post)
    Z = np.column_stack([X, *extra])[ok]
    yy = y[ok]
    n1 = int((ok & (post == 0)).sum())
    n2 = int((ok & (post == 1)).sum())
    p = Z.shape[1]
    if n1 < 2 or n2 < 2 or len(yy) <= p:
        raise InsufficientDataError("before/after coefficients", p + 1, len(yy),
                                    f"{n1} rows before and {n2} after the date")
    q, r = np.linalg.qr(Z)
    d = np.abs(np.diag(r))
    if d.min() <= 1e-10 * d.max():
        raise InsufficientDataError("before/after coefficients", p + 1, int((d > 1e-10 * d.max()).sum()),
                                    "the design with a break at this date is rank deficient")
    b = np.linalg.solve(r, q.T @ yy)
    res = yy - Z @ b
    dof = len(yy) - p
    s2 = float(res @ res) / dof
    rinv = np.linalg.inv(r)
    cov = s2 * (rinv @ rinv.T)
    idx_b = np.asarray(cols, int)
    idx_d = np.arange(k, k + len(cols))
    before = b[idx_b]
    after = b[idx_b] + b[idx_d]
    se_b = np.sqrt(np.diag(cov)[idx_b])
    var_a = np.diag(cov)[idx_b] + np.diag(cov)[idx_d] + 2 * cov[idx_b, idx_d]
    se_a = np.sqrt(np.maximum(var_a, 0.0))
    # Student t quantile and tail by the special functions scipy.stats.t calls (its ppf and sf wrappers'
    # argument checks cost more than the fit here; equal to the bit, NaN and inf included)
    z = special.stdtrit(dof, 0.5 + level / 2)
    diff = b[idx_d]
    se_d = np.sqrt(np.diag(cov)[idx_d])
    with np.errstate(divide="ignore", invalid="ignore"):
        p_d = 2 * special.stdtr(dof, -np.abs(diff / se_d))
    return SplitCoefficients(
        before=before, after=after, se_before=se_b, se_after=se_a,
        ci_before=np.column_stack([before - z * se_b, before + z * se_b]),
        ci_after=np.column_stack([after - z * se_a, after + z * se_a]),
        diff=diff, se_diff=se_d, pvalue_diff=p_d, nobs_before=n1, nobs_after=n2, df=dof)
