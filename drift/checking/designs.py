"""Designs: a model's observations → its as-of design, prewhitened and validated.

Takes the config, a model and the observations known at the check's moment; gives the model's context
(``_Ctx``) with the design (:func:`drift.panel.build_design`), the design filtered by the model's error
model (``errors: ar(p)/arma``), the monitoring horizon in periods, or raises a ``DriftError`` that says
why this model's data cannot be checked (missing series, values beyond what can be computed with, too
few reference rows, a constant target, collinear regressors), before it is batched with others.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterator, Mapping, Sequence
from datetime import date, datetime, timedelta

import numpy as np
import pandas as pd

from drift import engine
from drift.checking.context import _Ctx, log
from drift.config import MAX_ABS_VALUE, Config, ModelConfig
from drift.engine.tables import family as _fam_table
from drift.engine.tables import monitoring as _mon_table
from drift.exceptions import DriftError, InsufficientDataError
from drift.panel import Design, SeriesVintages, Vintages, as_ns, build_design, build_designs, shift_periods
from drift.verdicts import fmt_num


def prepare_model(cfg: Config, model: ModelConfig, obs: pd.DataFrame, as_of: datetime) -> _Ctx:
    """The model's design as the check builds it at ``as_of`` (prewhitened and validated), for the
    commands that fit proposals on it (:mod:`drift.refit`).

    Raises
    ------
    DriftError : the model cannot be checked with these data (the reason says why).
    """
    return _prepare(cfg, model, SeriesFrames(obs, [model]), as_of, (as_of - timedelta(microseconds=1)).date())


class SeriesFrames(Mapping[str, pd.DataFrame]):
    """A chunk's observations by series, converted once for the as-of selection of every model's design
    (:class:`drift.panel.SeriesVintages`): series name -> that series' rows (a frame, made when asked for),
    and :meth:`model_frame`, one model's rows in one take."""

    def __init__(self, obs: pd.DataFrame, models: Sequence[ModelConfig] = ()) -> None:
        self.obs = obs
        self._models = list(models)
        self._designs: dict[str, tuple[ModelConfig, Design]] = {}
        self._designs_at: datetime | None = None
        self._valid: set[str] = set()
        self._spans: dict[tuple[str, ...], tuple[int, int]] = {}
        self.groups: dict[str, pd.DataFrame] | None = None  # the frames by series, when not converted
        try:
            self.vintages = SeriesVintages(obs)
        except Exception as exc:  # noqa: BLE001 - columns that cannot be converted: each model says so alone
            log.debug("the chunk's observations cannot be converted at once (%s: %s)", type(exc).__name__, exc)
            self.groups = {str(k): g for k, g in obs.groupby("series", sort=False, observed=True)}
            return
        # the frames of the models to come, made in one take and handed out as slices of it
        spans: dict[tuple[str, ...], tuple[int, int]] = {}
        parts: list[np.ndarray] = []
        at = 0
        for m in models:
            names = tuple(self.model_series(m))
            if names in spans or not all(s in self.vintages for s in names):
                continue
            rows = [self.vintages.rows(s) for s in names]
            n = sum(len(r) for r in rows)
            spans[names] = (at, at + n)
            parts += rows
            at += n
        self._spans = spans
        self._parts = parts
        self._frames_made: pd.DataFrame | None = None

    def design(self, cfg: Config, m: ModelConfig, as_of: datetime) -> Design | None:
        """The model's one-step design at ``as_of`` from the designs of the chunk's models, built together
        on the first call (:func:`drift.panel.build_designs`); None when that left it out."""
        if self._designs_at != as_of:
            try:
                built = build_designs(cfg, self._models, self.vintages, pd.Timestamp(as_of))
            except Exception as exc:  # noqa: BLE001 - each model's own build_design then says what fails
                log.debug("building the chunk's designs together failed (%s: %s); building them one by one",
                          type(exc).__name__, exc)
                built = {}
            self._designs = {m.name: (m, built[m.name]) for m in self._models if m.name in built}
            self._designs_at = as_of
            plain = [d for m, d in self._designs.values() if m.error_order == (0, 0)]
            try:
                self._valid = {d.model for d, ok in zip(plain, _surely_valid(plain)) if ok}
            except Exception as exc:  # noqa: BLE001 - each model is then validated on its own
                log.debug("validating the chunk's designs together failed (%s: %s)", type(exc).__name__, exc)
                self._valid = set()
        got = self._designs.get(m.name)
        return got[1] if got is not None and got[0] is m else None

    def surely_valid(self, m: ModelConfig, d: Design) -> bool:
        """Whether the chunk's check of its designs found this design, used as built (no error model),
        clear of every problem :func:`_validate` looks for (:func:`_surely_valid`)."""
        got = self._designs.get(m.name)
        return got is not None and got[0] is m and got[1] is d and d.model in self._valid

    def model_series(self, m: ModelConfig) -> list[str]:
        """The series of a model's frame: its own, then its logged forecasts when the chunk has them."""
        names = list(dict.fromkeys(m.series))
        if m.forecast_series is not None and m.forecast_series in self.vintages:
            names.append(m.forecast_series)
        return names

    def __getitem__(self, name: str) -> pd.DataFrame:
        if self.groups is not None:
            return self.groups[name]
        return self.obs.iloc[self.vintages.rows(name)]

    def __contains__(self, name: object) -> bool:
        return name in (self.groups if self.groups is not None else self.vintages)

    def __iter__(self) -> Iterator[str]:
        return iter(self.groups if self.groups is not None else self.vintages)

    def __len__(self) -> int:
        return len(self.groups if self.groups is not None else self.vintages)

    @property
    def _frames(self) -> pd.DataFrame:
        """The frames of the chunk's models end to end (made in one take on first use)."""
        if self._frames_made is None:
            obs = self.obs
            self._frames_made = obs.take(np.concatenate(self._parts)) if self._parts else obs.iloc[0:0]
            self._parts = []
        return self._frames_made

    def model_frame(self, names: list[str]) -> pd.DataFrame:
        """The rows of these series, series after series (stored order within each), index 0..n-1: the
        frame ``pd.concat([self[s] for s in names], ignore_index=True)`` would give."""
        span = self._spans.get(tuple(names))
        if span is None:
            return self.obs.take(np.concatenate([self.vintages.rows(s) for s in names])).reset_index(drop=True)
        out = self._frames.iloc[span[0]:span[1]]
        out.index = pd.RangeIndex(span[1] - span[0])
        return out

    def model_vintages(self, names: list[str]) -> dict[str, Vintages]:
        """Series -> :class:`Vintages` of :meth:`model_frame` (a series named twice has its rows twice)."""
        out: dict[str, Vintages] = {}
        for s in dict.fromkeys(names):
            v = self.vintages[s]
            times = names.count(s)
            out[s] = v if times == 1 else v.take(np.tile(np.arange(len(v)), times))
        return out


