"""Sequential monitoring of a frozen reference fit (first ``m`` observations) over later observations.

The regression ``y_t = x_t' beta + u_t`` is fitted on the reference (historical) sample ``t < m`` and
the observations ``t >= m`` are monitored one at a time. What is *measured* is the same for every
detector: the recursive residuals that continue the least-squares recursion from the reference fit,

.. math:: w_t = \\frac{y_t - x_t' b_{t-1}}{\\sqrt{1 + x_t' (X_{t-1}'X_{t-1})^{-1} x_t}},
          \\qquad t = m+1, \\dots, T \\ (\\text{1-based}),

standardised by the reference-sample :math:`\\hat\\sigma` (``RSS / (m - k)``), and their partial sums
:math:`S_n = \\sum_{t=m+1}^{n} w_t / \\hat\\sigma`. Under the null of a stable relationship with iid
N(0, sigma^2) errors the w_t are iid N(0, sigma^2) *whatever the regressors* (Brown, Durbin & Evans 1975),
so ``S_n / sqrt(m)`` is a Brownian motion in monitoring time ``(n - m)/m``. *How it is monitored* is the
detector, chosen by a short name from :data:`DETECTORS`:

``"csw"``
    Chu, Stinchcombe & White (1996): signal at the first n > m with
    :math:`|S_n| \\ge \\sqrt{n\\,[a^2 + \\ln(n/m)]}`. The paper's monitor is exactly this recursive-residual
    CUSUM, with the sum started at the first monitored residual. ``horizon=None`` uses the
    infinite-horizon constant of that process, :math:`a^2 = -2\\ln\\alpha` (its crossing probability is
    exactly :math:`\\exp(-a^2/2)`, :mod:`drift.engine.tables.csw`; the paper's 7.8147 at 5% belongs to a
    sum started with the history sample and gives 2.0% here); conservative over any finite span. A finite
    ``horizon`` uses the simulated finite-horizon a^2.
``"mosum"``
    Moving sum of the last ``L = round(window * m)`` monitored residuals, boundary
    :math:`c\\sqrt{L}` (constant), in the spirit of Leisch, Hornik & Kuan (2000) and Zeileis et al.
    (2005). While fewer than L residuals have been monitored the window holds what there is (the rest
    counts as zero, so there is no early-time singularity). Reacts to a change a window-length after it,
    however late it comes.
``"page"``
    Page-type CUSUM (Fremdt 2015): :math:`\\max_{m \\le j \\le n} |S_n - S_j|` (the CUSUM restarted at
    the most favourable point), boundary :math:`c\\sqrt{m}\\,w(\\tau)`,
    :math:`w(\\tau) = \\sqrt{1+\\tau}\\,(\\tau/(1+\\tau))^{\\gamma}`, :math:`\\tau = (n-m)/m`.

``"shift"``
    Two-sided Page CUSUM with a reference value (Page 1954) of the standardised residuals:
    :math:`C^+_n = \\max(0, C^+_{n-1} + z_n - \\kappa)`, :math:`C^-_n = \\max(0, C^-_{n-1} - z_n - \\kappa)`,
    :math:`\\kappa = 0.5`, signal when :math:`\\max(C^+_n, C^-_n) \\ge c`. It forgets a quiet past, so it
    reacts within a few periods to a large, abrupt change whenever it comes (the csw and page monitors
    keep the whole monitored sum and are slower there, quicker on small persistent changes).
``"variance"``
    The same recursion on :math:`(z_n^2 - 1)/\\sqrt{2}` with :math:`\\kappa = 0.25`: a sequential CUSUM of
    squares against the reference scale (the error variance rose or fell), unweighted residuals only.

The mosum and page critical values ``c`` and the finite-horizon csw a^2 hold the false-alarm probability
over the monitoring horizon; they were simulated by ``tools/simulate_monitoring.py`` into
:mod:`drift.engine.tables.monitoring`. The shift and variance constants (horizons in monitored steps) were
simulated by ``tools/simulate_family.py`` into :mod:`drift.engine.tables.family_data`, looked up through
:mod:`drift.engine.tables.family`; the data also hold the level at which each member of a family of
monitors on one stream runs so that the family as a whole holds its level (:func:`family_level`).

Why recursive residuals for every detector: their null distribution is exact for any design, including a
detrended design without an intercept, whereas the frozen-fit (OLS-based) residual process of Zeileis et
al. (2005) has a limit that depends on whether the regressors contain a constant. The price is that the
recursion keeps learning after a change, which slightly dilutes a very persistent shift.

References
----------
Brown, R. L., Durbin, J. and Evans, J. M. (1975). Techniques for testing the constancy of regression
relationships over time. JRSS B 37(2), 149-192.
Chu, C.-S. J., Stinchcombe, M. and White, H. (1996). Monitoring structural change. Econometrica 64(5),
1045-1065.
Leisch, F., Hornik, K. and Kuan, C.-M. (2000). Monitoring structural changes with the generalized
fluctuation test. Econometric Theory 16(6), 835-854.
Zeileis, A., Leisch, F., Kleiber, C. and Hornik, K. (2005). Monitoring structural change in dynamic
econometric models. J. Applied Econometrics 20(1), 99-121.
Fremdt, S. (2015). Page's sequential procedure for change-point detection in time series regression.
J. Time Series Analysis 36(6).
Satterthwaite, F. E. (1946). An approximate distribution of estimates of variance components.
Biometrics Bulletin 2(6), 110-114.
Page, E. S. (1954). Continuous inspection schemes. Biometrika 41(1/2), 100-115.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from drift.engine.arma import ErrorModel
from drift.engine.results import TestResult
from drift.engine.tables import csw as csw_table
from drift.engine.tables import family as fam_table
from drift.engine.tables import monitoring as mon_table
from drift.exceptions import InsufficientDataError
from drift.typing import FloatArray, IntArray

#: Levels reported in ``critical_values`` (the table keys).
REPORTED_LEVELS = (0.10, 0.05, 0.01)


@dataclass(frozen=True)
class ReferenceFit:
    """Reference-period OLS fit and the recursive residuals continued from it (batched).

    Attributes
    ----------
    coef : (M, k) reference-period OLS coefficients (NaN for degenerate models).
    sigma : (M,) reference residual standard deviation, ``sqrt(RSS / (m_eff - k))``.
    nobs_reference : (M,) usable reference observations ``m_eff``.
    m : (M,) index of the first monitored observation.
    w : (M, T) recursive residuals for t >= m (NaN before m and at missing rows).
    ok : (M,) False for models whose reference fit is degenerate (too few rows, collinear, zero variance).
    """

    coef: FloatArray
    sigma: FloatArray
    nobs_reference: IntArray
    m: IntArray
    w: FloatArray
    ok: np.ndarray


@dataclass(frozen=True)
class MonitorResult(TestResult):
    """Result of :func:`monitor`; extends :class:`~drift.engine.results.TestResult`.

    Attributes
    ----------
    statistic : max over the monitored span of ``|path| / boundary`` (>= 1 means an alarm).
    pvalue : csw: infinite-horizon p-value ``exp(-A/2)``, A the largest a^2 at which the path touches the
        boundary, or the simulated finite-horizon one; mosum/page:
        simulated, interpolated in the horizon and clipped to [0.001, 0.5]. NaN for degenerate models.
    path : (M, T) detector path aligned to the input index, NaN before ``m`` (csw: S_n; mosum: window
        sum; page: max_j |S_n - S_j|; all in units of sigma-hat).
    boundary : (M, T) boundary aligned to the input index, NaN before ``m`` and beyond the horizon.
    alarm_index : (M,) first index with ``|path| >= boundary``; -1 if none.
    critical_value : the constant used (csw: a^2; mosum/page: c), float or (M,).
    reference : the :class:`ReferenceFit` (coefficients, sigma, recursive residuals).
    horizon_end : (M,) first row beyond the monitoring horizon (T when the horizon covers the data); with
        ``extend`` an alarm at or after it is raised without the false-alarm guarantee.
    """

    path: Any = None
    boundary: Any = None
    alarm_index: Any = None
    critical_value: Any = None
    reference: Any = None
    horizon_end: Any = None


# --------------------------------------------------------------------------------------------- inputs
def _as_batch(y: Any, X: Any) -> tuple[FloatArray, FloatArray, bool]:
    y = np.asarray(y, dtype=float)
    X = np.asarray(X, dtype=float)
    if y.ndim == 1:
        squeeze = True
        y = y[None, :]
        if X.ndim == 1:
            X = X[:, None]
        if X.ndim != 2:
            raise ValueError(f"X must be 2-D (T, k) for 1-D y, got shape {X.shape}")
        X = X[None]
    elif y.ndim == 2:
        squeeze = False
        if X.ndim == 2:  # shared design
            X = np.broadcast_to(X, (y.shape[0], *X.shape))
        if X.ndim != 3:
            raise ValueError(f"X must be 3-D (M, T, k) or 2-D (T, k) for 2-D y, got shape {X.shape}")
    else:
        raise ValueError(f"y must be 1-D (T,) or 2-D (M, T), got shape {y.shape}")
    if X.shape[:2] != y.shape:
        raise ValueError(f"X shape {X.shape} does not match y shape {y.shape} (need (M, T, k))")
    if X.shape[2] < 1:
        raise ValueError("X needs at least one column")
    return y, X, squeeze


def _as_m(m: Any, n_models: int, T: int) -> IntArray:
    arr = np.asarray(m)
    if arr.dtype.kind not in "iu" and not (arr.dtype.kind == "f" and np.all(np.mod(arr, 1) == 0)):
        raise TypeError(f"m must be an integer or an (M,) integer array, got {m!r}")
    arr = np.broadcast_to(arr.astype(np.int64), (n_models,)).copy()
    if np.any(arr < 1) or np.any(arr >= T):
        raise InsufficientDataError("monitoring (reference size m must leave observations to monitor)",
                                    int(arr.max()) + 1, T)
    return arr


# ---------------------------------------------------------------------------------- what is measured
def reference_fit(y: Any, X: Any, m: Any) -> ReferenceFit:
    """Fit OLS on the first ``m`` rows and continue the recursive residuals over the rest (batched).

    Parameters
    ----------
    y : (T,) or (M, T) target.
    X : (T, k), or (M, T, k) regressors (a 2-D X with 2-D y is shared by all models).
    m : int or (M,) ints; rows ``t < m`` form the reference sample.

    Returns
    -------
    ReferenceFit

    Raises
    ------
    InsufficientDataError : ``m`` leaves nothing to monitor; or, for a single model, its reference sample
        cannot support the fit (fewer than k + 1 complete rows, collinear regressors, zero residual
        variance). In a batch such models are flagged in ``ok`` instead, so one bad model does not stop a
        screening run.

    Notes
    -----
    Rows with any NaN in y or x are skipped: excluded from the reference fit and, in the monitored span,
    neither give a residual nor update the recursion. The recursion is one loop over time with numpy
    operations vectorised over models: ``f = 1 + x'Px``, ``e = y - x'b``, ``w = e / sqrt(f)``,
    ``b += Px e / f``, ``P -= Px x'P / f``.
    """
    yb, Xb, _ = _as_batch(y, X)
    return _reference_fit(yb, Xb, _as_m(m, yb.shape[0], yb.shape[1]))


def _reference_fit(y: FloatArray, X: FloatArray, m: IntArray) -> ReferenceFit:
    M, T, k = X.shape
    valid = np.isfinite(y) & np.all(np.isfinite(X), axis=2)
    tt = np.arange(T)
    ref = valid & (tt[None, :] < m[:, None])
    n_ref = ref.sum(axis=1)
    Xr = np.where(ref[:, :, None], X, 0.0)
    yr = np.where(ref, y, 0.0)
    xtx = np.matmul(Xr.transpose(0, 2, 1), Xr)  # matmul: einsum's loops cost several times more here
    xty = np.matmul(Xr.transpose(0, 2, 1), yr[:, :, None])[:, :, 0]
    # Rank check relative to the scale of the design (collinear or empty reference samples).
    sv = np.linalg.svd(xtx, compute_uv=False)
    full_rank = sv[:, -1] > sv[:, 0] * (k * np.finfo(float).eps * 1e4)
    ok = (n_ref > k) & full_rank & (sv[:, 0] > 0)
    eye = np.broadcast_to(np.eye(k), (M, k, k))
    safe = np.where(ok[:, None, None], xtx, eye)
    P = np.linalg.inv(safe)
    b = np.einsum("mij,mj->mi", P, np.where(ok[:, None], xty, 0.0))
    resid = np.where(ref, y - np.einsum("mtk,mk->mt", np.where(ref[:, :, None], X, 0.0), b), 0.0)
    dof = np.maximum(n_ref - k, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma = np.sqrt(np.einsum("mt,mt->m", resid, resid) / dof)
        scale = np.sqrt(np.einsum("mt,mt->m", yr, yr) / np.maximum(n_ref, 1))
    # Zero (or numerically zero) residual variance: a perfect fit cannot standardise anything.
    ok &= sigma > scale * 1e-10
    ok &= sigma > 0

    b_ref = b.copy()
    w = np.full((M, T), np.nan)
    for t in range(int(m.min()), T):
        active = ok & valid[:, t] & (t >= m)
        if not active.any():
            continue
        x = np.where(active[:, None], X[:, t], 0.0)
        yt = np.where(active, y[:, t], 0.0)
        Px = np.matmul(P, x[:, :, None])[:, :, 0]
        f = 1.0 + np.sum(x * Px, axis=1)
        e = yt - np.sum(x * b, axis=1)
        w[:, t] = np.where(active, e / np.sqrt(f), np.nan)
        g = np.where(active, 1.0 / f, 0.0)
        b = b + Px * (e * g)[:, None]
        P = P - Px[:, :, None] * (Px * g[:, None])[:, None, :]
    coef = np.where(ok[:, None], b_ref, np.nan)
    return ReferenceFit(coef=coef, sigma=np.where(ok, sigma, np.nan), nobs_reference=n_ref.astype(np.int64),
                        m=m, w=w, ok=ok)


# ------------------------------------------------------------------------ how it is monitored (registry)
@dataclass(frozen=True)
class _Detector:
    """A detector: turns the standardised partial sums into a path and a boundary."""

    name: str
    method: str
    run: Callable[..., tuple[FloatArray, FloatArray, FloatArray, FloatArray, dict[float, Any], dict]]


def _monitored_time(m: IntArray, T: int, info: FloatArray | None = None) -> tuple[FloatArray, np.ndarray]:
    """Monitored time so far (1 at t = m) and the monitored mask. With ``info`` (weighted monitoring) the
    time is the accumulated information ``sum v_t^2`` instead of the number of steps."""
    tt = np.arange(T)[None, :]
    k = (tt - m[:, None] + 1).astype(float)  # monitored steps so far (1 at t = m)
    mon = k >= 1
    if info is not None:
        k = np.where(mon, info, k)
    return k, mon


def _info_truncate(boundary: FloatArray, k: FloatArray, m: IntArray, hz: FloatArray) -> FloatArray:
    """NaN the boundary beyond the horizon measured in (information) time."""
    return np.where(k <= (hz * m)[:, None] + 1e-9, boundary, np.nan)


def _horizon_array(horizon: Any, m: IntArray, T: int) -> FloatArray:
    """Horizon ratio per model: None = the span of the data; a number or an (M,) array as given."""
    if horizon is None:
        return (T - m) / m
    h = np.broadcast_to(np.asarray(horizon, dtype=float), m.shape).copy()
    if np.any(~np.isfinite(h)) or np.any(h <= 0):
        raise ValueError(f"horizon must be a positive ratio (T_max - m)/m, got {horizon!r}")
    return h


def _csw(S: FloatArray, m: IntArray, horizon: Any, level: float, params: dict,
         dof: FloatArray | None = None, info: FloatArray | None = None, extend: bool = False,
         **_: Any) -> tuple:
    M, T = S.shape
    k, mon = _monitored_time(m, T, info)
    n = k + m[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        log_ratio = np.where(mon, np.log(np.where(mon, n, 1.0) / m[:, None]), np.nan)
        excess = np.where(mon, S * S / n - log_ratio, np.nan)  # a^2 at which the boundary is touched
    A = _nanmax(excess)
    hmax = mon_table.HORIZONS[-1]
    hz = None if horizon is None else _horizon_array(horizon, m, T)
    # infinite-horizon constant and closed-form p-value (conservative for any finite span) where no finite
    # horizon is given or it lies beyond the simulated table; the simulated finite-horizon a^2 elsewhere
    inf_h = np.ones(M, bool) if hz is None else hz > hmax + 1e-12
    hzc = np.full(M, hmax) if hz is None else np.minimum(hz, hmax)
    a2_inf = csw_table.lookup(level)

    def const(lvl: float) -> FloatArray:
        return np.where(inf_h, csw_table.lookup(lvl), mon_table.critical_value("csw", 0.0, hzc, lvl, dof))

    a2 = np.where(inf_h, a2_inf, mon_table.critical_value("csw", 0.0, hzc, level, dof))
    cvs: dict[float, Any] = ({lvl: csw_table.lookup(lvl) for lvl in REPORTED_LEVELS} if inf_h.all()
                             else {lvl: const(lvl) for lvl in REPORTED_LEVELS})
    with np.errstate(invalid="ignore"):
        p_inf = np.where(np.isfinite(A), csw_table.crossing_probability(np.nan_to_num(A)), np.nan)
    pval = np.where(inf_h, p_inf, mon_table.pvalue("csw", 0.0, hzc, A, dof))
    if inf_h.all():
        params["calibration"] = "infinite horizon, monitored residuals only: P(alarm) = exp(-a^2/2)"
        params["scale_dof"] = None  # the closed form has no estimated-scale version
    else:
        # a per-model horizon array is described by its range (formatting 10^3 numbers costs milliseconds)
        hs = np.atleast_1d(np.asarray(horizon, dtype=float))
        span = f"{hs[0]:g}" if np.all(hs == hs[0]) else f"{hs.min():g} to {hs.max():g}"
        params["calibration"] = f"finite horizon {span} (simulated)"
    with np.errstate(invalid="ignore"):
        boundary = np.where(mon, np.sqrt(n * (a2[:, None] + log_ratio)), np.nan)
    if not extend:
        lim = np.where(inf_h, np.inf, hzc * m)
        if info is None:  # whole steps: the rows m .. m + ceil(H m) - 1
            lim = np.ceil(lim - 1e-9)
        boundary = np.where(k <= lim[:, None] + 1e-9, boundary, np.nan)
    path = np.where(mon, S, np.nan)
    return path, boundary, a2, pval, cvs, params


def _mosum(S: FloatArray, m: IntArray, horizon: float | None, level: float, params: dict,
           dof: FloatArray | None = None, window: float = 0.25, info: FloatArray | None = None,
           extend: bool = False, **_: Any) -> tuple:
    # the moving window is counted in steps; with weights it assumes unit mean-square weights
    T = S.shape[1]
    _, mon = _monitored_time(m, T)
    hz = _horizon_array(horizon, m, T)
    L = np.maximum(np.round(window * m).astype(np.int64), 1)
    tt = np.arange(T)[None, :]
    lag_idx = tt - L[:, None]
    S0 = np.where(mon, S, 0.0)
    lagged = np.take_along_axis(S0, np.clip(lag_idx, 0, T - 1), axis=1)
    lagged = np.where(lag_idx >= m[:, None], lagged, 0.0)
    path = np.where(mon, S0 - lagged, np.nan)
    c = mon_table.critical_value("mosum", window, np.maximum(hz, 1e-9), level, dof)
    cvs = {lvl: mon_table.critical_value("mosum", window, np.maximum(hz, 1e-9), lvl, dof)
           for lvl in REPORTED_LEVELS}
    boundary = np.where(mon, (c * np.sqrt(L))[:, None] * np.ones((1, T)), np.nan)
    if not extend:
        boundary = _truncate(boundary, m + np.ceil(hz * m).astype(np.int64))
    ratio = _nanmax(np.abs(path) / boundary)
    pval = mon_table.pvalue("mosum", window, np.maximum(hz, 1e-9), ratio * c, dof)
    params.update(window=window, window_length=L if L.size > 1 else int(L[0]))
    return path, boundary, c, pval, cvs, params


def _page(S: FloatArray, m: IntArray, horizon: float | None, level: float, params: dict,
          dof: FloatArray | None = None, gamma: float = 0.0, info: FloatArray | None = None,
          extend: bool = False, **_: Any) -> tuple:
    T = S.shape[1]
    k, mon = _monitored_time(m, T, info)
    hz = _horizon_array(horizon, m, T)
    S0 = np.where(mon, S, 0.0)  # S = 0 up to the start of monitoring, so j = m is included
    path = np.where(mon, np.maximum(S0 - np.minimum.accumulate(S0, axis=1),
                                    np.maximum.accumulate(S0, axis=1) - S0), np.nan)
    tau = np.where(mon, k, 1.0) / m[:, None]
    weight = np.sqrt(1.0 + tau) * (tau / (1.0 + tau)) ** gamma
    c = mon_table.critical_value("page", gamma, np.maximum(hz, 1e-9), level, dof)
    cvs = {lvl: mon_table.critical_value("page", gamma, np.maximum(hz, 1e-9), lvl, dof)
           for lvl in REPORTED_LEVELS}
    boundary = np.where(mon, c[:, None] * np.sqrt(m)[:, None] * weight, np.nan)
    if extend:
        pass  # the boundary goes on beyond the horizon (its guarantee does not)
    elif info is not None:
        boundary = _info_truncate(boundary, k, m, hz)
    else:
        boundary = _truncate(boundary, m + np.ceil(hz * m).astype(np.int64))
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = _nanmax(np.abs(path) / boundary)
    pval = mon_table.pvalue("page", gamma, np.maximum(hz, 1e-9), ratio * c, dof)
    params.update(gamma=gamma)
    return path, boundary, c, pval, cvs, params


def _page_k(A: FloatArray, B: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Upper and lower Page CUSUMs from the drifted partial sums ``A = D - kappa I`` and
    ``B = -D - kappa I`` (both 0 before monitoring): the recursion ``C = max(0, C + x - kappa)`` equals
    ``A_n - min(0, min_(j<=n) A_j)``, so no loop over time is needed."""
    up = A - np.minimum(np.minimum.accumulate(A, axis=1), 0.0)
    dn = B - np.minimum(np.minimum.accumulate(B, axis=1), 0.0)
    return up, dn


