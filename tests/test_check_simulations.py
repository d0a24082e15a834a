"""Decisions of the as-deployed check on seeded simulations (invented scenarios, tests/check_scenarios.py).

The statistics behind the decisions (Clark-West, DM/HLN, CUSUM, monitoring) have their own known-answer
tests under tests/engine/; here we test what the check *recommends*: drop-driver, relag, data-late, refit
and its date, and the false-alarm rate on healthy models.
"""

from __future__ import annotations

import json
from datetime import date, timedelta

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from drift.check import CheckOutcome, analyse, as_of_moment, run_check
from drift.ingest import ingest_all
from drift.panel import build_design
from drift.verdicts import fmt_num
from tests.check_scenarios import (
    N_REF,
    START,
    Scenario,
    config,
    end_moment,
    known_by,
    observations,
    simulate,
    write_csv,
)


def _check(cfg, sc: Scenario, moment=None) -> dict:
    periods, values = simulate(sc)
    obs = observations(periods, values)
    moment = moment or end_moment(periods)
    payloads, errors = analyse(cfg, cfg.models, known_by(obs, moment), moment)
    assert not errors, errors
    return payloads[0]


def _acts(p: dict, action: str) -> list[dict]:
    return [a for a in p["actions"] if a["action"] == action]


def _row(day: str) -> int:
    return (pd.Timestamp(day) - START).days // 7


# --------------------------------------------------------------------------------------- (a) drop-driver
def test_vanished_driver_is_dropped_and_effective_one_kept(tmp_path):
    # invented scenario (simulation): x1's effect 2.0 -> 0 from the first monitored week; x2 (1.5) stays;
    # two years of monitoring so the recent 52-week window is forecast from post-change estimates
    cfg = config(tmp_path)
    dropped_x1 = 0
    n = 20
    for seed in range(n):
        p = _check(cfg, Scenario(seed=100 + seed, n_mon=104, b1_after=0.0, change_at=N_REF))
        drops = {a["driver"] for a in _acts(p, "drop-driver")}
        assert "x2" not in drops, p["actions"]
        dropped_x1 += "x1" in drops
        worth = {d["series"]: d["worth"] for d in p["drivers"]}
        assert worth["x2"]["pvalue"] < 0.01  # the effective driver clearly still helps
    # x1 is kept only by chance: Clark-West significant (5%), its interval missing zero (5%), or a
    # spurious relag (Bonferroni peak at 5%, which then also passes the DM and CW checks on the same
    # window): a drop rate of at least 0.95^3; bound = the binomial 1% quantile (measured: 36 of 40)
    assert dropped_x1 >= stats.binom.ppf(0.01, n, 0.95 ** 3)


def test_vanished_driver_evidence_is_in_the_reason(tmp_path):
    # invented scenario (simulation)
    cfg = config(tmp_path)
    p = _check(cfg, Scenario(seed=102, n_mon=104, b1_after=0.0, change_at=N_REF))
    (a,) = [a for a in _acts(p, "drop-driver") if a["driver"] == "x1"]
    assert "Clark–West" in a["reason"] and "covers zero" in a["reason"]
    x1 = next(d for d in p["drivers"] if d["series"] == "x1")
    assert x1["ci_recent"][0] <= 0.0 <= x1["ci_recent"][1]
    assert abs(x1["coef_reference"] - 2.0) < 0.1


@pytest.mark.parametrize("seed, dropped", [(7, False), (9, False), (11, True)])
def test_a_driver_whose_effect_since_the_break_is_clear_is_not_dropped(tmp_path, seed, dropped):
    # invented scenario (simulation): x1's effect falls from 2.0 to 0.35 at monitored week 50 (errors sd 3).
    # The recent 52-week window straddles the break, so its coefficient interval and the Clark-West test mix
    # the old and the new effect. Seeds 7 and 9: both say "no gain, covers zero" but the refit's effect since
    # the break is 2.6 standard errors from zero: refit, and x1 kept. Seed 11: the effect since the break is
    # 1.3 standard errors from zero, so the drop stands beside the refit (seeds found with a probe script)
    cfg = config(tmp_path)
    p = _check(cfg, Scenario(seed=seed, n_mon=104, b1_after=0.35, change_at=N_REF + 50, sigma=3.0))
    assert p["verdict"] == "refit"
    x1 = next(d for d in p["drivers"] if d["series"] == "x1")
    lo, hi = x1["ci_recent"]
    assert lo <= 0.0 <= hi and x1["worth"]["pvalue"] >= cfg.check.level  # what the drop rule reads first
    since = abs(x1["break"]["after"]) / x1["break"]["se_after"]
    assert (since <= 1.96) == dropped
    assert bool([a for a in _acts(p, "drop-driver") if a["driver"] == "x1"]) == dropped


