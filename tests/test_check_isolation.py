"""One model never fails another: data problems are the model's own error entry, with a reason that names
the problem (common practice, no source; invented scenario, tests/check_scenarios.py).

Oracle: the healthy models' payloads in a chunk with a broken model equal their payloads in a chunk
without it.
"""

from __future__ import annotations

import json
import logging
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

import drift.check
from drift.check import CheckOutcome, analyse
from drift.config import Config, load_config
from drift.jsontext import json_default
from tests.check_scenarios import Scenario, end_moment, known_by, observations, simulate

PERIODS, VALUES = simulate(Scenario(seed=3, n_mon=52))
N = len(PERIODS)
MOMENT = end_moment(PERIODS)

MODEL = """\
  - name: {name}
    target: {y}
    frequency: W
    drivers:
      - {{series: {x1}, lag: 1}}
      - {{series: {x2}, lag: 1}}
    reference: {{start: 2021-01-04, end: {end}}}
"""


def chunk_config(tmp_path: Path, bad: dict[str, str], *, end: str = "2023-12-25") -> Config:
    """Models ``ok1``, ``bad``, ``ok2``: the healthy ones on series y/x1/x2, ``bad`` on its own series
    (``bad`` gives the overrides: y, x1, x2, end)."""
    blocks = [MODEL.format(name="ok1", y="y", x1="x1", x2="x2", end=end),
              MODEL.format(name="bad", **{"y": "by", "x1": "bx1", "x2": "bx2", "end": end, **bad}),
              MODEL.format(name="ok2", y="y", x1="x1", x2="x2", end=end)]
    path = tmp_path / "drift.yaml"
    path.write_text("store: sqlite:///unused.db\nmodels:\n" + "".join(blocks), encoding="utf-8")
    return load_config(path)


def obs_with(bad_values: dict[str, np.ndarray]) -> pd.DataFrame:
    vals = {**VALUES, **{"b" + k: v for k, v in bad_values.items()}}
    return known_by(observations(PERIODS, vals), MOMENT)


def healthy_oracle(cfg: Config, obs: pd.DataFrame) -> str:
    ok = [m for m in cfg.models if m.name != "bad"]
    payloads, errors = analyse(cfg, ok, obs, MOMENT)
    assert errors == {}
    return json.dumps(payloads, sort_keys=True, default=json_default)


def run_chunk(cfg: Config, obs: pd.DataFrame) -> tuple[list[dict[str, Any]], dict[str, str]]:
    return analyse(cfg, cfg.models, obs, MOMENT)


