"""Rolling-window OLS coefficients and standard errors, batched over models, without a per-window refit.

Every window's normal equations come from differenced cumulative sums of cross-products, computed in a
well-conditioned basis: the regressors are first whitened by each model's full-sample QR factor and the
target is replaced by its full-sample OLS residual. Both are exact reparametrisations, so each window's
fit is recovered exactly, while the cross-products stay of order one and the residual sum of squares
suffers far less cancellation than raw ``y'y - b'X'y``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from drift.engine.recursive import as_batch
from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray, IntArray

__all__ = ["RollingFit", "rolling_coefficients"]

# models processed together: keeps the (cross-product x model*window) work vectors cache-sized. Measured
# (500 models x 261 weeks, window 52, CPU ms, 2026-12-04): k = 10 columns 115 / 104 / 106 / 111 / 131 at
# 16 / 32 / 48 / 64 / 128 models; k = 4: 33.6 / 33.6 / 38.7 at 32 / 64 / 128
_CHUNK = 32
# relative tolerances: full-sample |R_jj| against column norm; window Cholesky pivot against A_jj
_FULL_RANK_TOL = 1e-10
_WINDOW_PIVOT_TOL = 1e-10


@dataclass(frozen=True)
class RollingFit:
    """Output of :func:`rolling_coefficients` (squeezed to one model for unbatched input).

    Attributes
    ----------
    coef : ndarray (M, n, k)
        OLS coefficients of the window ending at ``t`` (rows ``t - window + 1 .. t``); NaN for the first
        ``window - 1`` positions, for windows containing a NaN row, and for rank-deficient windows.
    se : ndarray (M, n, k)
        Conventional OLS standard errors ``s * sqrt(diag((X'X)^{-1}))``, ``s^2 = RSS / (window - k)``;
        NaN where ``coef`` is, everywhere when ``window == k``, and in the columns not asked for
        (``se_columns``).
    nobs : ndarray (M, n) of int
        Usable rows in the window ending at ``t`` (0 for the first ``window - 1`` positions).
    window : int
    """

    coef: FloatArray
    se: FloatArray
    nobs: IntArray
    window: int


def _triu_inv(R: FloatArray) -> FloatArray:
    """Inverse of (..., k, k) upper-triangular matrices by back substitution."""
    k = R.shape[-1]
    Ri = np.zeros_like(R)
    for i in range(k - 1, -1, -1):
        row = np.zeros(R.shape[:-2] + (k,))
        row[..., i] = 1.0
        if i + 1 < k:
            row -= np.einsum("...j,...jl->...l", R[..., i, i + 1:], Ri[..., i + 1:, :])
        Ri[..., i, :] = row / R[..., i, i, None]
    return Ri


class _Work:
    """Work buffers of :func:`_chunk`, allocated once per call and reused by every chunk: fresh large
    arrays cost a page fault per 4 KiB on first touch, which made the allocations, not the arithmetic,
    most of the time of a vectorised solve over (model x window)."""

    def __init__(self, k: int, chunk: int, n: int, window: int) -> None:
        ends = n - window + 1
        npair = k * (k + 1) // 2
        self.prod = np.empty((npair + k + 1, chunk, n + 1))
        self.flat = np.empty((npair + k + 1, chunk, ends))
        self.L = np.empty((k, k, chunk, ends))
        self.g = np.empty((k, chunk, ends))
        self.beta = np.empty((k, chunk, ends))
        self.w = np.empty((k, chunk, ends))
        self.t = np.empty((3, chunk, ends))
        self.good = np.empty((chunk, ends), dtype=bool)
        self.okb = np.empty((chunk, ends), dtype=bool)


def _chunk(y: FloatArray, X: FloatArray, window: int, coef: FloatArray, se: FloatArray, work: _Work,
           se_cols: list[int]) -> IntArray:
    """Fit one chunk of models; writes into ``coef`` and ``se`` laid out (k, M_chunk, n), already NaN
    (``se`` only in the rows ``se_cols``).

    Every vector below is a (model, window end) plane; the scalar formulas (Cholesky, forward and back
    substitution) are applied to all planes at once, in the work buffers."""
    M, n, k = X.shape
    valid = np.isfinite(y) & np.isfinite(X).all(axis=2)
    Xz = np.where(valid[:, :, None], X, 0.0)
    yz = np.where(valid, y, 0.0)
    cnt = np.concatenate([np.zeros((M, 1), dtype=np.int64), np.cumsum(valid, axis=1)], axis=1)
    nobs = np.zeros((M, n), dtype=np.int64)
    nobs[:, window - 1:] = cnt[:, window:] - cnt[:, : n - window + 1]

    # full-sample whitening: X = Q R (usable rows), b0 the full-sample OLS fit
    Q, Rf = np.linalg.qr(Xz)
    dR = np.abs(np.diagonal(Rf, axis1=1, axis2=2))
    cn = np.sqrt((Xz * Xz).sum(axis=1))
    ok_model = (dR > _FULL_RANK_TOL * cn).all(axis=1)
    if not ok_model.any():
        return nobs
    Rsafe = np.where(ok_model[:, None, None], Rf, np.eye(k))
    Rinv = _triu_inv(Rsafe)
    z = np.einsum("mtk,mt->mk", Q, yz)
    b0 = np.einsum("mij,mj->mi", Rinv, z)
    e = yz - np.einsum("mtk,mk->mt", Q, z)  # full-sample residual (zero on skipped rows)

    iu, ju = np.triu_indices(k)
    npair = iu.size
    ends = n - window + 1
    # (cross-product, model, time) layout: every operation below runs on contiguous planes
    Qt = np.ascontiguousarray(Q.transpose(2, 0, 1))  # (k, M, n)
    prod = work.prod[:, :M]
    prod[:, :, 0] = 0.0
    for p, (ia, ja) in enumerate(zip(iu.tolist(), ju.tolist())):
        np.multiply(Qt[ia], Qt[ja], out=prod[p, :, 1:])
    for i in range(k):
        np.multiply(Qt[i], e, out=prod[npair + i, :, 1:])
    np.multiply(e, e, out=prod[-1, :, 1:])
    np.cumsum(prod, axis=2, out=prod)
    flat = work.flat[:, :M]
    np.subtract(prod[:, :, window:], prod[:, :, :ends], out=flat)  # window sums, (P, M, ends)
    pidx = {(ia, ja): p for p, (ia, ja) in enumerate(zip(iu.tolist(), ju.tolist()))}

    def A(i: int, j: int) -> FloatArray:
        return flat[pidx[(min(i, j), max(i, j))]]  # type: ignore[no-any-return]

    c = flat[npair: npair + k]
    q = flat[-1]
    good = work.good[:M]
    np.equal(nobs[:, window - 1:], window, out=good)
    good &= ok_model[:, None]
    L, g, beta, wv = work.L[:, :, :M], work.g[:, :M], work.beta[:, :M], work.w[:, :M]
    t0, t1, t2 = work.t[0, :M], work.t[1, :M], work.t[2, :M]
    okb = work.okb[:M]

    def dot_into(out: FloatArray, pairs: list[tuple[FloatArray, FloatArray]]) -> FloatArray:
        """out = a0*b0 + a1*b1 + ..., summed left to right."""
        np.multiply(pairs[0][0], pairs[0][1], out=out)
        for a, b in pairs[1:]:
            np.multiply(a, b, out=t2)
            out += t2
        return out

    def minus_dot(out: FloatArray, first: FloatArray, pairs: list[tuple[FloatArray, FloatArray]]) -> FloatArray:
        """out = first - (a0*b0 + a1*b1 + ...); out = first when there are no pairs."""
        if pairs:
            dot_into(out, pairs)
            np.subtract(first, out, out=out)
        else:
            np.copyto(out, first)
        return out

    # Cholesky A = L L', vectorised over (model, window); a pivot below tolerance marks rank deficiency
    for j in range(k):
        dj = minus_dot(t0, A(j, j), [(L[j, m], L[j, m]) for m in range(j)])
        np.multiply(A(j, j), _WINDOW_PIVOT_TOL, out=t1)
        np.greater(dj, t1, out=okb)  # NaN-safe: a NaN pivot is bad
        good &= okb
        np.copyto(dj, 1.0, where=~okb)
        np.sqrt(dj, out=L[j, j])
        for i in range(j + 1, k):
            minus_dot(L[i, j], A(i, j), [(L[i, m], L[j, m]) for m in range(j)])
            L[i, j] /= L[j, j]
    for i in range(k):  # g = L^{-1} c (forward substitution)
        minus_dot(g[i], c[i], [(L[i, j], g[j]) for j in range(i)])
        g[i] /= L[i, i]
    for j in range(k - 1, -1, -1):  # beta = L^{-T} g = A^{-1} c (back substitution)
        minus_dot(beta[j], g[j], [(L[i, j], beta[i]) for i in range(j + 1, k)])
        beta[j] /= L[j, j]
    rss = dot_into(t0, [(g[i], g[i]) for i in range(k)])
    np.subtract(q, rss, out=rss)
    np.maximum(rss, 0.0, out=rss)
    dof = window - k
    s_w = t1
    if dof > 0:
        np.divide(rss, dof, out=s_w)
        np.sqrt(s_w, out=s_w)
    else:
        s_w.fill(np.nan)
    bad = ~good
    out_b = coef[:, :, window - 1:]
    out_s = se[:, :, window - 1:]
    Rb = [[Rinv[:, i, j, None] for j in range(k)] for i in range(k)]  # (M, 1): broadcast over windows
    for i in range(k):
        bi = dot_into(out_b[i], [(Rb[i][j], beta[j]) for j in range(i, k)])
        np.add(b0[:, i, None], bi, out=bi)
        np.copyto(bi, np.nan, where=bad)
    for i in se_cols:
        # var(b_i) / s^2 = e_i' R^{-1} A^{-1} R^{-T} e_i = |L^{-1} u|^2 with u = R^{-T} e_i (row i of R^{-1},
        # zero before i): one forward substitution from row i
        for j in range(i, k):
            minus_dot(wv[j], Rb[i][j], [(L[j, m], wv[m]) for m in range(i, j)])
            wv[j] /= L[j, j]
        v = dot_into(t0, [(wv[j], wv[j]) for j in range(i, k)])
        np.sqrt(v, out=v)
        np.multiply(s_w, v, out=out_s[i])
        np.copyto(out_s[i], np.nan, where=bad)
    return nobs


def rolling_coefficients(y: object, X: object, window: int, *, se_columns: Sequence[int] | None = None
                         ) -> RollingFit:
    r"""OLS coefficients and standard errors over a rolling window, batched over models.

    Parameters
    ----------
    y : array_like, (n,) or (M, n)
        Target; NaN marks a missing value.
    X : array_like, (n, k) or (M, n, k)
        Regressors; a window that contains a row with NaN in ``y`` or ``X`` gives NaN.
    window : int
        Window length, ``k <= window <= n``.
    se_columns : sequence of int, optional
        The columns whose standard errors are wanted (default: all); the others' ``se`` are NaN. Each
        column's standard errors cost a triangular solve per window, so asking only for the drivers'
        (the last columns of a design) saves most of that work.

    Returns
    -------
    RollingFit
        ``coef``, ``se`` (M, n, k) and ``nobs`` (M, n), aligned so that position ``t`` holds the fit on
        rows ``t - window + 1 .. t`` (statsmodels ``RollingOLS`` convention).

    Raises
    ------
    TypeError
        ``window`` not an int.
    ValueError
        ``window < k``, bad shapes or infinite values, ``se_columns`` out of range.
    InsufficientDataError
        ``window > n``.

    Notes
    -----
    For each model, with usable rows :math:`X = QR` (thin QR) and :math:`b_0 = R^{-1}Q'y`,
    :math:`e = y - Xb_0`, the window fit is

    .. math:: A_t = \sum_{s \in W_t} q_s q_s', \quad c_t = \sum_{s \in W_t} q_s e_s, \quad
              b_t = b_0 + R^{-1} A_t^{-1} c_t, \quad \mathrm{RSS}_t = \sum_{s\in W_t} e_s^2 - c_t'A_t^{-1}c_t,

    :math:`\widehat{\mathrm{cov}}(b_t) = s_t^2 R^{-1}A_t^{-1}R^{-T}`, :math:`s_t^2 = \mathrm{RSS}_t/(w-k)`.
    The window sums are differences of cumulative sums over time (no per-window refit); :math:`A_t` is
    factorised by a Cholesky decomposition vectorised over all models and windows, and every solve is a
    forward or back substitution with that factor (no inverse is formed):
    :math:`\mathrm{var}(b_{t,i})/s_t^2 = \lVert L_t^{-1}R^{-T}e_i\rVert^2`. A window is treated
    as rank deficient when a Cholesky pivot falls below ``1e-10`` times the corresponding diagonal of
    :math:`A_t` (the pivot ratio is :math:`1 - R^2` of that column on the previous ones); a model whose
    full sample is rank deficient gives NaN throughout. When the window fit is far better than the
    full-sample fit (e.g. noise-free segments), :math:`\mathrm{RSS}_t` loses relative accuracy
    (it is a difference of two sums); coefficients are unaffected.

    References
    ----------
    Golub, G. H. & Van Loan, C. F. (2013). Matrix Computations, 4th ed., sections 4.2 and 5.2.
    """
    if isinstance(window, bool) or not isinstance(window, (int, np.integer)):
        raise TypeError(f"window must be an int; got {type(window).__name__}")
    ya, Xa, batched = as_batch(y, X)
    M, n, k = Xa.shape
    w = int(window)
    if w < k:
        raise ValueError(f"window must be at least the number of regressors k={k}; got {w}")
    if w > n:
        raise InsufficientDataError("rolling coefficients", w, n, hint=f"window={w} exceeds the series length")
    if se_columns is None:
        se_cols = list(range(k))
    else:
        se_cols = sorted({int(j) for j in se_columns})
        if any(j < 0 or j >= k for j in se_cols):
            raise ValueError(f"se_columns must be column indices in 0..{k - 1}; got {list(se_columns)}")
    # regressor-major buffers, returned as (M, n, k) views (a transposed copy would cost more than the fit)
    coef_k = np.full((k, M, n), np.nan)
    se_k = np.full((k, M, n), np.nan)
    nobs = np.empty((M, n), dtype=np.int64)
    work = _Work(k, min(M, _CHUNK), n, w)
    for lo in range(0, M, _CHUNK):
        hi = min(M, lo + _CHUNK)
        nobs[lo:hi] = _chunk(ya[lo:hi], Xa[lo:hi], w, coef_k[:, lo:hi], se_k[:, lo:hi], work, se_cols)
    coef = coef_k.transpose(1, 2, 0)
    se = se_k.transpose(1, 2, 0)
    if not batched:
        return RollingFit(coef[0], se[0], nobs[0], w)
    return RollingFit(coef, se, nobs, w)