# --------------------------------------------------------------------------------------- (b) relag
def test_lag_moving_from_1_to_3_gives_relag_3(tmp_path):
    # invented scenario (simulation): from the first monitored week y depends on x1 three weeks back
    cfg = config(tmp_path)
    for seed in range(5):
        p = _check(cfg, Scenario(seed=200 + seed, b1=2.0, lag1_after=3, change_at=N_REF))
        relags = _acts(p, "relag")
        assert [(a["driver"], a["lag"]) for a in relags] == [("x1", 3)], p["actions"]
        # it still earns its place at the new lag: never proposed for dropping at the same time
        assert not [a for a in _acts(p, "drop-driver") if a["driver"] == "x1"]
        prof = p["charts"]["lag_profile"]["x1"]
        assert prof["current_lag"] == 1
        rec = np.abs(np.array(prof["recent"], float))
        assert int(np.argmax(rec)) == 3


def test_a_break_the_moved_lag_explains_is_a_relag_not_a_refit(tmp_path):
    # invented scenario (simulation): x1 acts three weeks back from the first monitored week, its effect
    # unchanged. The monitors find the break; with x1 at lag 3 the reference coefficients fit the data
    # since the break (errors as on the reference period, each test at 5 %: about 0.9 of the models), so
    # the verdict is the relag, which carries the monitors' evidence. Bound: the binomial 1 % quantile at
    # 0.8 (measured: 5 of 6)
    cfg = config(tmp_path)
    n, relag = 6, 0
    for seed in range(n):
        p = _check(cfg, Scenario(seed=200 + seed, b1=2.0, lag1_after=3, change_at=N_REF))
        if p["verdict"] != "relag":
            continue
        relag += 1
        assert not _acts(p, "refit"), p["actions"]
        (a,) = _acts(p, "relag")
        assert a["since"] and a["monitor"]["test"].startswith("monitor-")
        ex = a["explains_break"]
        assert ex["pvalue_mean"] >= 0.05 and ex["pvalue_spread"] >= 0.05
        assert ex["spread_ratio"] < ex["spread_ratio_old_lag"]
        assert "the lag moved, not the effect" in a["reason"] and a["since"] in a["reason"]
    assert relag >= stats.binom.ppf(0.01, n, 0.8), relag


def test_a_changed_effect_stays_a_refit(tmp_path):
    # invented scenario (simulation): x1's effect 2.0 -> 0.8 at its own lag: whatever the lag profile says,
    # the reference coefficients at another lag cannot fit the data since the break, so refit
    cfg = config(tmp_path)
    for seed in range(4):
        p = _check(cfg, Scenario(seed=300 + seed, b1=2.0, b1_after=0.8, change_at=N_REF))
        assert p["verdict"] == "refit", p["actions"]


def test_spread_pvalue_without_extrapolation_is_the_f_distribution():
    # known answer: with A = 0, Q = chi2_n / (chi2_dof / dof) = n F(n, dof) (scipy.stats.f); the seeded
    # simulation (20,000 draws) is within its Monte Carlo error
    from drift.checking.actions import _spread_pvalue

    for n, dof, q in ((40, 100, 52.0), (12, 30, 20.0), (60, 146, 60.0)):
        want = stats.f.sf(q / n, n, dof)
        got = _spread_pvalue(q, n, np.zeros((n, n)), dof)
        assert abs(got - want) < 4 * np.sqrt(want * (1 - want) / 20_000) + 1e-4, (n, dof, got, want)
    assert _spread_pvalue(50.0, 40, np.zeros((40, 40)), 100) == _spread_pvalue(50.0, 40, np.zeros((40, 40)), 100)


