"""The model-agnostic path: the production system's logged forecasts as a source (``deployed.forecasts``).

Invented scenario (simulation, seeded): weekly from 2021-01-04, y = 100 + 0.05 t + 2 x1_{t-1} + 1.5 x2_{t-1}
+ N(0, 1); a black-box production system logs, at each origin (the start of week t − h + 1), its forecast of
week t and, once y is known, its error; its errors are MA(h − 1) and, from ``BIAS_FROM`` on, 3 units too low.
"""

from __future__ import annotations

from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from drift.check import run_check
from drift.cli import cli
from drift.config import load_config
from drift.deployed import _nw_mean_test, logged_forecast_errors, monitor_forecast_errors
from drift.panel import period_index
from drift.pipeline import run_ingest
from drift.store import open_store

H = 4
BIAS_FROM = "2024-09-02"

CONFIG = """\
# invented scenario (simulation), see tests/test_deployed_forecasts.py
store: sqlite:///drift.db
sources:
  - {{name: sim, kind: csv, path: data.csv, period_column: week}}
  - {{name: prod, kind: csv, path: log.csv, period_column: week, issued_column: issued, columns: [y_fc]}}
models:
  - name: sim
    target: y
    frequency: W
    preprocess: {{season: none}}
    drivers:
      - {{series: x1, lag: 1}}
      - {{series: x2, lag: 1}}
    reference: {{start: 2021-01-04, end: 2023-12-25}}
    deployed:
      forecasts: {{series: {series}, horizon: {h}}}
"""


def write(folder: Path, seed: int = 5) -> pd.DataFrame:
    """The data and the production log (with the error the production system logged); returns the log."""
    rng = np.random.default_rng(seed)
    weeks = pd.date_range("2021-01-04", "2025-12-29", freq="7D")
    n = len(weeks)
    x1, x2 = 20 + rng.normal(0, 3, n), 20 + rng.normal(0, 3, n)
    y = 100 + 0.05 * np.arange(n) + 2 * np.r_[20, x1[:-1]] + 1.5 * np.r_[20, x2[:-1]] + rng.normal(0, 1, n)
    pd.DataFrame({"week": weeks.date.astype(str), "y": y, "x1": x1, "x2": x2}).to_csv(folder / "data.csv",
                                                                                      index=False)
    shocks = rng.normal(0, 1.2, n + H)
    psi = 0.6 ** np.arange(H)
    noise = np.array([shocks[i:i + H] @ psi[::-1] for i in range(n)])
    bias = np.where(weeks >= pd.Timestamp(BIAS_FROM), 3.0, 0.0)
    f = y - noise - bias
    log = pd.DataFrame({"week": weeks.date.astype(str),
                        "issued": (weeks - pd.Timedelta(days=7 * (H - 1))).strftime("%Y-%m-%dT%H:%M:%S"),
                        "y_fc": f, "logged_error": y - f})
    log.to_csv(folder / "log.csv", index=False)
    (folder / "drift.yaml").write_text(CONFIG.format(series="y_fc", h=H), encoding="utf-8")
    return log


@pytest.fixture()
def project(tmp_path: Path) -> tuple[Path, pd.DataFrame]:
    log = write(tmp_path)
    cfg = load_config(tmp_path / "drift.yaml")
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store)
    finally:
        store.dispose()
    return tmp_path, log


def test_the_errors_are_those_the_production_system_logged(project: tuple[Path, pd.DataFrame]) -> None:
    folder, log = project
    cfg = load_config(folder / "drift.yaml")
    model = cfg.models[0]
    store = open_store(cfg.store_url())
    try:
        obs = store.load_observations(model.read_series)
    finally:
        store.dispose()
    periods = period_index(model, pd.Timestamp("2021-01-04"), pd.Timestamp("2025-12-29"))
    f, e = logged_forecast_errors(model, periods, obs)
    np.testing.assert_allclose(f, log["y_fc"].to_numpy(), rtol=0, atol=1e-9)
    np.testing.assert_allclose(e, log["logged_error"].to_numpy(), rtol=0, atol=1e-9)


