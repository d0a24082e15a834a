"""``drift shock``: the manual run after a known market shock.

For each model, at the shock date: the Chow break test when enough observations follow it (more than the
number of regressors), the predictive-failure test when few do; coefficients before versus after with
intervals per driver; how the as-deployed one-step errors changed; a chart; and a verdict in plain words.
It changes no deployed model and is recorded in the runs table (kind ``shock``).
"""

from __future__ import annotations

import logging
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from drift import engine
from drift.check import _num, _prewhiten, as_of_moment
from drift.config import Config
from drift.engine.split import split_coefficients
from drift.exceptions import DriftError, InsufficientDataError
from drift.panel import build_design
from drift.verdicts import change_words, fmt_num, fmt_p, label

log = logging.getLogger(__name__)


def _moved_words(series: str, before: float, after: float) -> str:
    """``the x effect fell by about 45% (2.08 → 1.15)``; a change of sign or from a base near zero is said
    in words (``the x effect reversed sign, from 3.53 to -8.64``), never as a fall of over 100%."""
    how = change_words(before, after)
    if " from " in f" {how}":
        return f"the {series} effect {how}"
    return f"the {series} effect {how} ({fmt_num(before)} → {fmt_num(after)})"


def shock_model(cfg: Config, model: Any, obs: pd.DataFrame, when: date, moment: Any) -> dict[str, Any]:
    """Shock analysis of one model (see module docstring); raises InsufficientDataError."""
    level = cfg.check.level
    d = build_design(cfg, model, obs[obs["series"].isin(model.series)], pd.Timestamp(moment))
    y, X, _, _ = _prewhiten(model, d)
    at = int(np.searchsorted(d.periods.values, np.datetime64(pd.Timestamp(when))))
    if at <= 0 or at >= d.n:
        raise InsufficientDataError(f"shock analysis of '{model.name}' at {when}", 1, 0,
                                    f"the date must fall inside the data ({d.periods[0].date()} to "
                                    f"{d.periods[-1].date()})")
    ok = np.isfinite(y) & np.isfinite(X).all(axis=1)
    n1, n2 = int(ok[:at].sum()), int(ok[at:].sum())
    k = d.k
    tests: list[dict[str, Any]] = []
    if n2 > k and n1 > k:
        r = engine.chow(y, X, at)
        tests.append({"test": "chow", "statistic": _num(r.statistic), "pvalue": _num(r.pvalue),
                      "df": list(r.params["df"])})
    if n2 >= 1 and n1 > k:
        r = engine.predictive_failure(y, X, at)
        tests.append({"test": "predictive-failure", "statistic": _num(r.statistic), "pvalue": _num(r.pvalue),
                      "df": list(r.params["df"])})
    if not tests:
        raise InsufficientDataError(f"shock analysis of '{model.name}' at {when}", k + 1, n1,
                                    "too few observations before the date")
    main = tests[0]
    drivers: list[dict[str, Any]] = []
    cols = list(d.driver_columns.values())
    sp = None
    if cols and n2 >= 2:
        try:
            sp = split_coefficients(y, X, at, cols)
        except InsufficientDataError as exc:
            log.info("before/after coefficients of %s not available: %s", model.name, exc)
    for i, (s, j) in enumerate(d.driver_columns.items()):
        entry: dict[str, Any] = {"series": s, "lag": d.lags.get(s)}
        if sp is not None:
            entry.update(coef_before=_num(sp.before[i]), coef_after=_num(sp.after[i]),
                         ci_before=[_num(v) for v in sp.ci_before[i]], ci_after=[_num(v) for v in sp.ci_after[i]],
                         pvalue_change=_num(sp.pvalue_diff[i]))
        else:
            entry.update(coef_before=None, coef_after=None, ci_before=None, ci_after=None)
        drivers.append(entry)
    # as-deployed one-step errors before vs after (same number of periods on each side)
    rf = engine.recursive_fit(y, X)
    fe = np.asarray(rf.forecast_error)
    w = max(1, min(n2, at - d.n_ref if at > d.n_ref else n2, 52))
    before = fe[max(0, at - w):at]
    after = fe[at:at + w]
    acc = {"window": int(w),
           "mae_before": _num(np.nanmean(np.abs(before))) if np.isfinite(before).any() else None,
           "mae_after": _num(np.nanmean(np.abs(after))) if np.isfinite(after).any() else None,
           "bias_before": _num(np.nanmean(before)) if np.isfinite(before).any() else None,
           "bias_after": _num(np.nanmean(after)) if np.isfinite(after).any() else None}
    p = main["pvalue"]
    test_name = "Chow break test" if main["test"] == "chow" else "predictive-failure test"
    if p is not None and p < level:
        verdict = "refit"
        moved = []
        if sp is not None:
            # a driver's effect "moved" when the t test of its change (the interaction term) rejects at
            # the level, Bonferroni over the drivers
            n_d = max(len(d.driver_columns), 1)
            for i, s in enumerate(d.driver_columns):
                b, a = sp.before[i], sp.after[i]
                if np.isfinite(sp.pvalue_diff[i]) and sp.pvalue_diff[i] < level / n_d:
                    moved.append(_moved_words(s, b, a))
        what = "; ".join(moved) if moved else "the relationship shifted (level or several coefficients together)"
        reason = (f"{what[0].upper() + what[1:]} after the shock; {test_name} p = {fmt_p(p)} "
                  f"(F = {fmt_num(main['statistic'])}, df {main['df'][0]}, {main['df'][1]}). "
                  f"Refit on data since {when.isoformat()}")
        if n2 < 2 * k:
            reason += f" once more data have come in (only {n2} periods so far)"
        reason += "."
    else:
        verdict = "keep"
        reason = (f"No evidence that the relationship changed at {when.isoformat()} "
                  f"({test_name} p = {fmt_p(p)}, {n2} periods after the date). Keep the model.")
    return {"name": model.name, "unit": model.unit, "tests": tests, "drivers": drivers, "accuracy": acc,
            "verdict": verdict,
            "reason": reason, "nobs_before": n1, "nobs_after": n2,
            "_chart": {"periods": [p.date().isoformat() for p in d.periods], "actual": d.y,
                       "forecast": np.where(np.arange(d.n) >= d.n_ref, d.y - fe, np.nan)}}