def _prepare(cfg: Config, m: ModelConfig, by_series: Mapping[str, pd.DataFrame], as_of: datetime,
             day: date) -> _Ctx:
    """The model's design, prewhitened and validated (:func:`_validate`). ``by_series``: the observations
    by series, best a :class:`SeriesFrames` (the arrays of the as-of selection are then made once per chunk).

    Raises
    ------
    DriftError : the model cannot be checked with these data; the message says why and what to do.
    """
    absent = [s for s in dict.fromkeys(m.series) if s not in by_series]
    which = ", ".join(repr(a) for a in absent)
    if absent and len(absent) == len(set(m.series)):
        raise DriftError(
            f"model '{m.name}': none of its series ({which}) has a value available by the end of "
            f"{day.isoformat()} (UTC): the check date is before the data, or the series were never "
            "ingested (drift ingest reports what it stored)")
    if m.reference.end > day:
        raise DriftError(
            f"model '{m.name}': its reference period ends {m.reference.end.isoformat()}, after the check date "
            f"{day.isoformat()}: the deployed model cannot have been fitted on it yet; set reference.end to "
            "the last period the deployed model was fitted on, or check as of a later date")
    if absent:
        raise DriftError(
            f"model '{m.name}': no observations of {which} are in the store as of {day.isoformat()}; "
            "check the source and the series names (drift ingest reports what it stored)")
    vint: Mapping[str, Vintages]
    if isinstance(by_series, SeriesFrames) and by_series.groups is None:
        names = by_series.model_series(m)
        mobs: pd.DataFrame | Callable[[], pd.DataFrame] = functools.partial(by_series.model_frame, names)
        vint = by_series.model_vintages(names)
        built = by_series.design(cfg, m, as_of)
        d = built if built is not None else build_design(cfg, m, vint, pd.Timestamp(as_of))
    else:
        extra = [m.forecast_series] if m.forecast_series in by_series else []  # logged forecasts
        mobs = pd.concat([by_series[s] for s in [*dict.fromkeys(m.series), *extra]], ignore_index=True)
        vint = SeriesVintages(mobs)  # raises for this model alone what cannot be converted
        d = build_design(cfg, m, vint, pd.Timestamp(as_of))
    c = _Ctx(cfg=cfg, model=m, design=d, as_of=as_of, obs_source=mobs, vintages=vint)
    c.y, c.X, c.error_model, c.scale_logvar = _prewhiten(m, d)
    c.n_ref_ok = int(np.sum(np.isfinite(c.y[: d.n_ref]) & np.isfinite(c.X[: d.n_ref]).all(axis=1)))
    c.horizon_n = _horizon_periods(cfg, m, d.n_ref)
    if not (isinstance(by_series, SeriesFrames) and c.y is d.y and by_series.surely_valid(m, d)):
        _validate(c)
    return c


