"""Recursive least squares by orthogonal (Givens) updating, batched over models.

The engine's workhorse: for every model in a batch it folds the observations in one at a time into an
upper-triangular factor ``R`` of the design (``X_t'X_t = R_t'R_t``) and gives, at each time step, the
standardised recursive residual, the one-step-ahead forecast error, the recursive coefficients with their
standard errors, and the cumulative residual sum of squares. The loop runs over time; each step is
vectorised over all models.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from drift.typing import FloatArray, IntArray

__all__ = ["RecursiveFit", "as_batch", "recursive_fit", "recursive_residuals"]

#: largest absolute value for which rotations use sqrt(a^2 + b^2) rather than the overflow-safe hypot
PLAIN_MAX = 1e100


@dataclass(frozen=True)
class RecursiveFit:
    """Output of :func:`recursive_fit` (arrays squeezed to one model for unbatched input).

    Attributes
    ----------
    resid : ndarray (M, n)
        Standardised recursive residuals ``w_t``; NaN where undefined (before the first full-rank
        window, and at skipped rows).
    forecast_error : ndarray (M, n)
        One-step-ahead forecast error ``y_t - x_t' b_{t-1}`` of the model fitted on the rows before ``t``.
    scale : ndarray (M, n)
        ``sqrt(1 + x_t' (X_{t-1}'X_{t-1})^{-1} x_t)``, so that ``resid = forecast_error / scale``.
    coef : ndarray (M, n, k)
        ``b_t`` from the rows up to and including ``t``; NaN before full rank.
    coef_se : ndarray (M, n, k)
        ``s_t * sqrt(diag((X_t'X_t)^{-1}))`` with ``s_t^2 = rss_t / (nobs_t - k)``; NaN until
        ``nobs_t > k`` and full rank.
    rss : ndarray (M, n)
        Residual sum of squares of the least-squares fit on the rows up to and including ``t``; NaN
        before full rank.
    nobs : ndarray (M, n) of int
        Number of usable rows up to and including ``t``.
    first : ndarray (M,) of int
        Index of the first defined recursive residual (-1 if none).
    k : int
        Number of regressors.
    """

    resid: FloatArray
    forecast_error: FloatArray
    scale: FloatArray
    coef: FloatArray
    coef_se: FloatArray
    rss: FloatArray
    nobs: IntArray
    first: IntArray
    k: int


def as_batch(y: object, X: object) -> tuple[FloatArray, FloatArray, bool]:
    """Normalise ``(y, X)`` to float64 arrays of shape (M, n) and (M, n, k).

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
    X : array_like, (n, k) or (M, n, k)

    Returns
    -------
    y, X : float64 arrays (M, n) and (M, n, k)
    batched : bool
        False when a single model was given (results should be squeezed back).

    Raises
    ------
    ValueError
        On shape mismatches or infinite values (missing values must be NaN).
    """
    ya = np.asarray(y, dtype=np.float64)
    Xa = np.asarray(X, dtype=np.float64)
    if ya.ndim == 1:
        if Xa.ndim != 2:
            raise ValueError(f"X must be 2-D (n, k) when y is 1-D; got X with ndim={Xa.ndim}")
        ya, Xa, batched = ya[None, :], Xa[None, :, :], False
    elif ya.ndim == 2:
        if Xa.ndim != 3:
            raise ValueError(f"X must be 3-D (M, n, k) when y is 2-D; got X with ndim={Xa.ndim}")
        batched = True
    else:
        raise ValueError(f"y must be 1-D (n,) or 2-D (M, n); got ndim={ya.ndim}")
    if Xa.shape[:2] != ya.shape:
        raise ValueError(f"X shape {Xa.shape} does not match y shape {ya.shape} on (M, n)")
    if Xa.shape[2] < 1:
        raise ValueError("X must have at least one column (k >= 1)")
    if np.isinf(ya).any() or np.isinf(Xa).any():
        raise ValueError("y and X must not contain infinite values; mark missing values as NaN")
    return ya, Xa, batched


def _triu_inverse(R: FloatArray) -> FloatArray:
    """Inverse of a batch of upper-triangular matrices laid out (k, k, M), by back substitution.

    The model axis is last so that every operation runs on contiguous blocks of length M.
    """
    k = R.shape[0]
    Ri = np.zeros_like(R)
    for i in range(k - 1, -1, -1):
        row = np.zeros(R.shape[1:])
        row[i] = 1.0
        if i + 1 < k:
            row -= np.einsum("jm,jlm->lm", R[i, i + 1:], Ri[i + 1:])
        Ri[i] = row / R[i, i]
    return Ri


def recursive_fit(y: object, X: object, *, rank_tol: float = 1e-10, coef_se: bool = True,
                  coef_at: object = None) -> RecursiveFit:
    r"""Recursive least squares with recursive residuals, batched over models.

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
        Target; NaN marks a missing value.
    X : array_like, (n, k) or (M, n, k)
        Regressors; a row with NaN in ``y`` or ``X`` is skipped (its residual is NaN). Leading NaN rows
        (ragged starts) and gaps are handled the same way.
    rank_tol : float, default 1e-10
        Relative rank tolerance: the rows so far have full column rank when every diagonal element of
        ``R`` exceeds ``rank_tol`` times the Euclidean norm of its column of ``X`` (rows so far).
    coef_se : bool, default True
        Compute the recursive coefficients' standard errors. With False, ``coef_se`` is all NaN and no
        triangular inverse is formed at any step: the coefficients come from one back substitution per
        step (cheaper; the same numbers to rounding).
    coef_at : int or array_like (M,) of int, optional
        Only the coefficients (and their standard errors) of the fit up to row ``coef_at[i]`` of each
        model are wanted, e.g. the end of its reference period: ``coef`` and ``coef_se`` are NaN at every
        other row, and the coefficients are solved for only at those steps (the residuals, forecast
        errors, ``rss`` and ``nobs`` are unchanged; the coefficients given are the same numbers as
        without it). Default: every row.

    Returns
    -------
    RecursiveFit
        See :class:`RecursiveFit`; arrays squeezed to one model for unbatched input.

    Raises
    ------
    ValueError
        Bad shapes, infinite values, ``rank_tol`` not in (0, 1), or ``coef_at`` not (M,) integers.

    Notes
    -----
    Model: :math:`y_t = x_t'\beta + u_t`. With :math:`b_{t-1}` the least-squares fit on the usable rows
    before :math:`t`, the recursive residual is

    .. math:: w_t = \frac{y_t - x_t'b_{t-1}}{\sqrt{1 + x_t'(X_{t-1}'X_{t-1})^{-1}x_t}},

    defined once the rows before :math:`t` have full column rank. Under iid :math:`N(0,\sigma^2)`
    errors the :math:`w_t` are iid :math:`N(0,\sigma^2)`, and when the initial window is exactly
    :math:`k` rows, :math:`\sum w_t^2` equals the full-sample OLS residual sum of squares (Brown, Durbin
    & Evans 1975). With a rank-deficient start the initial window is extended until full rank; then
    ``rss`` starts at the RSS of that window and :math:`\sum w_t^2 = \mathrm{rss}_T - \mathrm{rss}_{first-1}`.

    Algorithm: the augmented factor :math:`[R\; z]` starts at zero; each usable row :math:`[x_t\; y_t]`
    is annihilated against it by :math:`k` Givens rotations. After the rotations the remaining
    :math:`y`-element equals :math:`w_t` (when the rows before had full rank) and the product of the
    rotation cosines equals :math:`1/\sqrt{1 + x_t'(R'R)^{-1}x_t}`, so neither an inverse nor a
    covariance update is needed for the residuals. While the factor is rank deficient, a pivot whose
    diagonal and incoming element are both below the tolerance is treated as exactly zero (the row is
    collinear in that direction), which keeps rounding noise out of ``R``. Coefficients solve
    :math:`R b = z`; their standard errors need the row norms of a back-substituted :math:`R^{-1}` at
    every step (skipped with ``coef_se=False``). Cost O(n k^2) per model; backward stable.

    References
    ----------
    Brown, R. L., Durbin, J. & Evans, J. M. (1975). Techniques for testing the constancy of regression
    relationships over time. Journal of the Royal Statistical Society B 37(2), 149-192.
    Golub, G. H. & Van Loan, C. F. (2013). Matrix Computations, 4th ed., section 6.5 (updating QR).
    """
    return _recursion(y, X, rank_tol, "se" if coef_se else "coef", coef_at)  # type: ignore[return-value]


def _back_substitute(R: FloatArray, z: FloatArray) -> FloatArray:
    """Solve ``R b = z`` for a batch of upper-triangular ``R`` laid out (k, k, M), ``z`` (k, M)."""
    k = R.shape[0]
    b = np.empty_like(z)
    for i in range(k - 1, -1, -1):
        acc = z[i].copy()
        if i + 1 < k:
            acc -= np.einsum("jm,jm->m", R[i, i + 1:], b[i + 1:])
        b[i] = acc / R[i, i]
    return b


def _recursion(y: object, X: object, rank_tol: float, want: str, coef_at: object = None) -> RecursiveFit | FloatArray:
    """The Givens recursion of :func:`recursive_fit`; ``want`` = ``"se"`` (everything), ``"coef"`` (no
    standard errors, no inverse) or ``"resid"`` (the standardised recursive residuals only); ``coef_at``
    the one row per model whose coefficients are wanted (None: every row)."""
    if not isinstance(rank_tol, (int, float)) or not (0.0 < float(rank_tol) < 1.0):
        raise ValueError(f"rank_tol must be a float in (0, 1); got {rank_tol!r}")
    ya, Xa, batched = as_batch(y, X)
    M, n, k = Xa.shape
    tol = float(rank_tol)
    path = want != "resid"
    at: IntArray | None = None
    if coef_at is not None:
        at_raw = np.asarray(coef_at)
        if at_raw.dtype.kind not in "iu" or at_raw.ndim > 1 or (at_raw.ndim == 1 and at_raw.shape != (M,)):
            raise ValueError(f"coef_at must be an int or ({M},) integers; got {coef_at!r}")
        at = np.broadcast_to(at_raw.astype(np.int64), (M,))
        solve_steps = set(at[(at >= 0) & (at < n)].tolist())

    # Time-major, model-last working layout: every per-step operation touches contiguous length-M
    # blocks. Augmented rows [x_t, y_t]; skipped rows become zero rows, which rotations leave as no-ops.
    rows = np.empty((n, k + 1, M))
    rows[:, :k, :] = Xa.transpose(1, 2, 0)
    rows[:, k, :] = ya.T
    vT = np.isfinite(rows).all(axis=1)  # (n, M): the usable rows
    np.copyto(rows, 0.0, where=~vT[:, None, :])
    # squares of the factor's elements stay far from overflow below this bound (n * PLAIN_MAX^2 << 1e308)
    plain = bool(rows.size == 0 or max(rows.max(), -rows.min()) < PLAIN_MAX)

    Raug = np.zeros((k, k + 1, M))  # [R | z], model axis last
    colsq = np.zeros((k, M))  # running sum of squares of each column of X
    full = np.zeros(M, dtype=bool)  # rows folded so far have full column rank (sticky)
    all_full = False
    rss_acc = np.zeros(M)
    count = np.zeros(M, dtype=np.int64)

    resid_t = np.full((n, M), np.nan)
    if path:
        ferr_t = np.full((n, M), np.nan)
        scale_t = np.full((n, M), np.nan)
        coef_t = np.empty((n, k, M)) if at is None else np.full((n, k, M), np.nan)
        se_t = np.full((n, k, M), np.nan)
        rss_t = np.empty((n, M))
        nobs_t = np.empty((n, M), dtype=np.int64)
    diag = np.arange(k)
    eye_safe = np.eye(k)[:, :, None]
    # scratch buffers for the rotations once every factor has full rank (no allocation per step)
    h = np.empty(M)
    c = np.empty(M)
    s = np.empty(M)
    cosprod = np.empty(M)
    buf_a = np.empty((k + 1, M))
    buf_b = np.empty((k + 1, M))

    for t in range(n):
        v = vT[t]
        r = rows[t]  # (k+1, M), consumed in place
        if not all_full:
            colsq += r[:k] ** 2
            cn = np.sqrt(colsq)
            was_full = full.copy()
        if path:
            cosprod.fill(1.0)
        for j in range(k):
            rjj = Raug[j, j]
            xj = r[j]
            w = k + 1 - j
            if all_full:
                # every factor has a positive diagonal: plain rotations, in place (sqrt of the sum of
                # squares instead of hypot when no value can overflow: a third of the time)
                if plain:
                    np.multiply(rjj, rjj, out=h)
                    np.multiply(xj, xj, out=c)
                    h += c
                    np.sqrt(h, out=h)
                else:
                    np.hypot(rjj, xj, out=h)
                np.divide(rjj, h, out=c)  # (exactly 1 and 0 for a skipped row: the factor stays as it is)
                np.divide(xj, h, out=s)
                rowj = Raug[j, j:]
                xr = r[j:]
                a, b = buf_a[:w], buf_b[:w]
                np.multiply(c, rowj, out=a)
                np.multiply(s, xr, out=b)
                np.multiply(c, xr, out=xr)
                np.multiply(s, rowj, out=rowj)
                np.subtract(xr, rowj, out=xr)
                np.add(a, b, out=rowj)
                if path:
                    cosprod *= c
                continue
            # rank-deficient factor: a negligible element on an empty pivot is exact collinearity
            lim = tol * cn[j]
            negligible = (~full) & (np.abs(rjj) <= lim) & (np.abs(xj) <= lim)
            xj = np.where(negligible, 0.0, xj)
            hh = np.hypot(rjj, xj)
            pos = hh > 0.0
            hs = np.where(pos, hh, 1.0)
            cc = np.where(pos, rjj / hs, 1.0)
            ss = np.where(pos, xj / hs, 0.0)
            r[j] = xj
            rowj = Raug[j, j:].copy()
            xr = r[j:]
            Raug[j, j:] = cc * rowj + ss * xr
            r[j:] = cc * xr - ss * rowj
            if path:
                cosprod *= cc
        rem = r[k]  # y-element left after the rotations
        if all_full and v.all():
            resid_t[t] = rem
            if path:
                rss_acc += rem * rem
                count += 1
                np.divide(1.0, cosprod, out=scale_t[t])
                np.multiply(rem, scale_t[t], out=ferr_t[t])
        else:
            wt = v & (full if all_full else was_full)
            if path:
                count += v
                rss_acc += np.where(v, rem * rem, 0.0)
            if wt.any():
                resid_t[t] = np.where(wt, rem, np.nan)
                if path:
                    with np.errstate(divide="ignore", invalid="ignore"):
                        f = 1.0 / cosprod  # cosprod > 0 on full-rank rows; others are masked out below
                        scale_t[t] = np.where(wt, f, np.nan)
                        ferr_t[t] = np.where(wt, rem * f, np.nan)

        if not all_full:
            dR = np.abs(Raug[diag, diag])
            full = full | (dR > tol * cn).all(axis=0)
            all_full = bool(full.all())
        if not path:
            continue
        nobs_t[t] = count
        rss_t[t] = rss_acc if all_full else np.where(full, rss_acc, np.nan)
        if at is not None and t not in solve_steps:
            continue
        R = Raug[:, :k] if all_full else np.where(full, Raug[:, :k], eye_safe)  # placeholder where not full
        if want == "se":
            Ri = _triu_inverse(R)
            b = np.einsum("ijm,jm->im", Ri, Raug[:, k])
            dof = count - k
            with np.errstate(invalid="ignore", divide="ignore"):
                sd = np.sqrt(np.where(dof > 0, rss_acc / np.maximum(dof, 1), np.nan))
            se = sd * np.sqrt(np.einsum("ijm,ijm->im", Ri, Ri))
            se = se if all_full else np.where(full, se, np.nan)
        else:
            b = _back_substitute(R, Raug[:, k])
        b = b if all_full else np.where(full, b, np.nan)
        if at is None:
            coef_t[t] = b
            if want == "se":
                se_t[t] = se
        else:
            here = at == t
            coef_t[t][:, here] = b[:, here]
            if want == "se":
                se_t[t][:, here] = se[:, here]

    if not path:
        resid = np.ascontiguousarray(resid_t.T)
        return resid if batched else resid[0]
    # 2-D outputs are made contiguous (cheap); the (M, n, k) ones are views of the time-major buffers,
    # since a transposed copy of those would cost more than the whole recursion for large batches.
    resid, ferr, scale, rss, nobs = (np.ascontiguousarray(a.T) for a in (resid_t, ferr_t, scale_t, rss_t, nobs_t))
    coef = coef_t.transpose(2, 0, 1)
    coef_se = se_t.transpose(2, 0, 1)
    has = np.isfinite(resid)
    first = np.where(has.any(axis=1), has.argmax(axis=1), -1).astype(np.int64)
    if not batched:
        return RecursiveFit(resid[0], ferr[0], scale[0], coef[0], coef_se[0], rss[0], nobs[0],
                            first[0], k)
    return RecursiveFit(resid, ferr, scale, coef, coef_se, rss, nobs, first, k)


def recursive_residuals(y: object, X: object) -> FloatArray:
    """Standardised recursive residuals, ``recursive_fit(y, X).resid``.

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
    X : array_like, (n, k) or (M, n, k)

    Returns
    -------
    ndarray (n,) or (M, n); NaN where undefined.

    Notes
    -----
    The same Givens recursion as :func:`recursive_fit` (same numbers), carrying only the factor: no
    coefficients, standard errors, forecast errors or running sums. This is the screening path when
    nothing but the residuals is wanted (about a third of the full fit's time on 10,000 x 260 x 4; see
    ``benchmarks/bench_scale.py --stages engine``).

    References
    ----------
    Brown, R. L., Durbin, J. & Evans, J. M. (1975). JRSS B 37(2), 149-192.
    """
    return _recursion(y, X, 1e-10, "resid")  # type: ignore[return-value]