def run_shock(cfg: Config, store: Any, when: date, *, models: list[str] | None = None,
              as_of: date | None = None, out: Path | None = None) -> dict[str, Any]:
    """Shock analysis for the chosen models; recorded as a run; JSON-ready dict."""
    from datetime import datetime, timezone

    day = as_of or datetime.now(timezone.utc).date()
    moment = as_of_moment(day)
    chosen = [cfg.model(n) for n in models] if models else list(cfg.models)
    run_id = store.start_run("shock", as_of=day, detail={"date": when.isoformat(),
                                                          "models": [m.name for m in chosen]})
    try:
        obs = store.load_observations(sorted({s for m in chosen for s in m.series}), moment)
        results, errors = [], {}
        for m in chosen:
            try:
                results.append(shock_model(cfg, m, obs, when, moment))
            except DriftError as exc:
                errors[m.name] = str(exc)
        if out is not None:
            _charts(results, when, out)
        for r in results:
            r.pop("_chart", None)
        res = {"date": when.isoformat(), "as_of": day.isoformat(), "models": results, "errors": errors}
        store.finish_run(run_id, "ok", detail={"date": when.isoformat(),
                                               "verdicts": {r["name"]: r["verdict"] for r in results}})
        return res
    except BaseException as exc:
        store.finish_run(run_id, "failed", error=f"{type(exc).__name__}: {exc}")
        raise


def _charts(results: list[dict[str, Any]], when: date, out: Path) -> None:
    from drift.delivery.charts import forecast_chart

    out.mkdir(parents=True, exist_ok=True)
    for r in results:
        ch = r["_chart"]
        png = forecast_chart(ch["periods"], ch["actual"], ch["forecast"], event=when, event_label="shock",
                             unit=r.get("unit", "units"),
                             title=f"{r['name']}: actual vs as-deployed forecast around the shock")
        path = out / f"shock-{r['name']}.png"
        path.write_bytes(png)
        r["chart"] = str(path)


def format_shock(res: dict[str, Any]) -> str:
    lines = [f"drift shock analysis at {res['date']} (data as of {res['as_of']})"]
    for r in res["models"]:
        lines.append("")
        lines.append(f"{r['name']}  →  {label(r['verdict'])}: {r['reason']}")
        for t in r["tests"]:
            lines.append(f"    {t['test']:<20} F = {fmt_num(t['statistic'])}  df {t['df']}  p = {fmt_p(t['pvalue'])}")
        for dv in r["drivers"]:
            if dv["coef_before"] is not None:
                lines.append(f"    {dv['series']:<24} before {fmt_num(dv['coef_before'])} "
                             f"[{fmt_num(dv['ci_before'][0])}, {fmt_num(dv['ci_before'][1])}]  after "
                             f"{fmt_num(dv['coef_after'])} [{fmt_num(dv['ci_after'][0])}, {fmt_num(dv['ci_after'][1])}]")
        a = r["accuracy"]
        if a["mae_before"] is not None and a["mae_after"] is not None:
            lines.append(f"    one-step MAE {fmt_num(a['mae_before'])} before → {fmt_num(a['mae_after'])} after "
                         f"({a['window']} periods each side)")
        if r.get("chart"):
            lines.append(f"    chart: {r['chart']}")
    for name, err in res["errors"].items():
        lines.append(f"\n{name}  →  NOT ANALYSED: {err}")
    lines.append("\nStatistical evidence, not certainty: the decision stays with the model's owner.")
    return "\n".join(lines)
