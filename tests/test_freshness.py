"""Feed freshness of planned (known) and forecast drivers: late when the forecast of the current period had
to be made without them. Invented scenario (tests/check_scenarios.py), simulation."""

from __future__ import annotations

import numpy as np
import pandas as pd

from drift.check import analyse
from drift.config import load_config
from tests.check_scenarios import CONFIG, Scenario, end_moment, known_by, observations, simulate


def _cfg(tmp_path):
    text = CONFIG.format(errors="ols", lag1=1, level=0.05, recent=52, sources="").replace(
        "      - {series: x2, lag: 1, form: lagged}", "      - {series: x2, lag: 1, form: known}")
    (tmp_path / "drift.yaml").write_text(text, encoding="utf-8")
    return load_config(tmp_path / "drift.yaml")


def _plan(periods, values, weeks_ahead: int):
    """x2 as a plan made 8 weeks ahead, running ``weeks_ahead`` weeks past the last actual."""
    obs = observations(periods, values)
    obs = obs[obs["series"] != "x2"]
    extra = pd.date_range(periods[-1] + pd.Timedelta(days=7), periods=weeks_ahead, freq="7D")
    allp = periods.append(extra)
    x2 = np.r_[values["x2"], np.zeros(weeks_ahead)]
    planned = (allp - pd.Timedelta(weeks=8)).tz_localize("UTC")
    plan = pd.DataFrame({"series": "x2", "period": allp, "issued_at": pd.NaT, "value": x2,
                         "available_at": planned, "ingested_at": planned})
    plan["issued_at"] = pd.to_datetime(plan["issued_at"], utc=True)
    return pd.concat([obs, plan], ignore_index=True)


def _late(payload):
    return [a for a in payload["actions"] if a["action"] == "data-late"]


def test_plan_running_ahead_is_on_time(tmp_path) -> None:
    cfg = _cfg(tmp_path)
    periods, values = simulate(Scenario(seed=801))
    moment = end_moment(periods)
    (p,), _ = analyse(cfg, cfg.models, known_by(_plan(periods, values, 6), moment), moment)
    assert _late(p) == []
    assert p["charts"]["feeds"]["x2"]["late"] is False


def test_plan_that_stops_is_late(tmp_path) -> None:
    cfg = _cfg(tmp_path)
    periods, values = simulate(Scenario(seed=802))
    moment = end_moment(periods)  # a few hours into the week after the last actual
    obs = _plan(periods, values, 0)
    # the plan stops two weeks before the last actual: the current week's forecast (x2 at lag 1) lacks it
    obs = obs[~((obs["series"] == "x2") & (obs["period"] >= periods[-2]))]
    (p,), _ = analyse(cfg, cfg.models, known_by(obs, moment), moment)
    late = _late(p)
    assert [a["driver"] for a in late] == ["x2"]
    assert late[0]["last_period"] == periods[-3].date().isoformat()
    assert "plan" in late[0]["reason"]
    # it should have covered the two weeks after its last one (the second is the one the forecast needs)
    assert late[0]["missing_periods"] == 2 and "(2 periods missing)" in late[0]["reason"]
    assert (late[0]["role"], late[0]["next_due"]) == ("driver", p["charts"]["feeds"]["x2"]["next_due"])
    assert "feed_limit" not in late[0]


def test_plan_gone_for_long_counts_its_missing_periods_and_says_what_it_costs(tmp_path) -> None:
    # the plan stops ten weeks before the last actual: more than check.feed_limit (4) periods are missing, so
    # the action carries the limit and the cost of running without it, as a lagged feed's does
    cfg = _cfg(tmp_path)
    periods, values = simulate(Scenario(seed=802))
    moment = end_moment(periods)
    obs = _plan(periods, values, 0)
    obs = obs[~((obs["series"] == "x2") & (obs["period"] >= periods[-10]))]
    (p,), _ = analyse(cfg, cfg.models, known_by(obs, moment), moment)
    (late,) = _late(p)
    assert late["missing_periods"] == 10 and late["feed_limit"] == cfg.check.feed_limit
    assert "It has been missing for more than 4 periods." in late["reason"]
    assert late["without"]["n"] >= 10 and "restore the feed" in late["reason"].lower()


def test_plan_loaded_after_the_fact_is_not_late_when_its_period_is_in_the_file(tmp_path, sqlite_store) -> None:
    # invented scenario (simulation): x2 is a known driver at lag 0 (a planned calendar) loaded as ordinary
    # history, without an available column, a year after the check date; the file holds x2 for the
    # current week (the week being forecast) although its target is not in yet. Each first vintage then
    # counts as available at the end of its week, so the check used to call x2 late on every model.
    from datetime import timedelta

    from drift.check import as_of_moment, run_check
    from drift.ingest import ingest_all
    from tests.check_scenarios import config, write_csv

    cfg = config(tmp_path, csv=True)
    text = (tmp_path / "drift.yaml").read_text(encoding="utf-8").replace(
        "{series: x2, lag: 1, form: lagged}", "{series: x2, lag: 0, form: known}")
    (tmp_path / "drift.yaml").write_text(text, encoding="utf-8")
    cfg = load_config(tmp_path / "drift.yaml")
    periods, values = simulate(Scenario(seed=803))
    values = {k: v.astype(float).copy() for k, v in values.items()}
    values["y"][-1] = np.nan  # the current week: its target is not in yet, its plan is
    values["x1"][-1] = np.nan
    write_csv(tmp_path, periods, values)
    day = periods[-1].date() + timedelta(days=2)  # inside the current week
    ingest_all(cfg, sqlite_store, now=as_of_moment(day) + timedelta(days=365), progress=False)
    out = run_check(cfg, sqlite_store, as_of=day, deliver=False)
    (p,) = out.models
    assert _late(p) == [], _late(p)
    assert p["charts"]["feeds"]["x2"]["late"] is False


# common practice, no source: the freshness stage's array views agree with drift.panel.as_ns and with
# pandas' groupby (oracle), whatever the column's unit, time zone, string storage or missing values
def test_freshness_views_agree_with_pandas() -> None:
    from drift.checking.freshness import _ns, _rows_by_series
    from drift.panel import as_ns

    t = pd.to_datetime(["2025-01-06 10:00:00.123456", None, "1999-12-31 00:00:00.000000"])
    for col in (pd.Series(t).astype("datetime64[s]"), pd.Series(t).astype("datetime64[us]"), pd.Series(t),
                pd.Series(t).dt.tz_localize("UTC").astype("datetime64[us, UTC]"),
                pd.Series(t).dt.tz_localize("Europe/Lisbon")):
        assert np.array_equal(_ns(col), as_ns(col))
    for dtype in ("str", object):
        ser = pd.Series(["b", "a", None, "b", "c", "a"], dtype=dtype)
        got = _rows_by_series(ser)
        want = {str(k): np.asarray(v) for k, v in ser.groupby(ser, sort=False).indices.items()}
        assert got.keys() == want.keys() and all(np.array_equal(got[k], want[k]) for k in want)
