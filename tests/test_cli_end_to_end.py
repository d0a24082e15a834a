"""The minimum config, end to end through the CLI: ingest, then check --json (invented data).

Three years of reference plus two years of monitoring weekly data for one kiosk; the promo effect halves
from 2024-11-04 (invented scenario). Checks the JSON contract of `drift check --json`.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tests.test_config import MINIMUM


def kiosk_data(folder: Path, *, seed: int = 7, break_on: str | None = "2024-11-04") -> None:
    rng = np.random.default_rng(seed)
    weeks = pd.date_range("2021-01-04", "2025-12-22", freq="7D")
    n = len(weeks)
    t = np.arange(n)
    promo = rng.gamma(2.0, 5.0, n)
    temp = 12 + 8 * np.sin(2 * np.pi * t / 52.18) + rng.normal(0, 2, n)
    beta = np.full(n, 2.0)
    if break_on:
        beta[weeks >= pd.Timestamp(break_on)] = 1.0
    units = 300 + 0.3 * t + 20 * np.cos(2 * np.pi * t / 52.18) + np.r_[np.nan, beta[1:] * promo[:-1]] \
        + np.r_[np.nan, 1.5 * temp[:-1]] + rng.normal(0, 4, n)
    folder.mkdir(parents=True, exist_ok=True)
    df = pd.DataFrame({"week": weeks.date.astype(str), "k000_units": np.round(units, 1),
                       "k000_promo": np.round(promo, 2), "k000_temp": np.round(temp, 1)}).iloc[1:]
    # split in two files to exercise the glob
    df.iloc[:150].to_csv(folder / "part1.csv", index=False)
    df.iloc[150:].to_csv(folder / "part2.csv", index=False)


def run(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "drift.cli", *args], capture_output=True, text=True, check=False,
                          cwd=cwd, timeout=300)


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    kiosk_data(tmp_path / "data")
    (tmp_path / "drift.yaml").write_text(MINIMUM, encoding="utf-8")
    return tmp_path


def test_ingest_then_check_json(project: Path) -> None:
    r = run("ingest", "--config", "drift.yaml", cwd=project)
    assert r.returncode == 0, r.stderr
    assert "quarantined" in r.stdout
    r = run("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--json", cwd=project)
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)  # stdout is one JSON object and nothing else
    assert out["as_of"] == "2025-12-31"
    (m,) = out["models"]
    assert m["name"] == "k000"
    assert m["verdict"] in {"keep", "refit", "relag", "drop-driver", "data-late", "watch"}
    assert isinstance(m["actions"], list) and isinstance(m["alarms"], list)
    assert m["verdict"] == "refit", m["actions"]
    refit = next(a for a in m["actions"] if a["action"] == "refit")
    assert set(refit) >= {"action", "since", "reason"}
    assert "2024-10-01" <= refit["since"] <= "2024-12-31"
    for a in m["alarms"]:
        assert set(a) >= {"test", "date", "statistic", "threshold"}
    drivers = {d["series"]: d for d in m["drivers"]}
    assert set(drivers) == {"k000_promo", "k000_temp"}
    for d in drivers.values():
        assert set(d) >= {"series", "lag", "coef_reference", "coef_recent"}
    assert abs(drivers["k000_promo"]["coef_reference"] - 2.0) < 0.15
    assert "charts" not in m


def test_check_healthy_keeps_and_table_output(tmp_path: Path) -> None:
    kiosk_data(tmp_path / "data", seed=11, break_on=None)
    (tmp_path / "drift.yaml").write_text(MINIMUM, encoding="utf-8")
    assert run("ingest", "--config", "drift.yaml", cwd=tmp_path).returncode == 0
    r = run("check", "--config", "drift.yaml", "--as-of", "2025-12-31", cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert "k000  →  keep: no change found" in r.stdout
    assert "statistical evidence, not certainty" in r.stdout


def test_reingest_is_noop_and_as_of_filters(project: Path) -> None:
    assert run("ingest", "--config", "drift.yaml", cwd=project).returncode == 0
    r = run("ingest", "--config", "drift.yaml", cwd=project)
    assert r.returncode == 0, r.stderr
    assert "0 new, 0 revised, 777 already known, 0 quarantined" in r.stdout, r.stdout
    # as of a date inside the reference period there is nothing to monitor: no refit
    r = run("check", "--config", "drift.yaml", "--as-of", "2024-06-30", "--json", cwd=project)
    assert r.returncode == 0, r.stderr
    (m,) = json.loads(r.stdout)["models"]
    assert m["verdict"] != "refit"


def test_unknown_model_is_a_usage_error(project: Path) -> None:
    r = run("check", "--config", "drift.yaml", "--model", "k00", cwd=project)
    assert r.returncode == 2 and "did you mean 'k000'" in r.stderr


def test_bad_as_of_is_a_usage_error(project: Path) -> None:
    r = run("check", "--config", "drift.yaml", "--as-of", "31/12/2025", cwd=project)
    assert r.returncode == 2 and "YYYY-MM-DD" in r.stderr