# --------------------------------------------------------------------------------------- (c) data-late
def test_stopped_feed_is_late_on_the_first_check_after_its_due_date(tmp_path):
    # invented scenario (simulation): x1 stops after the week of row 200; values of a week become
    # available at its end (delay 0), so the next one (row 201) was due at the end of row 201's week
    cfg = config(tmp_path)
    sc = Scenario(seed=300, n_mon=60, stop_x1_after=N_REF + 44)
    periods, values = simulate(sc)
    obs = observations(periods, values)
    last = periods[N_REF + 44]
    due = last + pd.Timedelta(days=14)  # end of the next week, 00:00 UTC
    before_day = (due - pd.Timedelta(days=1)).date()  # --as-of that day = up to due (not after it)
    after_day = due.date()
    out = {}
    for day in (before_day, after_day):
        m = as_of_moment(day)
        payloads, errors = analyse(cfg, cfg.models, known_by(obs, m), m)
        assert not errors
        out[day] = payloads[0]
    assert not _acts(out[before_day], "data-late")
    late = _acts(out[after_day], "data-late")
    assert [a["driver"] for a in late] == ["x1"]
    assert late[0]["last_period"] == last.date().isoformat()
    assert late[0]["missing_periods"] == 1
    assert out[after_day]["verdict"] == "data-late"
    x1 = next(d for d in out[after_day]["drivers"] if d["series"] == "x1")
    assert x1["late"] is True and x1["next_due"] == due.tz_localize("UTC").isoformat()


def test_feed_gone_longer_than_the_limit_is_data_late_with_its_cost(tmp_path):
    # invented scenario (simulation): x1 (effect 2.0, it helps) missing for 6 weeks (> feed_limit 4).
    # README promise: a driver that still helps is never proposed for dropping; the late feed's reason
    # gives the cost of running without it, with the same figures as the driver's worth entry.
    cfg = config(tmp_path)
    sc = Scenario(seed=301, n_mon=60, stop_x1_after=N_REF + 60 - 7)
    p = _check(cfg, sc)
    (late,) = _acts(p, "data-late")
    assert late["missing_periods"] > cfg.check.feed_limit
    assert _acts(p, "drop-driver") == []
    worth = next(d for d in p["drivers"] if d["series"] == "x1")["worth"]
    assert worth["pvalue"] < cfg.check.level  # it helps
    w = late["without"]
    assert (w["mae_with"], w["mae_without"], w["n"]) == (worth["mae_with"], worth["mae_without"], worth["n"])
    assert f"from {fmt_num(w['mae_with'])} to {fmt_num(w['mae_without'])} units" in late["reason"]
    assert f"{w['n']} of the last {cfg.check.recent_window} periods" in late["reason"]


def test_a_driver_that_helps_is_never_proposed_for_dropping(tmp_path):
    # invented scenarios (simulation): the README promise over a few seeds, feeds on time and gone; a
    # drop-driver, when there is one, always names a driver whose Clark-West p is not below the level
    cfg = config(tmp_path)
    proposed = []
    for seed, stop, gone in ((302, None, False), (303, N_REF + 100 - 7, False), (304, None, True),
                             (305, N_REF + 100 - 7, True)):
        p = _check(cfg, Scenario(seed=seed, n_mon=100, b1_after=0.0 if gone else None,
                                 change_at=N_REF + 4 if gone else None, stop_x1_after=stop))
        for a in _acts(p, "drop-driver"):
            worth = next(d for d in p["drivers"] if d["series"] == a["driver"])["worth"]
            assert worth["pvalue"] >= cfg.check.level, (seed, a)
            proposed.append(seed)
    assert 304 in proposed  # the rule still fires where the effect has gone


# --------------------------------------------------------------------------------------- (d) healthy
@pytest.mark.slow
def test_healthy_models_rarely_refit(tmp_path):
    # invented scenario (simulation): 20 stable models; refit is held at level 5% over the horizon.
    # Bound: the 99% binomial upper quantile for 20 draws at 5% is 4 (scipy.stats.binom.ppf).
    cfg = config(tmp_path)
    counts = {"refit": 0, "relag": 0, "drop-driver": 0, "data-late": 0}
    for seed in range(20):
        p = _check(cfg, Scenario(seed=400 + seed))
        for a in p["actions"]:
            if a["action"] in counts:
                counts[a["action"]] += 1
    assert counts["refit"] <= stats.binom.ppf(0.99, 20, cfg.check.level)
    assert counts["relag"] == 0 and counts["drop-driver"] == 0 and counts["data-late"] == 0, counts


