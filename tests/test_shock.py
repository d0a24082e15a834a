"""``drift shock``: known-date break tests on seeded simulations (invented scenarios, tests/check_scenarios.py).

The F statistics themselves are checked against published values in tests/engine/test_breaks.py; here:
power at a real break, size on no-change scenarios, before/after coefficients, and the run record.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from drift.check import as_of_moment
from drift.ingest import ingest_all
from drift.shock import format_shock, run_shock, shock_model
from tests.check_scenarios import (
    N_REF,
    Scenario,
    config,
    end_moment,
    known_by,
    observations,
    simulate,
    write_csv,
)


def _shock(cfg, sc: Scenario, at_row: int) -> dict:
    periods, values = simulate(sc)
    moment = end_moment(periods)
    obs = known_by(observations(periods, values), moment)
    return shock_model(cfg, cfg.models[0], obs, periods[at_row].date(), moment)


def test_break_at_the_shock_date_chow(tmp_path):
    # invented scenario (simulation): x1 effect 2.0 -> 1.0 at the shock date, 26 weeks follow (> k = 10)
    cfg = config(tmp_path)
    at = N_REF + 26
    r = _shock(cfg, Scenario(seed=800, n_mon=52, b1_after=1.0, change_at=at), at)
    assert r["tests"][0]["test"] == "chow"
    assert r["tests"][0]["pvalue"] < 0.01
    assert r["tests"][0]["df"] == [10, N_REF + 52 - 1 - 20]  # k, n - 2k (row 0 has no lagged driver)
    assert r["verdict"] == "refit" and "x1 effect" in r["reason"]
    assert r["nobs_after"] == 26


def test_break_with_few_periods_after_uses_predictive_failure(tmp_path):
    # invented scenario (simulation): the same break, only 4 weeks of data after it (< k = 10)
    cfg = config(tmp_path)
    at = N_REF + 26
    r = _shock(cfg, Scenario(seed=801, n_mon=30, b1_after=1.0, change_at=at), at)
    assert [t["test"] for t in r["tests"]] == ["predictive-failure"]
    assert r["tests"][0]["pvalue"] < 0.01
    assert r["tests"][0]["df"][0] == 4
    assert r["verdict"] == "refit" and "once more data have come in" in r["reason"]


@pytest.mark.slow
@pytest.mark.parametrize("n_after", [26, 4])
def test_no_change_rejects_at_the_nominal_rate(tmp_path, n_after):
    # invented scenario (simulation): 200 stable models; iid normal errors make Chow / predictive failure
    # exact F tests, so the rejection count at 5% must fall in the binomial(200, 0.05) 99% interval
    cfg = config(tmp_path)
    at = N_REF + 26
    n = 200
    rejections = 0
    for seed in range(n):
        r = _shock(cfg, Scenario(seed=10_000 + seed, n_mon=26 + n_after), at)
        rejections += r["tests"][0]["pvalue"] < 0.05
    lo, hi = stats.binom.interval(0.99, n, 0.05)
    assert lo <= rejections <= hi, rejections


@pytest.mark.slow
def test_before_after_coefficients_cover_the_truth(tmp_path):
    # invented scenario (simulation): x1's effect 2.0 -> 0 at the shock date; x2 stays 1.5.
    # 95% intervals: the after-interval of x1 covers 0 and the before-interval covers 2 in most of 40
    # seeds (binomial 1% lower quantile at 0.95), and never inverts the ordering of the two effects
    cfg = config(tmp_path)
    at = N_REF + 26
    n = 40
    cover_after = cover_before = cover_x2 = 0
    for seed in range(n):
        r = _shock(cfg, Scenario(seed=11_000 + seed, n_mon=78, b1_after=0.0, change_at=at), at)
        x1, x2 = r["drivers"]
        assert x1["series"] == "x1" and x2["series"] == "x2"
        cover_after += x1["ci_after"][0] <= 0.0 <= x1["ci_after"][1]
        cover_before += x1["ci_before"][0] <= 2.0 <= x1["ci_before"][1]
        cover_x2 += x2["ci_after"][0] <= 1.5 <= x2["ci_after"][1]
        assert x1["coef_before"] > x1["coef_after"]
    need = stats.binom.ppf(0.01, n, 0.95)
    assert cover_after >= need and cover_before >= need and cover_x2 >= need, (cover_after, cover_before, cover_x2)


def test_dropped_effect_reported_in_words(tmp_path):
    # invented scenario (simulation)
    cfg = config(tmp_path)
    at = N_REF + 26
    r = _shock(cfg, Scenario(seed=802, n_mon=78, b1_after=0.0, change_at=at), at)
    x1 = r["drivers"][0]
    assert x1["ci_after"][0] <= 0.0 <= x1["ci_after"][1]
    assert r["verdict"] == "refit" and "x1 effect fell" in r["reason"]
    assert r["accuracy"]["mae_after"] > r["accuracy"]["mae_before"]


def test_no_change_keeps(tmp_path):
    # invented scenario (simulation)
    cfg = config(tmp_path)
    r = _shock(cfg, Scenario(seed=803, n_mon=52), N_REF + 26)
    assert r["tests"][0]["pvalue"] > 0.05  # this seed does not reject (a 95% event)
    assert r["verdict"] == "keep" and "No evidence" in r["reason"]


def test_date_outside_the_data_is_our_error(tmp_path):
    # invented scenario (simulation)
    from drift.exceptions import InsufficientDataError

    cfg = config(tmp_path)
    periods, values = simulate(Scenario(seed=804, n_mon=10))
    moment = end_moment(periods)
    obs = known_by(observations(periods, values), moment)
    with pytest.raises(InsufficientDataError):
        shock_model(cfg, cfg.models[0], obs, (periods[-1] + pd.Timedelta(weeks=5)).date(), moment)
    with pytest.raises(InsufficientDataError):
        shock_model(cfg, cfg.models[0], obs, periods[0].date(), moment)


def test_run_shock_through_the_store_is_recorded(tmp_path, sqlite_store):
    # invented scenario (simulation): CSV -> ingest -> run_shock, as `drift shock` does
    cfg = config(tmp_path, csv=True)
    at = N_REF + 26
    periods, values = simulate(Scenario(seed=805, n_mon=52, b1_after=1.0, change_at=at))
    write_csv(tmp_path, periods, values)
    day = (periods[-1] + pd.Timedelta(days=7)).date()
    ingest_all(cfg, sqlite_store, now=as_of_moment(day), progress=False)
    res = run_shock(cfg, sqlite_store, periods[at].date(), as_of=day)
    text = json.dumps(res, allow_nan=False)
    assert json.loads(text)["models"][0]["verdict"] == "refit"
    assert "_chart" not in res["models"][0]
    runs = sqlite_store.recent_runs("shock")
    assert runs and runs[0]["status"] == "ok"
    assert "→  refit:" in format_shock(res)
    assert np.isfinite(res["models"][0]["tests"][0]["statistic"])
