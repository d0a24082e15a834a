"""h-step as-deployed replay (drift.replay): the forecast of period t made at the start of t - h + 1 with
the coefficients known then. Oracle: a plain per-origin least-squares refit on the rows whose targets were
known at the origin (numpy lstsq), on an invented scenario."""

from __future__ import annotations

import numpy as np
import pandas as pd

from drift import engine
from drift.config import load_config
from drift.panel import build_design
from drift.replay import h_step_errors

CFG = """\
models:
  - name: m
    target: y
    frequency: W
    horizon: 3
    drivers:
      - {series: x, lag: 3, form: lagged}
    reference: {start: 2022-01-03, end: 2022-12-26}
    preprocess: {trend: linear, season: none}
"""


def test_h_step_errors_match_per_origin_refits(tmp_path) -> None:
    (tmp_path / "c.yaml").write_text(CFG, encoding="utf-8")
    cfg = load_config(tmp_path / "c.yaml")
    rng = np.random.default_rng(9)  # invented scenario
    weeks = pd.date_range("2022-01-03", periods=90, freq="7D")
    x = rng.normal(size=90)
    y = 3 + 0.01 * np.arange(90) + 2 * np.r_[np.zeros(3), x[:-3]] + rng.normal(0, 0.3, 90)
    rows = [("y", w, v) for w, v in zip(weeks, y)] + [("x", w, v) for w, v in zip(weeks, x)]
    obs = pd.DataFrame(rows, columns=["series", "period", "value"])
    obs["issued_at"] = pd.NaT
    obs["available_at"] = (obs["period"] + pd.Timedelta(days=7)).dt.tz_localize("UTC")
    as_of = pd.Timestamp("2024-01-01", tz="UTC")
    m = cfg.models[0]
    d = build_design(cfg, m, obs, as_of)
    rf = engine.recursive_fit(d.y, d.X)
    e = h_step_errors(cfg, m, obs, as_of, d, rf.coef, 3)
    for t in range(30, d.n):
        ok = np.isfinite(d.y[: t - 2]) & np.isfinite(d.X[: t - 2]).all(axis=1)  # rows up to t - 3
        b, *_ = np.linalg.lstsq(d.X[: t - 2][ok], d.y[: t - 2][ok], rcond=None)
        assert e[t] == np.float64(d.y[t] - d.X[t] @ b) or abs(e[t] - (d.y[t] - d.X[t] @ b)) < 1e-8