def test_healthy_model_keeps(tmp_path):
    # invented scenario (simulation)
    cfg = config(tmp_path)
    p = _check(cfg, Scenario(seed=401))
    assert p["verdict"] in ("keep", "watch"), p["actions"]
    assert not [a for a in p["actions"] if a["severity"] == "act"]
    coefs = {d["series"]: d["coef_reference"] for d in p["drivers"]}
    assert abs(coefs["x1"] - 2.0) < 0.1 and abs(coefs["x2"] - 1.5) < 0.1


# --------------------------------------------------------------------------------------- (e) refit date
@pytest.mark.parametrize("shift", [10, 30, 55])
def test_coefficient_break_gives_refit_dated_near_the_truth(tmp_path, shift):
    # invented scenario (simulation): x1's effect 2.0 -> 1.0 at row N_REF + shift
    cfg = config(tmp_path)
    true = N_REF + shift
    for seed in range(3):
        p = _check(cfg, Scenario(seed=500 + seed, b1_after=1.0, change_at=true))
        (r,) = _acts(p, "refit")
        assert abs(_row(r["since"]) - true) <= 2, (r["since"], true)
        assert p["verdict"] == "refit"
        assert p["charts"]["break_date"] == r["since"]


# --------------------------------------------------------------------------------------- (f) error model
@pytest.mark.slow
def test_ar1_errors_hold_the_false_alarm_rate(tmp_path):
    # invented scenario (simulation): healthy model, AR(1) errors with phi 0.7; 20 seeds
    cfg = config(tmp_path, errors="ar(1)")
    refits = sum(bool(_acts(_check(cfg, Scenario(seed=600 + s, error_phi=0.7)), "refit")) for s in range(20))
    assert refits <= stats.binom.ppf(0.99, 20, cfg.check.level)


@pytest.mark.slow
def test_ols_on_ar1_errors_over_alarms_documented_contrast(tmp_path):
    # the same invented scenario fitted with errors: ols ignores the autocorrelation; the monitors then
    # raise far more refits than the nominal rate (measured: 16 of 40 seeds, 8 of the first 20)
    cfg = config(tmp_path, errors="ols")
    refits = sum(bool(_acts(_check(cfg, Scenario(seed=600 + s, error_phi=0.7)), "refit")) for s in range(20))
    assert refits > stats.binom.ppf(0.99, 20, cfg.check.level)


def test_ar1_payload_names_the_error_model(tmp_path):
    # invented scenario (simulation); oracle: the engine's error model fitted here by hand to the
    # reference-period OLS residuals of the design (the wiring, whatever estimator the engine uses)
    from drift import engine

    cfg = config(tmp_path, errors="ar(1)")
    sc = Scenario(seed=601, error_phi=0.7)
    periods, values = simulate(sc)
    moment = end_moment(periods)
    obs = known_by(observations(periods, values), moment)
    p = analyse(cfg, cfg.models, obs, moment)[0][0]
    d = build_design(cfg, cfg.models[0], obs, pd.Timestamp(moment))
    y, X = d.y[: d.n_ref], d.X[: d.n_ref]
    ok = np.isfinite(y) & np.isfinite(X).all(axis=1)
    b, *_ = np.linalg.lstsq(X[ok], y[ok], rcond=None)
    e = np.where(ok, y - np.where(ok[:, None], X, 0.0) @ b, np.nan)
    # the check bias-corrects for its own regressors: the oracle does the same
    phi = float(np.atleast_1d(engine.fit_error_model(e, "ar(1)", X=X).params()["ar"])[0])
    assert p["error_model"] == f"ar(1) with phi1 = {phi:.2f}"
    # residual-based estimates are biased down (k = 10 regressors incl. trend and Fourier terms absorb
    # low-frequency error variation; Kendall's -(1 + 3 phi)/n on top); the design-aware correction removes
    # most of it: loose band around the true 0.7, common practice
    assert 0.5 < phi < 0.9


# --------------------------------------------------------------------------------------- JSON contract
def _is_date(x) -> bool:
    return isinstance(x, str) and date.fromisoformat(x).isoformat() == x


