"""Invented scenarios for the as-deployed check tests (simulation; every generator is seeded).

Weekly data from 2021-01-04: a three-year reference period (2021-01-04 .. 2023-12-25, 156 weeks) and a
monitoring period after it. The target is

    y_t = 100 + 0.3 t + 8 sin(2 pi t / 52.18) + b1(t) x1_{t - L1(t)} + b2 x2_{t - 1} + u_t,

with two drivers x1, x2 (AR(1) with phi 0.5 around a level, so their own trend/season do not matter) and
u_t iid N(0, sigma^2) or AR(1). Each value is available at the end of its week plus a delay (default 0),
as the ingest convention says for sources without an ``available_column``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from drift.config import Config, load_config

START = pd.Timestamp("2021-01-04")
REF_END = date(2023, 12, 25)
N_REF = 156
SEASON = 365.25 / 7.0
COLUMNS = ["series", "period", "issued_at", "value", "available_at", "ingested_at"]

CONFIG = """\
# invented scenario (simulation), see tests/check_scenarios.py
store: sqlite:///unused.db
{sources}models:
  - name: sim
    target: y
    unit: units
    frequency: W
    errors: {errors}
    drivers:
      - {{series: x1, lag: {lag1}, form: lagged}}
      - {{series: x2, lag: 1, form: lagged}}
    reference: {{start: 2021-01-04, end: 2023-12-25}}
check:
  level: {level}
  recent_window: {recent}
"""


@dataclass
class Scenario:
    """Parameters of one invented scenario; ``n_mon`` weeks of monitoring after the reference period."""

    seed: int
    n_mon: int = 78
    b1: float = 2.0
    b2: float = 1.5
    b1_after: float | None = None  # x1 effect from ``change_at`` on
    lag1: int = 1
    lag1_after: int | None = None  # x1 lag from ``change_at`` on
    change_at: int | None = None  # row (week index) of the first observation of the new regime
    sigma: float = 1.0
    error_phi: float = 0.0
    x_sd: float = 3.0
    stop_x1_after: int | None = None  # last row with an x1 value (the feed stops after it)
    extra: dict[str, float] = field(default_factory=dict)

    @property
    def n(self) -> int:
        return N_REF + self.n_mon


def simulate(sc: Scenario) -> tuple[pd.DatetimeIndex, dict[str, np.ndarray]]:
    """Periods and the final values of y, x1, x2 (NaN where a value does not exist)."""
    rng = np.random.default_rng(sc.seed)
    n = sc.n
    pad = 10
    periods = pd.date_range(START, periods=n, freq="7D")
    x = {}
    for s in ("x1", "x2"):
        e = rng.normal(0.0, sc.x_sd, n + pad)
        v = np.zeros(n + pad)
        for i in range(1, n + pad):
            v[i] = 0.5 * v[i - 1] + e[i]
        x[s] = 20.0 + v  # x[s][i + pad] is the value of row i; negative rows exist as pre-sample
    eps = rng.normal(0.0, sc.sigma, n)
    u = np.zeros(n)
    for i in range(n):
        u[i] = (sc.error_phi * u[i - 1] if i else 0.0) + eps[i]
    t = np.arange(n, dtype=float)
    b1 = np.full(n, sc.b1)
    lag1 = np.full(n, sc.lag1)
    if sc.change_at is not None:
        if sc.b1_after is not None:
            b1[sc.change_at:] = sc.b1_after
        if sc.lag1_after is not None:
            lag1[sc.change_at:] = sc.lag1_after
    x1l = x["x1"][pad + np.arange(n) - lag1]
    x2l = x["x2"][pad + np.arange(n) - 1]
    y = 100.0 + 0.3 * t + 8.0 * np.sin(2 * np.pi * t / SEASON) + b1 * x1l + sc.b2 * x2l + u
    x1 = x["x1"][pad:].copy()
    if sc.stop_x1_after is not None:
        x1[sc.stop_x1_after + 1:] = np.nan
    return periods, {"y": y, "x1": x1, "x2": x["x2"][pad:]}


def observations(periods: pd.DatetimeIndex, values: dict[str, np.ndarray],
                 delay: timedelta = timedelta(0)) -> pd.DataFrame:
    """One vintage per value, available at the end of its week plus ``delay`` (UTC)."""
    rows = []
    for s, v in values.items():
        ok = np.isfinite(v)
        p = periods[ok]
        avail = (p + pd.Timedelta(days=7) + pd.Timedelta(delay)).tz_localize("UTC")
        rows.append(pd.DataFrame({"series": s, "period": p, "issued_at": pd.NaT, "value": v[ok],
                                  "available_at": avail, "ingested_at": avail}))
    df = pd.concat(rows, ignore_index=True)
    df["issued_at"] = pd.to_datetime(df["issued_at"], utc=True)
    return df[COLUMNS]


def known_by(obs: pd.DataFrame, moment: datetime) -> pd.DataFrame:
    """What the store would return at ``moment`` (available_at <= moment)."""
    return obs[obs["available_at"] <= pd.Timestamp(moment)].reset_index(drop=True)


def config(tmp_path: Path, *, errors: str = "ols", lag1: int = 1, level: float = 0.05,
           recent: int = 52, csv: bool = False) -> Config:
    """The scenario's config, written to ``tmp_path`` and loaded like a user's file.

    ``csv=True`` adds a source ``sim`` reading ``data.csv`` (wide: week, y, x1, x2; see :func:`write_csv`).
    """
    path = tmp_path / "drift.yaml"
    sources = ("sources:\n  - {name: sim, kind: csv, path: data.csv, period_column: week}\n" if csv else "")
    path.write_text(CONFIG.format(errors=errors, lag1=lag1, level=level, recent=recent, sources=sources),
                    encoding="utf-8")
    return load_config(path)


def write_csv(tmp_path: Path, periods: pd.DatetimeIndex, values: dict[str, np.ndarray]) -> Path:
    """The scenario as the wide CSV file of :func:`config` with ``csv=True`` (empty cell = no value)."""
    path = tmp_path / "data.csv"
    pd.DataFrame({"week": [p.date().isoformat() for p in periods], **values}).to_csv(path, index=False)
    return path


def end_moment(periods: pd.DatetimeIndex) -> datetime:
    """The moment just after the last period's value became available (delay 0)."""
    last = periods[-1] + pd.Timedelta(days=7)
    return datetime(last.year, last.month, last.day, 12, tzinfo=timezone.utc)