def _published_too_late(c: _Ctx) -> str:
    """Why a lagged driver's reference rows are empty when its values are stored: they were first available
    only after the forecasts they feed were made (a source's ``available_column`` later than the lag
    allows). Says how many, with one example; empty when no such value is found."""
    d, m = c.design, c.model
    if c.vintages is None:
        return ""
    notes = []
    for dr in m.drivers:
        s = dr.series
        v = c.vintages.get(s)
        if dr.form != "lagged" or s not in d.driver_columns or v is None or len(v) == 0:
            continue
        miss = np.flatnonzero(~np.isfinite(d.X[: d.n_ref, d.driver_columns[s]]))
        if miss.size == 0:
            continue
        lag = d.lags.get(s, dr.lag)
        want = as_ns(shift_periods(d.periods[miss], m.frequency, lag))
        stored = np.isin(want, v.period)
        if not stored.any():
            continue
        k, p_ns = int(miss[stored][0]), int(want[stored][0])
        first = pd.Timestamp(int(v.available[v.period == p_ns].min()), tz="UTC")
        notes.append(
            f"{int(stored.sum())} of the {miss.size} missing values of '{s}' are stored but were first available "
            f"only after the forecast they feed was made (its value for the period starting "
            f"{pd.Timestamp(p_ns).date().isoformat()} was available from {first.strftime('%Y-%m-%d %H:%M')} UTC; "
            f"the forecast of {d.periods[k].date().isoformat()} is made at its start): at lag {lag} the model "
            f"never sees them; lengthen the lag (and give the driver its publication delay), or check the "
            f"source's available times")
    return (". " + "; ".join(notes)) if notes else ""


def _prewhiten(model: ModelConfig, d: Design) -> tuple[np.ndarray, np.ndarray, str | None, float]:
    """Filter y and X by the error model estimated on the reference period (``errors: ar(p)/arma``).

    Returns the filtered (y, X), a description of the error model and the extra variance its estimation
    adds to the log of the monitoring scale (see :meth:`drift.engine.arma.ErrorModel.log_scale_variance`).
    The AR(1) estimate is bias-corrected for the model's own regressors (trend and season bias it down).
    """
    p, q = model.error_order
    if p == 0 and q == 0:
        return d.y, d.X, None, 0.0
    ref = slice(0, d.n_ref)
    ok = np.isfinite(d.y[ref]) & np.isfinite(d.X[ref]).all(axis=1)
    if ok.sum() <= d.k + p + q + 2:
        raise InsufficientDataError(f"model '{model.name}': error model {model.errors}", d.k + p + q + 3,
                                    int(ok.sum()))
    b, *_ = np.linalg.lstsq(d.X[ref][ok], d.y[ref][ok], rcond=None)
    resid = np.where(ok, d.y[ref] - np.where(ok[:, None], d.X[ref], 0.0) @ b, np.nan)
    em = engine.fit_error_model(resid, model.errors, X=d.X[ref])
    yt, Xt = engine.prewhiten(d.y, d.X, em)
    extra = float(np.atleast_1d(em.log_scale_variance())[0])
    par = em.params()
    desc = model.errors + " with " + ", ".join(
        f"{n}{i + 1} = {v:.2f}" for n, arr in (("phi", par["ar"]), ("theta", par["ma"])) for i, v in
        enumerate(np.atleast_1d(arr)))
    return np.asarray(yt, float), np.asarray(Xt, float), desc, extra if np.isfinite(extra) else 0.0