def _contract(m: dict) -> None:
    assert isinstance(m["name"], str)
    assert m["verdict"] in ("keep", "refit", "relag", "drop-driver", "data-late", "watch")
    assert isinstance(m["actions"], list) and isinstance(m["alarms"], list) and isinstance(m["drivers"], list)
    for a in m["actions"]:
        assert a["action"] in ("refit", "relag", "drop-driver", "data-late", "watch")
        assert a["severity"] in ("act", "watch") and isinstance(a["reason"], str) and a["reason"]
        if a["action"] == "refit":
            assert _is_date(a["since"])
        if a["action"] in ("relag", "drop-driver", "data-late"):
            assert isinstance(a["driver"], str)
        if a["action"] == "relag":
            assert isinstance(a["lag"], int) and not isinstance(a["lag"], bool)
        if a["action"] == "data-late":
            assert _is_date(a["last_period"])
    for al in m["alarms"]:
        assert isinstance(al["test"], str) and _is_date(al["date"])
        for k in ("statistic", "threshold"):
            assert al[k] is None or isinstance(al[k], float)
    for d in m["drivers"]:
        assert isinstance(d["series"], str)
        assert isinstance(d["lag"], int)
        assert isinstance(d["coef_reference"], float)
        assert d.get("coef_recent") is None or isinstance(d["coef_recent"], float)
    from drift.verdicts import ORDER as order  # the one order of verdicts (drift/verdicts.py)

    if m["actions"]:
        assert m["verdict"] == min((a["action"] for a in m["actions"]), key=order.index)
    else:
        assert m["verdict"] == "keep"


def test_json_contract_of_the_payload(tmp_path):
    # invented scenarios (simulation) covering every action kind
    cfg = config(tmp_path)
    scenarios = [Scenario(seed=700), Scenario(seed=701, b1_after=1.0, change_at=N_REF + 30),
                 Scenario(seed=702, lag1_after=3, change_at=N_REF),
                 Scenario(seed=703, n_mon=104, b1_after=0.0, change_at=N_REF),
                 Scenario(seed=704, stop_x1_after=N_REF + 70)]
    payloads = [_check(cfg, sc) for sc in scenarios]
    seen = {a["action"] for p in payloads for a in p["actions"]}
    assert {"refit", "relag", "drop-driver", "data-late"} <= seen
    outcome = CheckOutcome(run_id=1, as_of=date(2025, 1, 1), models=payloads)
    text = json.dumps(outcome.as_json(), allow_nan=False)
    back = json.loads(text)
    assert [m["name"] for m in back["models"]] == ["sim"] * len(scenarios)
    for m in back["models"]:
        assert "charts" not in m
        _contract(m)


def test_run_check_end_to_end_through_the_store(tmp_path, sqlite_store):
    # invented scenario (simulation): a CSV ingested into a SQLite store, then run_check as the CLI does
    cfg = config(tmp_path, csv=True)
    sc = Scenario(seed=710, b1_after=1.0, change_at=N_REF + 30)
    periods, values = simulate(sc)
    write_csv(tmp_path, periods, values)
    day = (periods[-1] + pd.Timedelta(days=7)).date()
    ingest_all(cfg, sqlite_store, now=as_of_moment(day), progress=False)
    outcome = run_check(cfg, sqlite_store, as_of=day, deliver=False)
    assert not outcome.errors
    (m,) = outcome.models
    assert m["verdict"] == "refit"
    assert abs(_row(_acts(m, "refit")[0]["since"]) - (N_REF + 30)) <= 2
    _contract(json.loads(json.dumps(outcome.as_json(), allow_nan=False))["models"][0])
    # the last week's values became available at 00:00 on ``day``; a check two days earlier (through the
    # end of day - 2) cannot see them and ends one period earlier
    earlier = run_check(cfg, sqlite_store, as_of=day - timedelta(days=2), deliver=False)
    assert earlier.models[0]["last_period"] == periods[-2].date().isoformat()


def test_horizon_passed_is_said(tmp_path) -> None:
    # invented scenario (simulation): a short reference and a long monitoring span beyond horizon 0.5
    cfg = config(tmp_path)
    cfg = cfg.model_copy(update={"check": cfg.check.model_copy(update={"horizon": 0.5})})
    periods, values = simulate(Scenario(seed=904, n_mon=104))
    moment = end_moment(periods)
    (p,), _ = analyse(cfg, cfg.models, known_by(observations(periods, values), moment), moment)
    assert p["verdict"] == "watch"
    assert any(a["action"] == "watch" and "horizon ended" in a["reason"] for a in p["actions"])