def _steps_end(m: IntArray, hz: FloatArray, k: FloatArray, info: FloatArray | None) -> tuple[FloatArray, Any]:
    """Horizon in monitored steps (or information) and the mask of rows within it."""
    n_steps = np.maximum(np.ceil(hz * m - 1e-9), 1.0)
    return n_steps, k <= n_steps[:, None] + 1e-9


def _shift(S: FloatArray, m: IntArray, horizon: float | None, level: float, params: dict,
           dof: FloatArray | None = None, kappa: float = 0.5, info: FloatArray | None = None,
           extend: bool = False, count: FloatArray | None = None, **_: Any) -> tuple:
    """Two-sided Page CUSUM with reference value ``kappa`` (Page 1954): quick on large, abrupt changes."""
    T = S.shape[1]
    k, mon = _monitored_time(m, T, info)
    hz = _horizon_array(horizon, m, T)
    steps, within = _steps_end(m, hz, k, info)
    # information so far: the residuals seen (a missing row neither adds a residual nor the drift kappa)
    I = np.where(mon, info if info is not None else count, 0.0)
    S0 = np.where(mon, S, 0.0)
    up, dn = _page_k(S0 - kappa * I, -S0 - kappa * I)
    return _two_sided_page("shift", up, dn, mon, steps, within, level, dof, extend, kappa, params)


