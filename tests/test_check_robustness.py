"""Robustness sweep of the whole check (common practice, no source): constant, collinear, NaN-laden, tiny
and missing inputs give a verdict or the model's own error entry, never an exception (invented scenario,
tests/check_scenarios.py)."""

from __future__ import annotations

import numpy as np
import pytest

from drift.check import analyse
from tests.check_scenarios import Scenario, config, end_moment, known_by, observations, simulate

PERIODS, VALUES = simulate(Scenario(seed=1, n_mon=52))
N = len(PERIODS)

CASES = {
    "constant driver": {**VALUES, "x1": np.full(N, 5.0)},
    "collinear drivers": {**VALUES, "x1": VALUES["x2"].copy()},
    "two thirds of the target missing": {**VALUES, "y": np.where(np.arange(N) % 3 == 0, VALUES["y"], np.nan)},
    "only 30 weeks": {k: v[:30] for k, v in VALUES.items()},
    "a driver never loaded": {k: v for k, v in VALUES.items() if k != "x2"},
    "no target after the reference period": {**VALUES, "y": np.where(np.arange(N) < 156, VALUES["y"], np.nan)},
    "a driver all NaN in the reference": {**VALUES, "x1": np.where(np.arange(N) < 156, np.nan, VALUES["x1"])},
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_bad_inputs_give_a_verdict_or_an_error_entry(tmp_path, name: str) -> None:
    cfg = config(tmp_path)
    vals = CASES[name]
    periods = PERIODS[: len(next(iter(vals.values())))]
    moment = end_moment(PERIODS)
    out, errors = analyse(cfg, cfg.models, known_by(observations(periods, vals), moment), moment)
    assert len(out) + len(errors) == 1
    if name in ("constant driver", "collinear drivers"):
        assert "collinear" in errors.get("sim", ""), (out, errors)  # a degenerate design is never a verdict
    if errors:
        assert errors.get("sim")
    else:
        assert out[0]["verdict"] in {"keep", "watch", "refit", "relag", "drop-driver", "data-late"}