def _horizon_periods(cfg: Config, m: ModelConfig, n_ref: int) -> int:
    """``check.horizon`` in the model's periods, capped at what the simulated tables cover (6 times the
    reference length and 1,040 periods); a capped horizon is said wherever the horizon is quoted
    (:func:`_horizon_words`)."""
    n = cfg.check.horizon_periods(m.frequency, n_ref)
    return min(n, _horizon_limit(n_ref))


def _horizon_limit(n_ref: int) -> int:
    return max(1, min(int(_mon_table.HORIZONS[-1] * n_ref), int(_fam_table.N_GRID[-1])))


#: smallest size of a series drift computes with: a target or driver whose values on the usable reference
#: rows are all below this in size (but not all zero) is out of scale the other way from
#: :data:`~drift.config.MAX_ABS_VALUE`: squares of values below ~1.5e-154 underflow to 0 in double
#: precision, so least squares would see an all-zero column (common practice, no source)
MIN_SCALE = 1e-100


#: a column whose part orthogonal to the columns before it is below this fraction of its own size (on the
#: usable reference rows) is taken as collinear with them: least squares in double precision cannot
#: separate their effects (condition number beyond ~1e7; common practice, no source)
COLLINEAR_RTOL = 1e-7


def _validate(c: _Ctx) -> None:
    """Data problems of one model, found before it is batched with others.

    Raises
    ------
    InsufficientDataError : fewer usable reference rows than the fit needs (regressors + 3); the hint
        says which series leave rows unusable.
    DriftError : a value too large to compute with (named with its period), a constant target, or
        collinear regressors on the reference rows (named, with the linear relation between them).
    """
    d, m = c.design, c.model
    with np.errstate(invalid="ignore"):
        huge_y = np.flatnonzero(np.abs(d.y) > MAX_ABS_VALUE)
        huge_x = np.argwhere(np.abs(d.X) > MAX_ABS_VALUE)
    if huge_y.size or huge_x.size:
        if huge_y.size:
            t = int(huge_y[0])
            what = (f"the target '{m.target}' has the value {float(d.y[t]):.6g} for the period starting "
                    f"{d.periods[t].date().isoformat()}")
        else:
            t, j = (int(i) for i in huge_x[0])
            what = f"{d.columns[j]} has the value {float(d.X[t, j]):.6g} in the row of {d.periods[t].date().isoformat()}"
            for s, col in d.driver_columns.items():
                if col == j:
                    lag = d.lags.get(s, 0)
                    when = shift_periods(d.periods[t:t + 1], m.frequency, lag)[0]
                    what = (f"the driver '{s}' has the value {float(d.X[t, j]):.6g} for the period starting "
                            f"{when.date().isoformat()}")
        raise DriftError(f"model '{m.name}': {what}: beyond {MAX_ABS_VALUE:.0e} in size, too large to compute "
                         "with (its squares overflow); check the source")
    ref = slice(0, d.n_ref)
    ok = np.isfinite(c.y[ref]) & np.isfinite(c.X[ref]).all(axis=1)
    _check_scale(c, ok)
    need = d.k + 3
    if c.n_ref_ok < need:
        raw_ok = {"target " + repr(m.target): np.isfinite(d.y[ref])}
        raw_ok.update({d.columns[j]: np.isfinite(d.X[ref, j]) for j in range(d.k)})
        gaps = sorted(((int((~v).sum()), name) for name, v in raw_ok.items() if (~v).any()), reverse=True)
        where = ("; rows without a value: " + ", ".join(f"{name} {n}" for n, name in gaps[:4])) if gaps else ""
        raise InsufficientDataError(
            f"model '{m.name}': reference fit ({m.reference.start.isoformat()} to {m.reference.end.isoformat()}, "
            f"{d.n_ref} periods)", need, c.n_ref_ok,
            f"{d.k} regressors ({', '.join(d.columns)}){where}{_published_too_late(c)}")
    y_ok = d.y[ref][np.isfinite(d.y[ref])]
    if y_ok.size and np.ptp(y_ok) == 0:
        raise DriftError(
            f"model '{m.name}': the target '{m.target}' is constant ({fmt_num(float(y_ok[0]))}) over the "
            f"reference period: there is no variation for its drivers to explain; check the source")
    Xr = d.X[ref][ok]
    norms = np.linalg.norm(Xr, axis=0)
    zero = [d.columns[j] for j in range(d.k) if norms[j] == 0]
    if zero:
        raise DriftError(
            f"model '{m.name}': the column(s) {', '.join(zero)} are zero on every usable reference row: their "
            "effect cannot be estimated; check the driver's series and lag")
    r = np.abs(np.diag(np.linalg.qr(Xr / norms, mode="r")))
    dep = np.flatnonzero(r < COLLINEAR_RTOL)
    if dep.size:
        j = int(dep[0])
        indep = [i for i in range(j) if i not in set(dep.tolist())]
        b, *_ = np.linalg.lstsq(Xr[:, indep], Xr[:, j], rcond=None)
        terms = [f"{fmt_num(float(bi))} × {d.columns[i]}" for i, bi in zip(indep, b)
                 if abs(bi) * norms[i] > 1e-6 * norms[j]]
        raise DriftError(
            f"model '{m.name}': the regressors are collinear on the {int(ok.sum())} usable reference rows: "
            f"{d.columns[j]} = {' + '.join(terms) or '0'}; their effects cannot be told apart. Drop one of "
            "these drivers (or change its lag), or check the source")