@pytest.mark.slow
def test_refit_false_alarm_rate_over_the_whole_horizon(tmp_path) -> None:
    # simulation: healthy models observed over exactly the monitoring horizon (78 weeks = 0.5 x 156), so
    # the whole false-alarm budget can be spent; the refit rate must stay within the binomial 99% upper
    # quantile of the 5% level (scipy.stats.binom), all monitors together (Bonferroni over 4)
    from scipy import stats

    cfg = config(tmp_path)
    cfg = cfg.model_copy(update={"check": cfg.check.model_copy(update={"horizon": 0.5})})
    n = 60
    refits = 0
    for seed in range(n):
        periods, values = simulate(Scenario(seed=5000 + seed, n_mon=78))
        moment = end_moment(periods)
        (p,), _ = analyse(cfg, cfg.models, known_by(observations(periods, values), moment), moment)
        refits += p["verdict"] == "refit"
    assert refits <= stats.binom.ppf(0.99, n, 0.05)


# --------------------------------------------------------------------------------------- honest dates
def _alarm_rows(p: dict) -> list[int]:
    return [_row(a["date"]) for a in p["alarms"] if not a.get("warning") and a["date"]]


def test_alarms_are_dated_when_a_check_would_have_raised_them(tmp_path) -> None:
    # invented scenario (simulation): x1's effect 2.0 -> 0.8 forty weeks into monitoring. Every alarm is
    # a sequential monitor's (the retrospective CUSUM tests are only in `tests`), dated at or after the
    # change; the abrupt-shift monitor is among the first to cross
    cfg = config(tmp_path)
    true = N_REF + 40
    p = _check(cfg, Scenario(seed=700, n_mon=104, b1_after=0.8, change_at=true))
    assert p["verdict"] == "refit"
    assert {a["test"] for a in p["alarms"]} <= {"monitor-cusum", "monitor-shift", "monitor-variance",
                                                 "monitor-effect", "monitor-effect-shift"}
    rows = _alarm_rows(p)
    assert rows and min(rows) >= true and min(rows) <= true + 3, rows
    # the refit reason quotes the first alarm's date: the same figure as the JSON
    first = min(p["alarms"], key=lambda a: a["date"])
    assert first["date"] in _acts(p, "refit")[0]["reason"]
    # the retrospective tests' dates are replayed: never before the change here
    retro = [t for t in p["tests"] if t["test"] in ("cusum", "cusum-squares") and t["date"]]
    assert all(_row(t["date"]) >= true for t in retro), retro


@pytest.mark.slow
def test_no_alarm_dated_before_the_break_beyond_the_nominal_rate(tmp_path) -> None:
    # invented scenario (simulation), 30 seeds: x1's effect 2.0 -> 1.6 (a small change) forty weeks into
    # two monitored years. A model with an alarm dated before the change had a false alarm; their share
    # stays within the binomial 99% upper quantile of the 5% level (scipy.stats.binom). Before the replay
    # (the retrospective CUSUM of squares dated by its whole-sample path) it was far above.
    cfg = config(tmp_path)
    true = N_REF + 40
    n = 30
    early = detected = 0
    for seed in range(n):
        p = _check(cfg, Scenario(seed=7100 + seed, n_mon=104, b1_after=1.6, change_at=true))
        rows = _alarm_rows(p)
        early += any(r < true for r in rows)
        detected += any(r >= true for r in rows)
    assert early <= stats.binom.ppf(0.99, n, cfg.check.level), early
    assert detected >= 0.8 * n, detected


def test_horizon_longer_than_the_tables_is_capped_not_an_error(tmp_path) -> None:
    # invented scenario (simulation): 20 years of weekly monitoring is 1,044 periods, beyond 6 times the
    # 156-week reference (936, the simulated tables' edge): the model is checked with the horizon capped
    from drift.check import prepare_model

    cfg = config(tmp_path)
    periods, values = simulate(Scenario(seed=905))
    moment = end_moment(periods)
    obs = known_by(observations(periods, values), moment)
    assert prepare_model(cfg, cfg.models[0], obs, moment).horizon_n == 104  # the default '2 years'
    cfg = cfg.model_copy(update={"check": cfg.check.model_copy(update={"horizon": "20 years"})})
    assert prepare_model(cfg, cfg.models[0], obs, moment).horizon_n == 936
    (p,), errors = analyse(cfg, cfg.models, obs, moment)
    assert not errors and p["verdict"] != "error"