# the bad model's data, and words its reason must contain
BAD = {
    "collinear drivers (x2 = 2 × x1)": ({**VALUES, "x2": 2.0 * VALUES["x1"]}, ["collinear", "bx2[L1] = 2 × bx1[L1]"]),
    "constant driver": ({**VALUES, "x1": np.full(N, 5.0)}, ["collinear", "bx1[L1] = 5 × const"]),
    "constant target": ({**VALUES, "y": np.full(N, 7.0)}, ["target 'by' is constant"]),
    "fewer usable reference rows than regressors": (
        {**VALUES, "y": np.where(np.arange(N) < 150, np.nan, VALUES["y"])},
        ["needs at least 13 usable observations", "6 available", "target 'by' 150"]),
    "a driver entirely missing": ({k: v for k, v in VALUES.items() if k != "x2"}, ["no observations of 'bx2'"]),
    "a target value of 1e308": ({**VALUES, "y": np.where(np.arange(N) == 170, 1e308, VALUES["y"])},
                                ["the target 'by' has the value 1e+308 for the period starting 2024-04-08"]),
    "a target near 1e-300": ({**VALUES, "y": VALUES["y"] * 1e-300}, ["the target 'by' is too small in scale"]),
    "a driver value of -1e308": ({**VALUES, "x1": np.where(np.arange(N) == 50, -1e308, VALUES["x1"])},
                                 ["the driver 'bx1' has the value -1e+308 for the period starting 2021-12-20"]),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_model_is_its_own_entry(tmp_path: Path, case: str) -> None:
    values, words = BAD[case]
    cfg = chunk_config(tmp_path, {})
    obs = obs_with(values)
    payloads, errors = run_chunk(cfg, obs)
    assert list(errors) == ["bad"], errors
    for w in words:
        assert w in errors["bad"], errors["bad"]
    assert "LinAlgError" not in errors["bad"]
    assert json.dumps(payloads, sort_keys=True, default=json_default) == healthy_oracle(cfg, obs)


def test_reference_end_after_the_check_date(tmp_path: Path) -> None:
    """The reported case: one model's reference end past the data took down its chunk."""
    cfg = chunk_config(tmp_path, {"end": "2027-12-27"})
    obs = obs_with(dict(VALUES))
    payloads, errors = run_chunk(cfg, obs)
    assert list(errors) == ["bad"]
    assert "reference period ends 2027-12-27, after the check date" in errors["bad"]
    assert [p["name"] for p in payloads] == ["ok1", "ok2"]
    assert json.dumps(payloads, sort_keys=True, default=json_default) == healthy_oracle(cfg, obs)


def test_nothing_to_monitor_yet_is_batched_apart(tmp_path: Path) -> None:
    """A model whose reference runs to the newest data (nothing to monitor) beside monitored ones: each gets
    its verdict; the monitored ones are unchanged."""
    cfg = chunk_config(tmp_path, {})
    end = PERIODS[-1].date().isoformat()
    models = [m if m.name != "bad" else m.model_copy(update={"reference": m.reference.model_copy(
        update={"end": PERIODS[-1].date()})}) for m in cfg.models]
    cfg = cfg.model_copy(update={"models": models})
    obs = obs_with(dict(VALUES))
    payloads, errors = run_chunk(cfg, obs)
    assert errors == {}
    bad = next(p for p in payloads if p["name"] == "bad")
    assert bad["monitor_start"] is None and bad["reference"]["end"] == end
    assert json.dumps([p for p in payloads if p["name"] != "bad"], sort_keys=True, default=json_default) \
        == healthy_oracle(cfg, obs)


def test_a_batch_that_fails_is_split_until_the_model_is_alone(tmp_path: Path,
                                                              monkeypatch: pytest.MonkeyPatch) -> None:
    cfg = chunk_config(tmp_path, {})
    obs = obs_with(dict(VALUES))
    oracle = healthy_oracle(cfg, obs)
    real = drift.check._screen
    calls: list[list[str]] = []

    def screen(group: list[Any]) -> None:
        calls.append([c.model.name for c in group])
        real(group)  # leaves partial results behind, like a real failure half way through
        if any(c.model.name == "bad" for c in group):
            raise np.linalg.LinAlgError("Singular matrix")

    monkeypatch.setattr(drift.check, "_screen", screen)
    payloads, errors = run_chunk(cfg, obs)
    assert list(errors) == ["bad"]
    assert "LinAlgError: Singular matrix" in errors["bad"] and "unexpected" in errors["bad"]
    assert calls[0] == ["ok1", "bad", "ok2"] and ["bad"] in calls
    assert json.dumps(payloads, sort_keys=True, default=json_default) == oracle


@pytest.mark.parametrize("stage", ["_freshness", "_drivers_and_worth", "_lag_drift", "_payload"])
def test_a_later_stage_fails_only_its_model(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                            caplog: pytest.LogCaptureFixture, stage: str) -> None:
    cfg = chunk_config(tmp_path, {})
    obs = obs_with(dict(VALUES))
    oracle = healthy_oracle(cfg, obs)
    real = getattr(drift.check, stage)

    def broken(c: Any) -> Any:
        if c.model.name == "bad":
            raise KeyError("boom")
        return real(c)

    monkeypatch.setattr(drift.check, stage, broken)
    with caplog.at_level(logging.DEBUG, logger="drift.check"):
        payloads, errors = run_chunk(cfg, obs)
    assert list(errors) == ["bad"]
    assert "unexpected error" in errors["bad"] and "KeyError" in errors["bad"]
    assert json.dumps(payloads, sort_keys=True, default=json_default) == oracle
    # one warning line for the operator; the traceback only at debug level
    warned = [r for r in caplog.records if r.levelno == logging.WARNING and "bad" in r.getMessage()]
    assert len(warned) == 1 and warned[0].exc_info is None
    assert any(r.levelno == logging.DEBUG and r.exc_info for r in caplog.records)


def test_json_lists_every_model_in_order_with_error_entries(tmp_path: Path) -> None:
    cfg = chunk_config(tmp_path, {})
    obs = obs_with({**VALUES, "y": np.full(N, 7.0)})
    payloads, errors = run_chunk(cfg, obs)
    failed = [drift.check.error_entry(cfg.model("bad"), errors["bad"], MOMENT.date())]
    out = CheckOutcome(run_id=1, as_of=MOMENT.date(), models=payloads, errors=errors, failed=failed,
                       order=["ok1", "bad", "ok2"]).as_json()
    assert [m["name"] for m in out["models"]] == ["ok1", "bad", "ok2"]
    assert (out["checked"], out["failed"]) == (2, 1)
    bad = out["models"][1]
    assert bad["verdict"] == "error" and bad["reason"] == errors["bad"]
    # the payload's keys are all there (extend the contract, keep its keys)
    assert set(out["models"][0]) - {"charts"} <= set(bad)
    assert bad["actions"] == [] and bad["drivers"] == [] and bad["target"] == "by"
    json.dumps(out, allow_nan=False)


def test_batched_lag_profiles_equal_the_per_model_ones(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The chunk's lag profiles in a few batched engine calls give the payloads the per-model calls give,
    byte for byte, also when the engine refuses a batch (here the first one, as it would for one series too
    short or constant): the batch is split until each part is computed or alone. Oracle: the same check
    with the batched stage switched off (common practice, no source)."""
    from drift.exceptions import InsufficientDataError

    cfg = chunk_config(tmp_path, {})
    obs = obs_with(dict(VALUES))
    calls: list[int] = []
    real = drift.engine.lag_profile

    def counted(y: Any, x: Any, max_lag: int, **kw: Any) -> Any:
        rows = np.shape(y)[0] if np.ndim(y) == 2 else 1
        calls.append(rows)
        if rows == 6 and calls.count(6) == 1:
            raise InsufficientDataError("lag profile (target or driver is constant)", 2, 0)
        return real(y, x, max_lag, **kw)

    monkeypatch.setattr(drift.engine, "lag_profile", counted)
    batched, errors = run_chunk(cfg, obs)
    # 3 models x 2 drivers: refused, then split in halves, each half one call per window
    assert calls == [6, 3, 3, 3, 3]
    n_batched = len(calls)
    calls.clear()
    monkeypatch.setattr(drift.check, "_lag_profiles_batched", lambda ctxs: None)
    single, errors_single = run_chunk(cfg, obs)
    assert errors == errors_single == {}
    assert json.dumps(batched, sort_keys=True, default=json_default) == json.dumps(single, sort_keys=True, default=json_default)
    assert set(calls) == {1} and n_batched < len(calls)


def test_batched_worth_equals_the_per_model_one(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The chunk's nested rolling fits and Clark–West tests in a few batched engine calls give the payloads
    the per-model calls give, byte for byte, also when the engine refuses a batch (here the first one): the
    batch is split until each part is computed or alone. Oracle: the same check with the batched stage
    switched off (common practice, no source)."""
    cfg = chunk_config(tmp_path, {})
    obs = obs_with(dict(VALUES))
    calls: list[int] = []  # models per rolling fit of the nested models (the full model's k is larger)
    real = drift.engine.rolling_coefficients
    k_nested = 9  # the model's 10 columns (const, trend, 3 Fourier pairs, 2 drivers) less the driver left out

    def counted(y: Any, X: Any, window: int, **kw: Any) -> Any:
        rows = np.shape(y)[0] if np.ndim(y) == 2 else 1
        if np.shape(X)[-1] == k_nested:
            calls.append(rows)
            if rows == 6 and calls.count(6) == 1:
                raise np.linalg.LinAlgError("refused")
        return real(y, X, window, **kw)

    monkeypatch.setattr(drift.engine, "rolling_coefficients", counted)
    batched, errors = run_chunk(cfg, obs)
    # 3 models x 2 drivers: refused, then split in halves (1 model, then 2 models) until each part is fitted
    assert calls == [6, 2, 4]
    calls.clear()
    monkeypatch.setattr(drift.check, "_worth_batched", lambda ctxs: None)
    single, errors_single = run_chunk(cfg, obs)
    assert errors == errors_single == {}
    assert json.dumps(batched, sort_keys=True, default=json_default) == json.dumps(single, sort_keys=True, default=json_default)
    assert calls == [2, 2, 2]
    assert all("worth" in dr for p in batched for dr in p["drivers"])