def _surely_valid(designs: Sequence[Design]) -> list[bool]:
    """For designs used as built (no error model): True where :func:`_validate` certainly finds nothing,
    computed for designs of one shape together. The checks are those of :func:`_validate` on the same
    values, the collinearity one with a margin (the stacked QR of the reference rows, unusable rows
    zeroed, differs from :func:`_validate`'s in rounding only): a design it cannot clear is simply
    validated on its own."""
    out = [False] * len(designs)
    groups: dict[tuple[int, int, int, tuple[int, ...]], list[int]] = {}
    for i, d in enumerate(designs):
        groups.setdefault((d.n, d.n_ref, d.k, tuple(d.driver_columns.values())), []).append(i)
    for (_, n_ref, k, drivers), idx in groups.items():
        Y = np.stack([designs[i].y for i in idx])
        X = np.stack([designs[i].X for i in idx])
        with np.errstate(invalid="ignore", divide="ignore", over="ignore", under="ignore"):
            fine = ~((np.abs(Y) > MAX_ABS_VALUE).any(axis=1) | (np.abs(X) > MAX_ABS_VALUE).any(axis=(1, 2)))
            yr, Xr = Y[:, :n_ref], X[:, :n_ref]
            ok = np.isfinite(yr) & np.isfinite(Xr).all(axis=2)
            fine &= ok.sum(axis=1) >= k + 3
            for v in (yr, *(Xr[:, :, j] for j in drivers)):
                top = np.where(ok, np.abs(v), 0.0).max(axis=1)
                fine &= ~((top > 0) & (top < MIN_SCALE))
            fin = np.isfinite(yr)
            fine &= np.where(fin, yr, -np.inf).max(axis=1) > np.where(fin, yr, np.inf).min(axis=1)
            Xz = np.where(ok[:, :, None], Xr, 0.0)
            norms = np.sqrt(np.sum(Xz * Xz, axis=1))
            fine &= (norms > 0).all(axis=1)
            r = np.abs(np.diagonal(np.linalg.qr(Xz / np.where(norms > 0, norms, 1.0)[:, None, :], mode="r"),
                                   axis1=1, axis2=2))
            fine &= (r >= 10.0 * COLLINEAR_RTOL).all(axis=1)
        for i, f in zip(idx, fine.tolist()):
            out[i] = bool(f)
    return out


def _check_scale(c: _Ctx, ok: np.ndarray) -> None:
    """DriftError when the target or a driver is, on the usable reference rows, not all zero but nowhere as
    large as :data:`MIN_SCALE` (its squares underflow: the fit would read it as zero)."""
    d, m = c.design, c.model
    named = [(f"the target '{m.target}'", d.y[: d.n_ref][ok])]
    named += [(f"the driver '{s}'", d.X[: d.n_ref, j][ok]) for s, j in d.driver_columns.items()]
    for what, v in named:
        if not v.size:
            continue
        top = float(np.max(np.abs(v)))
        if 0 < top < MIN_SCALE:
            raise DriftError(
                f"model '{m.name}': {what} is too small in scale to compute with: its largest value on the "
                f"usable reference rows is {top:.3g} in size, below {MIN_SCALE:.0e} (squares of such values "
                "underflow to 0); rescale the series (another unit) or check the source")