def _variance(S: FloatArray, m: IntArray, horizon: float | None, level: float, params: dict,
              dof: FloatArray | None = None, kappa: float = 0.25, info: FloatArray | None = None,
              extend: bool = False, z: FloatArray | None = None, **_: Any) -> tuple:
    """Two-sided Page CUSUM of ``(z^2 - 1)/sqrt(2)`` against the reference scale: a sequential CUSUM of
    squares (the error variance rose or fell)."""
    if info is not None:
        raise ValueError("the variance detector monitors the unweighted residuals: pass no weights")
    T = S.shape[1]
    k, mon = _monitored_time(m, T)
    hz = _horizon_array(horizon, m, T)
    steps, within = _steps_end(m, hz, k, None)
    valid = mon & np.isfinite(z)
    q = np.where(valid, (np.where(valid, z, 0.0) ** 2 - 1.0) / np.sqrt(2.0), 0.0)
    I = np.cumsum(valid, axis=1).astype(float)
    Q = np.cumsum(q, axis=1)
    up, dn = _page_k(Q - kappa * I, -Q - kappa * I)
    return _two_sided_page("variance", up, dn, mon, steps, within, level, dof, extend, kappa, params)


def _two_sided_page(kind: str, up: FloatArray, dn: FloatArray, mon: Any, steps: FloatArray, within: Any,
                    level: float, dof: FloatArray | None, extend: bool, kappa: float, params: dict) -> tuple:
    """The signed path of a two-sided Page CUSUM (the larger side), its family-table boundary over the
    horizon (``extend``: beyond it too), critical values, and the p-value of its largest excursion within
    the horizon."""
    path = np.where(mon, np.where(up >= dn, up, -dn), np.nan)
    c = fam_table.critical_value(kind, steps, level, dof)
    cvs = {lvl: fam_table.critical_value(kind, steps, lvl, dof) for lvl in REPORTED_LEVELS}
    boundary = np.where(mon & (within | extend), c[:, None], np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = _nanmax(np.where(within, np.abs(path) / boundary, np.nan))
    pval = fam_table.pvalue(kind, steps, ratio * c, dof)
    params.update(kappa=kappa, horizon_steps=steps if steps.size > 1 else float(steps[0]))
    return path, boundary, c, pval, cvs, params


def _truncate(boundary: FloatArray, end: IntArray) -> FloatArray:
    """NaN the boundary from index ``end`` on (beyond the calibrated horizon)."""
    tt = np.arange(boundary.shape[1])[None, :]
    return np.where(tt < end[:, None], boundary, np.nan)


def _nanmax(a: FloatArray) -> FloatArray:
    finite = np.isfinite(a)
    out = np.max(np.where(finite, a, -np.inf), axis=1)
    return np.where(finite.any(axis=1), out, np.nan)


#: Detector registry: the one place mapping config names to code.
DETECTORS: dict[str, _Detector] = {
    "csw": _Detector("csw", "CUSUM monitoring (Chu, Stinchcombe & White 1996)", _csw),
    "mosum": _Detector("mosum", "MOSUM monitoring of recursive residuals", _mosum),
    "page": _Detector("page", "Page-type CUSUM monitoring (after Fremdt 2015)", _page),
    "shift": _Detector("shift", "Page CUSUM with a reference value (Page 1954) for abrupt shifts", _shift),
    "variance": _Detector("variance", "Sequential CUSUM of squares against the reference scale", _variance),
}


def _scale_dof(scale_dof: Any, error_model: ErrorModel | None, fit: ReferenceFit, k: int) -> FloatArray | None:
    """Effective degrees of freedom of the monitoring scale per model (see :func:`monitor`, Notes)."""
    M = fit.ok.shape[0]
    if scale_dof is None:
        return None
    if isinstance(scale_dof, str):
        if scale_dof != "auto":
            raise ValueError(f"scale_dof must be 'auto', None or a number >= {mon_table.DOF[0]}, got {scale_dof!r}")
        nu_sigma = np.maximum(fit.nobs_reference - k, 1).astype(float)
        v = 0.5 / nu_sigma
        if error_model is not None:
            extra = np.broadcast_to(np.asarray(error_model.log_scale_variance(), dtype=float), (M,))
            v = v + np.where(np.isfinite(extra), extra, 0.0)
        nu = np.maximum(0.5 / v, float(mon_table.DOF[0]))
    else:
        try:
            nu = np.broadcast_to(np.asarray(scale_dof, dtype=float), (M,)).copy()
        except (TypeError, ValueError) as exc:
            raise TypeError(f"scale_dof must be 'auto', None, a number or an (M,) array, got {scale_dof!r}") from exc
        if np.any(np.isnan(nu)) or np.any(nu < mon_table.DOF[0]):
            raise ValueError(f"scale_dof must be >= {mon_table.DOF[0]} (or inf), got {scale_dof!r}")
    return np.where(fit.ok, nu, np.inf)


def monitor(y: Any, X: Any, m: Any, *, horizon: float | None = None, detector: str = "csw",
            level: float = 0.05, window: float = 0.25, gamma: float = 0.0,
            error_model: ErrorModel | None = None, scale_dof: Any = "auto",
            weights: Any = None, extend: bool = False, reference: ReferenceFit | None = None) -> MonitorResult:
    """Monitor observations ``t >= m`` against the fit frozen on the reference rows ``t < m``.

    Parameters
    ----------
    y : (T,) or (M, T) target (e.g. after the two-step trend/season filter).
    X : (T, k) or (M, T, k) regressors; a 2-D X with 2-D y is shared by all models.
    m : int or (M,) ints: size of the reference sample (rows ``0 .. m-1``); monitoring starts at row m.
    horizon : monitoring horizon as the ratio ``(T_max - m) / m``. mosum/page: None means the span of the
        data, ``(T - m)/m`` per model; values beyond the simulated table (6) raise ValueError, values
        below its first entry (0.25) use that entry (conservative). csw: None means the infinite-horizon
        constant ``a^2 = -2 ln(level)`` of the monitored-only CUSUM (and its closed-form p-value
        ``exp(-a^2/2)``, see :mod:`drift.engine.tables.csw`); a finite value uses the simulated
        finite-horizon a^2 (beyond the table: falls back to the infinite-horizon constant). The boundary
        is NaN beyond a finite horizon: no alarm is raised there (see ``extend``). shift/variance: the
        horizon in steps is ``ceil(horizon * m)`` (at most 1040, the simulated table). A number or an
        (M,) array (one horizon per model).
    detector : one of ``DETECTORS``: "csw", "mosum", "page", "shift", "variance".
    level : false-alarm probability in [0.001, 0.5] for mosum/page/shift/variance and finite-horizon csw
        (between the tabulated 0.5, 0.3, 0.2, 0.15, 0.1, 0.075, 0.05, 0.025, 0.01, 0.005, 0.0025, 0.001 the
        critical value is interpolated in log level); any value in (0, 1) for infinite-horizon csw.
    weights : optional (T,) or (M, T) weights ``v_t`` multiplying each standardised recursive residual
        before the partial sums, ``S_n = sum v_t w_t / sigma``. With ``v`` a driver's column orthogonalised
        on the other regressors and scaled to unit mean square over the reference rows, ``S_n`` is the
        score (fluctuation) process of that driver's coefficient: it drifts when the driver's effect
        changes even if the residual mean does not (a change orthogonal to the mean regressor, to which
        the plain residual CUSUM has no power; Ploberger & Krämer 1992). Under the null ``v_t w_t`` is a
        martingale difference with variance ``sigma^2 v_t^2``, so ``S`` is a Brownian motion in the
        *information time* ``I_n = sum_{t<=n} v_t^2``: with weights, the csw and page boundaries (and the
        horizon) are evaluated at ``I_n`` instead of the step count, which makes the false-alarm rate hold
        whatever the scale of the weights or how the driver's variability moves (mosum keeps its
        step-counted window). NaN weights count as zero.
    window : mosum window as a fraction h of m (tabulated: 0.1, 0.25, 0.5, 1.0).
    gamma : page weight exponent (tabulated: 0.0, 0.25, 0.45); larger reacts faster early on.
    error_model : the :class:`~drift.engine.arma.ErrorModel` that prewhitened ``y`` and ``X`` (one per
        model, or one for all). Its estimation covariance widens the boundary for the sampling error of
        the estimated filter (see Notes); without it the filter is treated as known. Pass it whenever the
        data were prewhitened with estimated coefficients: with AR(1) errors phi = 0.5 and m = 100 the
        false-alarm rate is otherwise about three times nominal.
    scale_dof : ``"auto"`` (default): degrees of freedom of the estimated monitoring scale, m_eff - k for
        sigma-hat combined with ``error_model``'s estimation variance (Notes); None: the asymptotic
        known-scale tables (the behaviour before this option; sizes run above nominal for small m - k); a
        number or (M,) array >= 2 (inf allowed): used as given. Ignored (asymptotic) by the
        infinite-horizon csw.

    extend : keep the boundary (with the same constant) beyond the horizon, so the monitor keeps running
        there; its false-alarm guarantee holds only up to ``horizon_end``.
    reference : a :func:`reference_fit` of the same ``y``, ``X``, ``m`` to reuse (several detectors on one
        fit); computed when None.
    Returns
    -------
    MonitorResult
        ``statistic`` (max |path|/boundary), ``pvalue``, ``path``, ``boundary``, ``alarm_index``,
        ``critical_value``, ``critical_values`` (levels 0.10/0.05/0.01), ``nobs`` (monitored residuals),
        ``method``, ``params``. Squeezed to scalars / 1-D paths for a single model.

    Raises
    ------
    ValueError, TypeError : unknown detector, bad level, horizon, window, gamma or array shapes.
    InsufficientDataError : nothing to monitor, or a single model whose reference fit is degenerate
        (see :func:`reference_fit`). Degenerate models in a batch get NaN statistics and alarm -1.

    Notes
    -----
    With :math:`S_n = \\sum_{t=m+1}^n w_t/\\hat\\sigma` (n = 1-based count; input row n-1):
    csw path :math:`S_n`, boundary :math:`\\sqrt{n[a^2 + \\ln(n/m)]}`; mosum path
    :math:`S_n - S_{n-L}`, boundary :math:`c\\sqrt{L}`; page path :math:`\\max_{m\\le j\\le n}|S_n - S_j|`,
    boundary :math:`c\\sqrt{m}\\sqrt{1+\\tau}(\\tau/(1+\\tau))^\\gamma`. Errors are assumed serially
    uncorrelated; with ARMA errors prewhiten first (:func:`drift.engine.arma.prewhiten`).

    Estimated scale. :math:`\\hat\\sigma` comes from the reference sample and is independent of the
    monitored recursive residuals; for iid normal errors :math:`\\hat\\sigma^2/\\sigma^2 \\sim
    \\chi^2_\\nu/\\nu`, :math:`\\nu = m_{eff} - k`, exactly (Brown, Durbin & Evans 1975). The critical
    values are then those of the path divided by an independent :math:`\\sqrt{\\chi^2_\\nu/\\nu}`
    (the sequential analogue of Student's t; simulated ``*_DOF`` tables, interpolated in 1/nu). After
    prewhitening by an estimated filter the monitored partial sums are, over long spans, multiplied by
    :math:`\\hat f/f` (the filter's zero-frequency gain, for AR(1) :math:`(1-\\hat\\phi)/(1-\\phi)`),
    independent of the future errors: the scale carries the extra log-variance
    :math:`v_f` = :meth:`ErrorModel.log_scale_variance`. Matching the log-variance of a chi-type scale,
    :math:`1/(2\\nu) = 1/(2(m_{eff}-k)) + v_f`, gives the effective dof (a Satterthwaite-type
    approximation; Satterthwaite 1946), floored at the smallest tabulated value 2. For phi = 0.5 and
    m = 100, nu is about 8 instead of 90: the boundary widens as much as the estimated filter is
    uncertain, and that width is what holds the false-alarm rate.

    References
    ----------
    See the module docstring.
    """
    return monitor_levels(y, X, m, levels=(level,), horizon=horizon, detector=detector, window=window,
                          gamma=gamma, error_model=error_model, scale_dof=scale_dof, weights=weights,
                          extend=extend, reference=reference)[0]


def monitor_levels(y: Any, X: Any, m: Any, *, levels: Sequence[float], horizon: float | None = None,
                   detector: str = "csw", window: float = 0.25, gamma: float = 0.0,
                   error_model: ErrorModel | None = None, scale_dof: Any = "auto", weights: Any = None,
                   extend: bool = False, reference: ReferenceFit | None = None) -> list[MonitorResult]:
    """:func:`monitor` at several levels of the same process: one result per level, each equal to
    ``monitor(..., level=level)`` (the same operations), the partial sums, weights and information time
    computed once (a check asks for its alarm level and its warning level)."""
    if not isinstance(detector, str) or detector not in DETECTORS:
        raise ValueError(f"detector must be one of {sorted(DETECTORS)}, got {detector!r}")
    lo_p, hi_p = min(mon_table.TAIL_PROBS), max(mon_table.TAIL_PROBS)
    for level in levels:
        if not isinstance(level, (int, float)) or not 0.0 < float(level) < 1.0:
            raise ValueError(f"level must be in (0, 1), got {level!r}")
        if (detector != "csw" or horizon is not None) and not lo_p - 1e-12 <= level <= hi_p + 1e-12:
            raise ValueError(f"level must be in [{lo_p}, {hi_p}] for this detector (the simulated table's "
                             f"range), got {level!r}")
    if detector == "mosum" and not any(abs(window - h) < 1e-12 for h in mon_table.MOSUM):
        raise ValueError(f"window must be one of {sorted(mon_table.MOSUM)}, got {window!r}")
    if detector == "page" and not any(abs(gamma - g) < 1e-12 for g in mon_table.PAGE):
        raise ValueError(f"gamma must be one of {sorted(mon_table.PAGE)}, got {gamma!r}")
    if horizon is not None:
        try:
            hz_in = np.asarray(horizon, dtype=float)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"horizon must be a positive ratio (T_max - m)/m, got {horizon!r}") from exc
        if hz_in.ndim > 1 or np.any(~np.isfinite(hz_in)) or np.any(hz_in <= 0):
            raise ValueError(f"horizon must be a positive ratio (T_max - m)/m, got {horizon!r}")
    if error_model is not None and not isinstance(error_model, ErrorModel):
        raise TypeError(f"error_model must be an ErrorModel from fit_error_model, got {type(error_model).__name__}")

    yb, Xb, squeeze = _as_batch(y, X)
    M, T = yb.shape
    mb = _as_m(m, M, T)
    if detector in ("mosum", "page") and horizon is None and np.any((T - mb) / mb > mon_table.HORIZONS[-1] + 1e-12):
        raise ValueError(f"the data span a horizon beyond the simulated table ({mon_table.HORIZONS[-1]}); "
                         "pass a smaller m or a shorter series")
    if horizon is not None and np.ndim(horizon) == 1 and np.shape(horizon)[0] != M:
        raise ValueError(f"horizon must be a number or an ({M},) array, got shape {np.shape(horizon)}")
    if detector == "variance" and weights is not None:
        raise ValueError("the variance detector monitors the unweighted residuals: pass no weights")
    if reference is not None:
        if reference.w.shape != yb.shape or not np.array_equal(reference.m, mb):
            raise ValueError("reference must be the reference_fit of these y, X and m")
        fit = reference
    else:
        fit = _reference_fit(yb, Xb, mb)
    if squeeze and not bool(fit.ok[0]):
        raise InsufficientDataError("monitoring reference fit", Xb.shape[2] + 1, int(fit.nobs_reference[0]),
                                    hint="the reference rows are too few, collinear or fit exactly")
    with np.errstate(invalid="ignore"):
        z = fit.w / fit.sigma[:, None]
    if weights is not None:
        v = np.asarray(weights, dtype=float)
        if v.shape not in ((T,), (M, T)):
            raise ValueError(f"weights must have shape ({T},) or ({M}, {T}), got {v.shape}")
        v = np.broadcast_to(v, (M, T))
        v0 = np.where(np.isfinite(v), v, 0.0)
        z = z * v0
        # information time: the partial sums are a Brownian motion in sum v_t^2 (martingale CLT), so the
        # boundaries are evaluated there, whatever the scale of the weights
        mon_rows = np.arange(T)[None, :] >= mb[:, None]
        info = np.cumsum(np.where(mon_rows & np.isfinite(z), v0 * v0, 0.0), axis=1)
    S = np.cumsum(np.where(np.isfinite(z), z, 0.0), axis=1)
    det = DETECTORS[detector]
    params0: dict[str, Any] = {"detector": detector, "level": None, "horizon": horizon,
                               "m": int(mb[0]) if np.all(mb == mb[0]) else mb}
    extra: dict[str, Any] = ({"window": window} if detector == "mosum"
                             else {"gamma": gamma} if detector == "page"
                             else {"kappa": fam_table.SHIFT_KAPPA, "count": np.cumsum(
                                 (np.arange(T)[None, :] >= mb[:, None]) & np.isfinite(z), axis=1).astype(float)}
                             if detector == "shift"
                             else {"kappa": fam_table.VARIANCE_KAPPA, "z": z} if detector == "variance" else {})
    extra["extend"] = bool(extend)
    nu = _scale_dof(scale_dof, error_model, fit, Xb.shape[2])
    if nu is not None:
        params0["scale_dof"] = float(nu[0]) if squeeze else nu
    if weights is not None:
        extra["info"] = info
        params0["time"] = "information (sum of squared weights)"
    nobs = np.isfinite(fit.w).sum(axis=1)
    # first row beyond the horizon (T: the horizon covers the data), in steps or in information time
    if horizon is None:
        h_end = np.full(M, T, dtype=np.int64)
    else:
        hz_arr = _horizon_array(horizon, mb, T)
        if weights is not None and detector != "mosum":
            past = info > (hz_arr * mb)[:, None] + 1e-9
            h_end = np.where(past.any(axis=1), past.argmax(axis=1), T).astype(np.int64)
        else:
            h_end = np.minimum(mb + np.ceil(hz_arr * mb - 1e-9).astype(np.int64), T)
    bad = ~fit.ok

    def sq(a: Any) -> Any:
        a = np.asarray(a)
        if squeeze:
            return a[0].item() if a.ndim == 1 else a[0]
        return a

    return [_at_level(det, S, mb, horizon, level, {**params0, "level": level}, nu, extra, bad, nobs, h_end, fit,
                      sq, squeeze)
            for level in levels]


