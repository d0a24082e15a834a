"""The production model's own evidence: its coefficients replayed, its logged forecasts monitored.

Takes a model's context after screening and its ``deployed:`` block (:mod:`drift.deployed`): production
coefficients and/or the series of forecasts the production system logged. Gives the as-deployed errors
(accuracy, forecast chart and Trigg's tracking signal then describe the production model, not drift's
re-estimate), the payload's ``deployed`` block (coefficient gaps to the reference re-estimate; the logged
forecasts' baseline, bias and monitors) and a ``watch`` action when a monitor of the logged errors
crossed. The relationship monitors of :mod:`drift.checking.screening` are left as they are.
``_logged_forecasts`` runs batched over a chunk (one batch per forecast horizon); ``_deployed_replay``
per model.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from drift import engine
from drift.checking.accuracy import _accuracy, _accuracy_block
from drift.checking.context import _Ctx, _failure, _list, _num, log
from drift.engine.tables import monitoring as _mon_table
from drift.exceptions import DriftError
from drift.replay import h_step_errors
from drift.verdicts import Action, fmt_num

#: smallest per-monitor level the simulated monitoring tables cover (drift.engine.tables.monitoring)
MIN_LEVEL = min(_mon_table.TAIL_PROBS)


def _deployed_replay(c: _Ctx) -> None:
    """With production coefficients in the config (``deployed:``, :mod:`drift.deployed`): the as-deployed
    errors become those of the production model replayed with its coefficients (accuracy, forecast chart,
    Trigg's tracking signal), its coefficients become the reference of the driver figures and charts, and
    the payload's ``deployed`` block gives the gap to drift's reference-period re-estimate. The monitors
    are left as they are (they test the relationship on drift's own recursive fit)."""
    m, d, chk = c.model, c.design, c.cfg.check
    if m.deployed is None:
        return
    from drift.deployed import as_deployed_errors, coefficient_vector

    b = coefficient_vector(m, m.deployed.epoch, d)
    logged = c.charts.pop("_logged", None)
    if b is None and logged is None:
        return
    mon = np.arange(d.n) >= d.n_ref
    if logged is not None:  # the production system's own forecasts: their errors are the as-deployed ones
        e = logged["errors"]
        _logged_evidence(c, logged)
        if logged["baseline"] is not None:
            mon = np.arange(d.n) >= logged["baseline"][1]
    else:
        e = as_deployed_errors(m, d.y, d.X, b)
    if "forecast" in c.charts:
        c.charts["forecast"]["forecast"] = _list(np.where(mon, d.y - e, np.nan))
    h_step = c.accuracy.get("h_step")
    c.accuracy = _accuracy_block(d, e, mon, chk.recent_window)
    if h_step is not None:
        c.accuracy["h_step"] = h_step
    ref_scale = (c.accuracy["scale"] or {}).get("mae")
    if m.horizon > 1 and b is not None and logged is None:
        eh = h_step_errors(c.cfg, m, c.obs, c.as_of, d, np.tile(b, (d.n, 1)), m.horizon)
        c.accuracy["h_step"] = {"horizon": m.horizon,
                                **_accuracy(np.where(mon, eh, np.nan)[-chk.recent_window:], ref_scale)}
    if b is None:
        return
    # Trigg's tracking signal of the production model's errors (replacing that of the re-estimate)
    ref_abs = np.abs(e[: d.n_ref])
    ref_abs = ref_abs[np.isfinite(ref_abs)]
    fe_mon = np.where(mon, e, np.nan)
    if logged is None:
        c.tests = [t for t in c.tests if t.get("test") != "tracking-trigg"]
    if logged is None and ref_abs.size and ref_abs.mean() > 0 and np.isfinite(fe_mon).sum() >= 2:
        try:
            tr = engine.trigg_signal(fe_mon[None], 0.1, level=0.01, mad0=np.array([ref_abs.mean()]))
            sig = np.atleast_2d(tr.signal)[0]
            last_i = np.flatnonzero(np.isfinite(sig))
            fs = int(np.atleast_1d(tr.standing_since())[0])
            if last_i.size:
                c.tests.append({"test": "tracking-trigg", "statistic": _num(round(float(sig[last_i[-1]]), 4)),
                                "pvalue": None, "threshold": _num(tr.limit), "level": 0.01,
                                "date": d.periods[fs].date().isoformat() if fs >= 0 else None})
        except (DriftError, ValueError) as exc:
            log.info("model %s: tracking signal of the deployed errors skipped: %s", m.name, exc)
    # the gap between the production coefficients and drift's reference-period re-estimate
    ref_coef = np.asarray(c.charts.get("_ref_coef"), float)
    ok = np.isfinite(c.y[: d.n_ref]) & np.isfinite(c.X[: d.n_ref]).all(axis=1)
    Xr = c.X[: d.n_ref][ok]
    resid = c.y[: d.n_ref][ok] - Xr @ ref_coef
    dof = max(int(ok.sum()) - d.k, 1)
    se = np.sqrt(np.maximum(np.diag(float(resid @ resid) / dof * np.linalg.pinv(Xr.T @ Xr)), 0.0))
    by_col = {j: s for s, j in d.driver_columns.items()}
    rows = []
    for j, col in enumerate(d.columns):
        gap = float(b[j] - ref_coef[j])
        rows.append({"term": by_col.get(j, col), "column": col, "deployed": _num(round(float(b[j]), 6)),
                     "reestimated": _num(round(float(ref_coef[j]), 6)), "se": _num(round(float(se[j]), 6)),
                     "gap": _num(round(gap, 6)), "z": _num(round(gap / se[j], 3)) if se[j] > 0 else None})
    errs = m.deployed.errors
    c.deployed.update({"epoch": m.deployed.epoch, "coefficients": rows,
                       "errors": {"ar": list(errs.ar), "ma": list(errs.ma)} if errs is not None else None,
                       "reestimated_on": {"start": d.periods[0].date().isoformat(),
                                          "end": d.periods[d.n_ref - 1].date().isoformat()}})
    c.charts["_ref_coef"] = b
    for s, j in d.driver_columns.items():
        if s in c.charts.get("coefficients", {}):
            c.charts["coefficients"][s]["reference"] = _num(b[j])


def _logged_forecasts(ctxs: list[_Ctx], errors: dict[str, str]) -> None:
    """The production system's logged forecasts (``deployed.forecasts``): their errors and the batched
    monitors of :mod:`drift.deployed` (one batch per forecast horizon); results in ``charts['_logged']``.
    A batch that fails is run model by model, so a failure stays the failing model's."""
    from drift.deployed import baseline_rows, forecast_horizon, logged_forecast_errors

    groups: dict[int, list[tuple[_Ctx, np.ndarray, tuple[int, int] | None]]] = {}
    for c in ctxs:
        try:
            f, e = logged_forecast_errors(c.model, c.design.periods, c.obs)  # type: ignore[misc]
            h = forecast_horizon(c.model)
            base = baseline_rows(e, c.design.n_ref, c.cfg.check.recent_window, h)
            c.charts["_logged"] = {"forecast": f, "errors": e, "baseline": base, "horizon": h, "stats": None}
            if base is not None:
                groups.setdefault(h, []).append((c, e, base))
        except Exception as exc:  # noqa: BLE001 - a failure is the model's own entry
            errors[c.model.name] = _failure(c.model.name, "reading its logged forecasts", exc)
    for h, items in groups.items():
        _logged_batch(h, items, errors)


def _horizon_ratio(items: list[tuple[_Ctx, np.ndarray, tuple[int, int]]]) -> float:
    """check.horizon as a multiple of the reference length for a batch (the largest of its models, within
    the simulated tables' 6)."""
    return min(max(c.horizon_n / c.design.n_ref for c, _e, _b in items), float(_mon_table.HORIZONS[-1]))


def _logged_batch(h: int, items: list[tuple[_Ctx, np.ndarray, tuple[int, int]]], errors: dict[str, str]) -> None:
    from drift.deployed import monitor_forecast_errors

    chk = items[0][0].cfg.check
    T = max(len(e) for _, e, _ in items)
    E = np.full((len(items), T), np.nan)
    first = np.zeros(len(items), int)
    m = np.zeros(len(items), int)
    off = np.zeros(len(items), int)
    for i, (_c, e, (f0, m0)) in enumerate(items):
        off[i] = T - len(e)
        E[i, off[i]:] = e
        first[i], m[i] = f0 + off[i], m0 + off[i]
    try:
        stats_ = monitor_forecast_errors(E, first, m, h, level=max(chk.level / 2, MIN_LEVEL), horizon=_horizon_ratio(items),
                                         detector=chk.monitor_detector, recent_window=chk.recent_window, grid=off)
    except Exception as exc:  # noqa: BLE001 - isolated below
        if len(items) == 1:
            errors[items[0][0].model.name] = _failure(items[0][0].model.name, "monitoring its logged forecasts", exc)
            return
        for it in items:
            _logged_batch(h, [it], errors)
        return
    for i, (c, _e, _b) in enumerate(items):
        st = stats_[i]
        st["offset"] = int(off[i])
        c.charts["_logged"]["stats"] = st


def _logged_evidence(c: _Ctx, logged: dict[str, Any]) -> None:
    """The logged forecasts' statistics into the payload: the ``deployed.forecasts`` block, their tests,
    and ``watch`` when a monitor of their mean or scale crossed its boundary."""
    from drift.deployed import MIN_BASELINE

    d, m = c.design, c.model
    st = logged.get("stats")
    c.deployed["epoch"] = m.deployed.epoch  # type: ignore[union-attr]
    fcfg = m.deployed.forecasts  # type: ignore[union-attr]
    e = logged["errors"]
    block: dict[str, Any] = {"series": fcfg.series, "horizon": logged["horizon"],  # type: ignore[union-attr]
                             "logged": int(np.isfinite(e).sum())}
    base = logged["baseline"]
    if base is None or st is None:
        block["note"] = (f"too few logged forecasts of '{fcfg.series}' for a baseline (at least "  # type: ignore[union-attr]
                         f"{MIN_BASELINE} non-overlapping ones, every {logged['horizon']} periods, in the "
                         "reference period or in the first periods logged, and a period after them); no "
                         "monitoring yet")
        c.deployed["forecasts"] = block
        return
    o = st["offset"]

    def day(row: int) -> str | None:
        return d.periods[row - o].date().isoformat() if row >= 0 else None

    block["baseline"] = {"start": d.periods[base[0]].date().isoformat(),
                         "end": d.periods[base[1] - 1].date().isoformat()}
    block["monitor_start"] = d.periods[base[1]].date().isoformat() if base[1] < d.n else None
    block["monitored"] = st["used"]
    block["baseline_mean"] = _num(round(st["baseline_mean"], 6))
    bias = st["bias"]
    block["bias"] = {"mean": _num(None if bias["mean"] is None else round(bias["mean"], 6)),
                     "t": _num(None if bias["t"] is None else round(bias["t"], 4)),
                     "pvalue": _num(bias["pvalue"]), "n": bias["n"], "lags": bias["lags"]}
    tests = []
    for r in st.get("monitors", []):
        entry = {"test": r["test"], "statistic": _num(round(r["statistic"], 4)), "pvalue": _num(r["pvalue"]),
                 "threshold": 1.0, "level": r["level"], "date": day(r["alarm_row"])}
        tests.append(entry)
        c.tests.append(dict(entry))
        if r["alarm_row"] >= 0:
            c.alarms.append({"test": r["test"], "date": entry["date"], "statistic": _num(round(r["statistic"], 4)),
                             "threshold": 1.0, "level": r["level"]})
    block["monitors"] = tests
    tr = st.get("tracking")
    c.tests = [t for t in c.tests if t.get("test") != "tracking-trigg"]
    if tr is not None and tr["statistic"] is not None:
        c.tests.append({"test": "tracking-trigg", "statistic": _num(round(tr["statistic"], 4)), "pvalue": None,
                        "threshold": _num(tr["limit"]), "level": tr["level"], "date": day(tr["first_row"])})
    c.deployed["forecasts"] = block
    crossed = [t for t in tests if t["date"]]
    if crossed:
        first = min(crossed, key=lambda t: t["date"])
        what = "mean" if first["test"] == "forecast-mean" else "spread"
        b = block["bias"]
        bias_txt = (f"; over the last {b['n']} periods their mean error is {fmt_num(b['mean'])} {m.unit} "
                    f"(t = {fmt_num(b['t'])}, allowing for the {logged['horizon'] - 1}-period overlap of "
                    f"{logged['horizon']}-step errors)") if b["mean"] is not None and b["t"] is not None else ""
        c.actions.append(Action("watch", severity="watch", extra={"source": "deployed-forecasts"}, reason=(
            f"The production forecasts ('{fcfg.series}') went off: the monitor of their error {what} crossed its "  # type: ignore[union-attr]
            f"boundary on {first['date']} (false-alarm rate {first['level']:.1%} over the monitoring horizon)"
            f"{bias_txt}. The relationship monitors say whether and why to refit.")))