def test_alarm_after_the_horizon_says_the_guarantee_lapsed(tmp_path) -> None:
    # invented scenario (simulation): a horizon of a quarter of the 156-week reference (39 weeks) and a
    # large change 60 weeks into monitoring: the monitors keep running beyond the horizon, the refit says
    # its alarm came without the false-alarm guarantee, and the alarm is marked beyond_horizon
    cfg = config(tmp_path)
    cfg = cfg.model_copy(update={"check": cfg.check.model_copy(update={"horizon": 0.25})})
    p = _check(cfg, Scenario(seed=906, n_mon=80, b1_after=0.5, change_at=N_REF + 60))
    (r,) = _acts(p, "refit")
    assert "without the false-alarm guarantee" in r["reason"]
    first = min((a for a in p["alarms"] if not a.get("warning")), key=lambda a: a["date"])
    assert first["beyond_horizon"] is True and _row(first["date"]) >= N_REF + 60


def test_a_crossing_after_the_horizon_has_no_p_value_and_its_chart_marks_the_horizon(tmp_path):
    # invented scenario (simulation): x1's effect falls 2.0 -> 0.5 at monitored week 110, after the default
    # two-year horizon (104 weeks). The monitors keep watching but their false-alarm guarantee has lapsed:
    # a crossing then is reported without a p-value (the monitor's p-value measures its path within the
    # horizon, which did not cross) and the chart marks where the horizon ended
    cfg = config(tmp_path)
    sc = Scenario(seed=17, n_mon=130, b1_after=0.5, change_at=N_REF + 110)
    p = _check(cfg, sc)
    assert p["verdict"] == "refit"
    # the residual stream's horizon is counted in periods: all three crossed after it (the driver monitors
    # count it in their information, which may run on past the 104th week)
    resid = [t for t in p["tests"] if t["test"] in ("monitor-cusum", "monitor-shift", "monitor-variance")]
    assert len(resid) == 3 and all(t["date"] and t.get("beyond_horizon") for t in resid)
    beyond = {(a["test"], a.get("driver")) for a in p["alarms"] if a.get("beyond_horizon") and not a.get("warning")}
    for t in p["tests"]:
        if t["test"].startswith("monitor-"):
            after = (t["test"], t.get("driver")) in beyond
            assert bool(t.get("beyond_horizon")) == after and (t["pvalue"] is None) == after, t
    last_within = (START + pd.Timedelta(weeks=N_REF + 104 - 1)).date().isoformat()
    assert p["charts"]["monitor"]["horizon_end"] == last_within
    (refit,) = _acts(p, "refit")
    assert "after the monitoring horizon" in refit["reason"]


def test_a_driver_published_later_than_its_lag_allows_is_named_with_when_it_arrived(tmp_path):
    # invented scenario (simulation): x1 is published ten days after its week ends, so at lag 1 none of its
    # values exists when the forecast it feeds is made. The model cannot be fitted; the error says why (the
    # values are stored, but arrive too late) and gives one value's arrival against its forecast's origin
    cfg = config(tmp_path)
    periods, values = simulate(Scenario(seed=5))
    obs = observations(periods, values)
    late = obs["series"] == "x1"
    obs.loc[late, "available_at"] += pd.Timedelta(days=10)
    obs.loc[late, "ingested_at"] += pd.Timedelta(days=10)
    moment = end_moment(periods) + pd.Timedelta(days=14)
    payloads, errors = analyse(cfg, cfg.models, known_by(obs, moment), moment)
    assert not payloads
    why = errors["sim"]
    assert "rows without a value: x1[L1] 156" in why
    # the first reference row's lag-1 period precedes the data: 155 of them are stored
    assert ("155 of the 156 missing values of 'x1' are stored but were first available only after the forecast "
            "they feed was made (its value for the period starting 2021-01-04 was available from 2021-01-21 "
            "00:00 UTC; the forecast of 2021-01-11 is made at its start): at lag 1 the model never sees them") in why