def _at_level(det: _Detector, S: FloatArray, mb: IntArray, horizon: Any, level: float, params: dict,
              nu: FloatArray | None, extra: dict[str, Any], bad: Any, nobs: Any, h_end: Any, fit: ReferenceFit,
              sq: Callable[[Any], Any], squeeze: bool) -> MonitorResult:
    """One level's boundary, alarms and p-values on the partial sums :func:`monitor_levels` prepared."""
    M = S.shape[0]
    path, boundary, cv, pval, cvs, params = det.run(S, mb, horizon, level, params, dof=nu, **extra)

    path = np.where(bad[:, None], np.nan, path)
    boundary = np.where(bad[:, None], np.nan, boundary)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.abs(path) / boundary
    statistic = _nanmax(ratio)
    hit = np.where(np.isfinite(ratio), ratio >= 1.0, False)
    alarm = np.where(hit.any(axis=1), hit.argmax(axis=1), -1).astype(np.int64)
    pval = np.where(bad, np.nan, np.asarray(pval, dtype=float))
    params["degenerate_models"] = int(bad.sum())
    cv_arr = np.broadcast_to(np.asarray(cv, dtype=float), (M,))
    cvs_out = {lvl: (sq(np.broadcast_to(np.asarray(v, dtype=float), (M,))) if squeeze or np.ndim(v) else v)
               for lvl, v in cvs.items()}
    return MonitorResult(
        statistic=sq(statistic), pvalue=sq(pval), critical_values=cvs_out, nobs=sq(nobs),
        null="the reference-period regression still holds over the monitored span",
        alternative="the coefficients or the error variance changed after the reference period",
        method=det.method, params=params,
        path=sq(path), boundary=sq(boundary), alarm_index=sq(alarm), critical_value=sq(cv_arr),
        reference=fit, horizon_end=sq(h_end),
    )