def test_a_biased_production_forecast_raises_watch_after_the_change_only(project: tuple[Path, pd.DataFrame]) -> None:
    folder, log = project
    cfg = load_config(folder / "drift.yaml")
    store = open_store(cfg.store_url())
    try:
        before = run_check(cfg, store, as_of=date(2024, 8, 31), deliver=False).as_json()["models"][0]
        after = run_check(cfg, store, as_of=date(2025, 6, 30), deliver=False).as_json()["models"][0]
    finally:
        store.dispose()
    fb = before["deployed"]["forecasts"]
    assert fb["baseline"] == {"start": "2021-01-04", "end": "2023-12-25"} and fb["horizon"] == H
    assert fb["monitored"] == "every 4th period (non-overlapping 4-step errors)"
    assert [t["date"] for t in fb["monitors"]] == [None, None] and before["verdict"] == "keep"
    fa = after["deployed"]["forecasts"]
    mean_mon = next(t for t in fa["monitors"] if t["test"] == "forecast-mean")
    assert mean_mon["date"] is not None and BIAS_FROM <= mean_mon["date"] <= "2025-06-30"
    assert after["verdict"] == "watch"
    watch = next(a for a in after["actions"] if a.get("source") == "deployed-forecasts")
    assert watch["severity"] == "watch" and f"on {mean_mon['date']}" in watch["reason"]
    assert fa["bias"]["mean"] == pytest.approx(3.0, abs=0.6) and fa["bias"]["t"] > 3
    # the accuracy block scores the logged errors (one number, one place: the last 52 weeks known by then)
    known = log[pd.to_datetime(log["week"]) <= pd.Timestamp("2025-06-23")]  # its value came at 06-30 00:00
    want = known["logged_error"].to_numpy()[-52:]
    assert after["accuracy"]["model"]["mae"] == round(float(np.mean(np.abs(want))), 4)
    assert after["accuracy"]["model"]["bias"] == round(float(np.mean(want)), 4)


def test_the_bias_test_is_the_hac_t_statistic_statsmodels_computes() -> None:
    """Newey–West t of the mean against statsmodels 0.14/0.15 ``OLS(e, 1).fit(cov_type="HAC",
    cov_kwds={"maxlags": L, "use_correction": False})`` (Bartlett weights, divisor n)."""
    import statsmodels.api as sm

    rng = np.random.default_rng(11)
    e = rng.normal(0.3, 1.0, (3, 60)).cumsum(axis=1) * 0.1 + rng.normal(0, 1, (3, 60))
    e[1, :7] = np.nan  # a later start
    mean, t, _p, n = _nw_mean_test(e, 3)
    for i in range(3):
        v = e[i][np.isfinite(e[i])]
        fit = sm.OLS(v, np.ones(v.size)).fit(cov_type="HAC", cov_kwds={"maxlags": 3, "use_correction": False})
        assert mean[i] == pytest.approx(fit.params[0], rel=1e-12)
        assert t[i] == pytest.approx(fit.tvalues[0], rel=1e-9)
        assert n[i] == v.size


@pytest.mark.slow
@pytest.mark.parametrize("h", [1, 4])
def test_the_monitors_hold_their_false_alarm_rate_with_overlapping_errors(h: int) -> None:
    """Monte Carlo (seeded; invented MA(h − 1) errors with the weights of an AR(1) process's h-step errors):
    over a horizon of twice the 104-period baseline each monitor at 2.5% alarms on at most 2.5% of stable
    series, up to three Monte Carlo standard errors (the design rule of the monitoring tables)."""
    reps, m = 1500, 104
    rng = np.random.default_rng([20261203, h])
    psi = 0.6 ** np.arange(h)
    s = rng.standard_normal((reps, 3 * m + h))
    E = sum(psi[j] * s[:, h - 1 - j: h - 1 - j + 3 * m] for j in range(h))
    out = monitor_forecast_errors(E, np.zeros(reps, int), np.full(reps, m), h, level=0.025, horizon=2.0,
                                  detector="page", recent_window=52)
    rates = np.array([[r["alarm_row"] >= 0 for r in o["monitors"]] for o in out]).mean(axis=0)
    se = np.sqrt(0.025 * 0.975 / reps)
    assert np.all(rates <= 0.025 + 3 * se), rates


def test_forecast_config_errors(tmp_path: Path) -> None:
    path = tmp_path / "drift.yaml"
    path.write_text(CONFIG.format(series="y", h=1), encoding="utf-8")
    r = CliRunner().invoke(cli, ["check", "--config", str(path)])
    assert r.exit_code == 2 and "'y' is the model's target or one of its drivers" in r.stderr
    path.write_text(CONFIG.format(series="y_fc", h=1).replace("      forecasts: {series: y_fc, horizon: 1}\n",
                                                              "      epoch: 1\n"), encoding="utf-8")
    r = CliRunner().invoke(cli, ["check", "--config", str(path)])
    assert r.exit_code == 2 and "deployed needs 'coefficients'" in r.stderr
