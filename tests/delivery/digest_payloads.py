"""Hand-built, invented check payloads for the chart and digest tests (no real data)."""

from __future__ import annotations

import copy
from datetime import date, timedelta
from typing import Any

import numpy as np

N_REF = 156
N_MON = 104
START = date(2021, 1, 4)


def _r(x: float) -> float:
    return round(float(x), 6)


def make_payload(name: str = "k000", verdict: str = "refit", *, seed: int = 7, as_of: str = "2025-12-29",
                 late: bool = True) -> dict[str, Any]:
    """A full payload in the format of the per-model check (invented numbers, seeded)."""
    rng = np.random.default_rng(seed)
    n = N_REF + N_MON
    periods = [(START + timedelta(weeks=i)).isoformat() for i in range(n)]
    k = 4
    # CUSUM: random walk that drifts upward after a break 46 weeks into monitoring
    steps = rng.normal(0, 1, n - k) / np.sqrt(N_REF)
    steps[N_REF + 30 - k:] += 2.5 / np.sqrt(N_REF)
    path: list[float | None] = [None] * k + [_r(x) for x in np.cumsum(steps)]
    j = np.arange(n, dtype=float)
    b05 = [None] * k + [_r(0.948 * (1 + 2 * (t - k) / (N_REF - k))) for t in j[k:]]
    b01 = [None] * k + [_r(1.143 * (1 + 2 * (t - k) / (N_REF - k))) for t in j[k:]]
    alarm_idx = next((i for i in range(k, n) if abs(path[i]) > b05[i]), None)  # type: ignore[operator]
    alarm = periods[alarm_idx] if alarm_idx is not None else None
    coef = 2.0 + np.concatenate([rng.normal(0, 0.05, N_REF + 46), np.linspace(0, -1.2, N_MON - 46)])
    coef_l = [None] * 52 + [_r(c) for c in coef[52:]]
    lower = [None] * 52 + [_r(c - 0.35) for c in coef[52:]]
    upper = [None] * 52 + [_r(c + 0.35) for c in coef[52:]]
    coef2 = 0.5 + rng.normal(0, 0.04, n)
    season = 10 * np.sin(2 * np.pi * j / 52)
    actual = 100 + season + rng.normal(0, 3, n)
    forecast = [None] * N_REF + [_r(a + rng.normal(0, 2) + (0 if i < N_REF + 46 else 6))
                                 for i, a in enumerate(actual) if i >= N_REF]
    baseline = [None] * N_REF + [_r(100 + s) for s in season[N_REF:]]
    lags = list(range(9))
    feed_periods = [(date(2025, 10, 6) + timedelta(weeks=i)).isoformat() for i in range(8)]
    feed_avail = [f"{(date(2025, 10, 13) + timedelta(weeks=i, days=int(rng.integers(0, 3)))).isoformat()}"
                  "T00:00:00+00:00" for i in range(8)]
    promo_periods = [(date(2025, 10, 6) + timedelta(weeks=i)).isoformat() for i in range(12)]
    promo_avail = [f"{(date(2025, 10, 13) + timedelta(weeks=i)).isoformat()}T06:00:00+00:00" for i in range(12)]
    return {
        "name": name, "verdict": verdict, "as_of": as_of, "target": f"{name}_units", "unit": "units",
        "frequency": "W", "reference": {"start": "2021-01-04", "end": "2023-12-25"},
        "monitor_start": "2024-01-01",
        "actions": [
            {"action": "refit", "severity": "act", "since": "2024-11-04",
             "reason": "The forecast errors have drifted upward since November 2024."},
            {"action": "data-late", "severity": "act", "driver": f"{name}_temp", "last_period": "2025-11-24",
             "reason": f"No value of {name}_temp has arrived for two periods."},
        ] if verdict != "keep" else [],
        "alarms": [{"test": "cusum", "date": alarm, "statistic": 1.9, "threshold": 1.7, "level": 0.05}]
        if verdict != "keep" else [],
        "tests": [{"test": "cusum", "statistic": 1.2, "pvalue": 0.03, "threshold": 0.948, "level": 0.05,
                   "date": alarm},
                  {"test": "chow", "statistic": 3.1, "pvalue": 0.2, "threshold": 3.9, "level": 0.05,
                   "date": None}],
        "drivers": [
            {"series": f"{name}_promo", "lag": 1, "form": "lagged", "coef_reference": 2.01, "coef_recent": 1.1,
             "ci_recent": [0.7, 1.5], "last_period": "2025-12-22", "next_due": "2026-01-05T00:00:00+00:00",
             "late": False},
            {"series": f"{name}_temp", "lag": 2, "form": "lagged", "coef_reference": 0.5, "coef_recent": 0.49,
             "ci_recent": [0.4, 0.6], "last_period": "2025-11-24", "next_due": "2025-12-08T00:00:00+00:00",
             "late": late},
        ],
        "accuracy": {"model": {"mae": 4.1, "rmse": 5.0, "mase": 0.8, "bias": 0.2, "n": 52},
                     "baseline": {"mae": 5.3, "rmse": 6.4, "mase": 1.0, "bias": -0.1, "n": 52}},
        "charts": {
            "periods": periods,
            "monitor_start_index": N_REF,
            "cusum": {"path": path, "bounds": {"0.05": b05, "0.01": b01}, "alarm_date": alarm},
            # the monitor that raised the alarm, with its own boundary (here: the same invented path)
            "monitor": {"test": "monitor-cusum", "title": "The recursive-CUSUM monitor", "path": path,
                        "boundary": b05, "level": 0.0125, "alarm_date": alarm},
            "coefficients": {
                f"{name}_promo": {"coef": coef_l, "lower": lower, "upper": upper, "reference": 2.01, "window": 52},
                f"{name}_temp": {"coef": [None] * 52 + [_r(c) for c in coef2[52:]],
                                 "lower": [None] * 52 + [_r(c - 0.1) for c in coef2[52:]],
                                 "upper": [None] * 52 + [_r(c + 0.1) for c in coef2[52:]],
                                 "reference": 0.5, "window": 52},
            },
            "forecast": {"actual": [_r(a) for a in actual], "forecast": forecast, "baseline": baseline},
            "lag_profile": {
                f"{name}_promo": {"lags": lags,
                                  "reference": [0.05, 0.62, 0.3, 0.1, 0.02, -0.04, 0.03, 0.0, -0.02],
                                  "recent": [0.04, 0.2, 0.25, 0.48, 0.1, 0.02, -0.05, 0.06, 0.01],
                                  "band_reference": 0.16, "band_recent": 0.27, "current_lag": 1},
            },
            "feeds": {
                f"{name}_temp": {"periods": feed_periods, "available_at": feed_avail,
                                 "next_due": "2025-12-08T00:00:00+00:00", "late": late},
                f"{name}_promo": {"periods": promo_periods, "available_at": promo_avail,
                                  "next_due": "2026-01-05T00:00:00+00:00", "late": False},
            },
        },
    }


def without(payload: dict[str, Any], *chart_kinds: str) -> dict[str, Any]:
    out = copy.deepcopy(payload)
    for kind in chart_kinds:
        out["charts"].pop(kind, None)
    return out