#: pseudo-rows of the reference-implied variance in the running scale of :func:`score_weights`. Measured
#: (invented AR(1) drivers, phi 0.5, k = 10, m = 156, horizon 0.5, 3,000 models), page effect monitor at
#: nominal 5%: 7.0% with max(13, m/4) pseudo-rows and step time, 5.5% with max(4, m/20) and step time,
#: 3.7-3.9% with max(4, m/20) and information time (the default of :func:`monitor` with weights); at a
#: Bonferroni share of 1.25%: 2.3%, 1.6-1.9%, 0.8-1.1% (Monte Carlo s.e. 0.2-0.4 points).
PRIOR_ROWS_FRACTION = 0.05
PRIOR_ROWS_MIN = 4


def score_weights(X: Any, m: Any, columns: Any) -> FloatArray:
    """Weights that turn :func:`monitor` into a monitor of single coefficients (see ``weights``).

    For each model and each requested column ``j``: the column orthogonalised on the other regressors by
    the reference-period least-squares projection, ``x~_t = x_tj - g' x_t,-j`` (``g`` from regressing
    ``x_j`` on the other columns over the reference rows), divided by its own standard error at that row,
    ``s * sqrt(1 + h_t)`` for a monitored row, where ``s^2 = sum_ref x~^2 / (m - k + 1)`` and
    ``h_t = x_t,-j' (X_ref,-j' X_ref,-j)^{-1} x_t,-j`` is the row's leverage — the variance the reference
    fit implies for that row — pooled with the running mean square of ``x~`` over the monitored rows up to
    ``t`` (the prior counting as ``max(4, m/20)`` rows: the reference fit understates the out-of-sample
    variance of an autocorrelated driver, so the running estimate should take over quickly). The weights then have mean square close to one
    over the monitored span whatever the number of regressors, how far a trend column is extrapolated or
    how the driver's own variability moves, which the boundaries of :func:`monitor` assume (an in-sample
    normalisation would understate the variance by about ``(1 + k/m) / (1 - k/m)`` and raise false
    alarms in models with many columns). Each weight uses rows up to its own only.

    Parameters
    ----------
    X : (T, k) or (M, T, k) regressors (NaN rows are left out of the reference fit).
    m : int or (M,) reference sizes.
    columns : (M, J) int array of column indices per model; -1 marks "no such column" (weights 0).

    Returns
    -------
    (M, J, T) weights; NaN where X has NaN.

    Notes
    -----
    With ``G = X_ref' X_ref`` and ``P = G^+``: ``x~ = X P e_j / P_jj`` and
    ``(X_-j' X_-j)^{-1}``, embedded with a zero row and column j, is ``P - P e_j e_j' P / P_jj``
    (Schur complement), so every driver is handled from the one inverse: the leverage of ``x_-j`` is
    ``x'Px - P_jj x~^2``.
    """
    Xb = np.asarray(X, dtype=float)
    if Xb.ndim == 2:
        Xb = Xb[None]
    M, T, k = Xb.shape
    mb = _as_m(m, M, T)
    cols = np.asarray(columns, dtype=np.int64)
    if cols.ndim == 1:
        cols = np.broadcast_to(cols, (M, cols.shape[0]))
    if cols.shape[0] != M or np.any(cols >= k):
        raise ValueError(f"columns must be (M, J) indices below k={k} (or -1), got shape {cols.shape}")
    finite = np.isfinite(Xb).all(axis=2)
    ref = (np.arange(T)[None, :] < mb[:, None]) & finite
    X0 = np.where(finite[:, :, None], Xb, 0.0)
    Xr = np.where(ref[:, :, None], X0, 0.0)
    G = np.matmul(Xr.transpose(0, 2, 1), Xr)  # matmul, not einsum: einsum's loops cost 5-10x here
    P = np.linalg.pinv(G, hermitian=True)
    safe = np.where(cols >= 0, cols, 0)
    pj = np.take_along_axis(P, safe[:, None, :], axis=2).transpose(0, 2, 1)  # (M, J, k): rows P e_j
    pjj = np.take_along_axis(np.diagonal(P, axis1=1, axis2=2), safe, axis=1)  # (M, J)
    with np.errstate(invalid="ignore", divide="ignore"):
        c = pj / pjj[:, :, None]
        xt = np.matmul(c, X0.transpose(0, 2, 1))  # (M, J, T)
        # leverage of x_-j at each row, x' B x with B = P - P e_j e_j' P / P_jj: the full row's x' P x less
        # (x' P e_j)^2 / P_jj = P_jj x~^2 (one (M, T) product for every driver, no (M, J, T, k) array)
        q = np.sum(np.matmul(X0, P) * X0, axis=2)  # (M, T)
        h = q[:, None, :] - pjj[:, :, None] * xt * xt
        n_ref = ref.sum(axis=1).astype(float)
        s2 = np.sum(np.where(ref[:, None, :], xt, 0.0) ** 2, axis=2) / np.maximum(n_ref - k + 1, 1.0)[:, None]
        monitored = ~(np.arange(T)[None, :] < mb[:, None])
        prior = s2[:, :, None] * (1.0 + h)  # out-of-sample variance implied by the reference fit
        # running mean square of x~ over the monitored rows so far, shrunk towards the prior with the
        # weight of PRIOR_ROWS pseudo-rows: adapts when the driver's own variability (or the error of the
        # extrapolated projection, e.g. of a trend under autocorrelated drivers) differs from the
        # reference's, using only rows up to t (the weights stay predictable: no look-ahead)
        sq = np.where(monitored[:, None, :] & np.isfinite(xt), xt * xt, 0.0)
        cnt = np.cumsum(monitored[:, None, :] & np.isfinite(xt), axis=2)
        p0 = np.maximum(PRIOR_ROWS_MIN, PRIOR_ROWS_FRACTION * mb)[:, None, None]
        run = (p0 * prior + np.cumsum(sq, axis=2)) / (p0 + cnt)
        var = np.where(monitored[:, None, :], run, s2[:, :, None] * np.maximum(1.0 - h, 1e-12))
        out = xt / np.sqrt(var)
    good = (cols >= 0) & np.isfinite(s2) & (s2 > 0)
    out = np.where(good[:, :, None], out, 0.0)
    return np.where(finite[:, None, :], out, np.nan)


