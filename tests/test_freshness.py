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