#: the members of drift's monitor family on each stream (see :func:`family_levels`)
FAMILY_RESIDUAL = ("csw", "shift", "variance")
FAMILY_EFFECT = ("shift",)  # beside the effect detector chosen in the config
#: share (in the exponent of 1 - level) of the family's level given to the residual stream when there are
#: driver streams; they share the rest equally. The residual stream sees every change that moves the
#: forecasts (level shifts, changes along the drivers' means, variance); a driver's stream adds what the
#: residual mean does not show. Measured (invented weekly scenarios of benchmarks/bench_detection.py,
#: 100 models, a 1.3-sigma shift): median delay of the abrupt-shift monitor 13 weeks with equal shares
#: (residual members at 0.61%), 11 weeks at 1.25%; the plain single Page CUSUM at 5%: 9.
RESIDUAL_SHARE = 0.7


def family_levels(level: float, drivers: int, steps: Any, ratio: Any,
                  effect_detector: str = "page") -> tuple[float, float]:
    """Marginal levels of the members of drift's monitor family, so that the family as a whole signals
    with probability at most ``level`` within the horizon under no change.

    The family watches ``1 + drivers`` streams: the recursive residuals (members ``csw``, ``shift``,
    ``variance``) and, per driver, its score-weighted residuals (members ``effect_detector`` and
    ``shift``). It signals when any member crosses.

    - Within a stream the members see the same residuals and are strongly dependent: their level comes
      from the joint simulation in :mod:`drift.engine.tables.family` (every member at the same marginal
      level ``p`` such that the stream's family crosses with probability ``alpha_s``).
    - Across streams, ``alpha_s = 1 - (1 - level)^w_s`` with the weights ``w_s`` summing to one: the
      residual stream ``RESIDUAL_SHARE`` (1 without drivers), each driver stream an equal part of the
      rest, so that ``prod (1 - alpha_s) = 1 - level`` (Šidák 1967 with weights). The residual stream
      and a driver's score stream are uncorrelated (the driver's column is orthogonalised on the others,
      the constant included), hence asymptotically independent Gaussian processes; two drivers' streams
      are correlated through their partial correlation, and for the symmetric convex no-alarm regions of
      the Gaussian members the Gaussian correlation inequality (Royen 2014) makes independence the
      conservative case.

    Parameters
    ----------
    level : family false-alarm probability over the horizon.
    drivers : number of driver (effect) streams.
    steps : horizon in monitored steps, a number or one per model.
    ratio : horizon / reference length, a number or one per model.
    effect_detector : the detector of the effect monitors ("page", "csw" or "mosum").

    Returns
    -------
    (residual member level, effect member level): the smallest over the models given (a batch shares
    one level, which is conservative for the others), floored at the smallest tabulated level 0.001.

    References
    ----------
    Šidák, Z. (1967). Rectangular confidence regions for the means of multivariate normal distributions.
    JASA 62(318), 626-633. Royen, T. (2014). A simple proof of the Gaussian correlation conjecture
    extended to multivariate gamma distributions. Far East J. Theor. Stat. 48(2), 139-145.
    """
    if effect_detector not in ("page", "csw", "mosum"):
        raise ValueError(f"effect_detector must be 'page', 'csw' or 'mosum', got {effect_detector!r}")
    if not 0.0 < float(level) < 1.0:
        raise ValueError(f"level must be in (0, 1), got {level!r}")
    if int(drivers) < 0:
        raise ValueError(f"drivers must be >= 0, got {drivers!r}")
    w_res = RESIDUAL_SHARE if int(drivers) else 1.0
    alpha_r = 1.0 - (1.0 - float(level)) ** w_res
    alpha_e = 1.0 - (1.0 - float(level)) ** ((1.0 - w_res) / max(int(drivers), 1))
    floor = float(min(fam_table.TAIL_PROBS))
    res = float(np.min(fam_table.member_level("residual", steps, ratio, alpha_r)))
    eff = (float(np.min(fam_table.member_level(f"effect-{effect_detector}", steps, ratio, alpha_e)))
           if int(drivers) else res)
    return max(res, floor), max(eff, floor)
