"""Production coefficients (``deployed:``) replayed at each origin: the as-deployed errors are exactly
y − x'b, the ARMA-error version is the filter scipy computes, the gap to drift's re-estimate is the
statsmodels OLS fit, and a misnamed coefficient is a config error.

Invented scenario (simulation, seeded): weekly from 2021-01-04, y = 100 + 0.05 t + 2 x1_{t-1} + 1.5 x2_{t-1}
+ N(0, 1); the drivers start a week before y, so every design row is complete.
"""

from __future__ import annotations

from datetime import date, datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from drift.check import analyse
from drift.cli import cli
from drift.config import load_config
from drift.deployed import as_deployed_errors, coefficient_vector, expected_terms
from drift.epochs import apply_epoch, configured
from drift.panel import build_design
from tests.test_decisions import scenario

#: the production coefficients (a fit made elsewhere: close to, not equal to, drift's re-estimate)
B = {"const": 99.0, "trend": 7.9, "x1": 2.02, "x2": 1.48}

CONFIG = """\
# invented scenario (simulation), see tests/test_deployed.py
store: sqlite:///drift.db
models:
  - name: sim
    target: y
    frequency: W
    preprocess: {{season: none}}
    drivers:
      - {{series: x1, lag: 1}}
      - {{series: x2, lag: 1}}
    reference: {{start: 2021-01-04, end: 2023-12-25}}
    deployed:
      coefficients: {coefficients}
{errors}check:
  recent_window: 26
"""


def write(tmp_path: Path, coefficients: str = "{const: 99.0, trend: 7.9, x1: 2.02, x2: 1.48}",
          errors: str = "") -> Path:
    path = tmp_path / "drift.yaml"
    path.write_text(CONFIG.format(coefficients=coefficients, errors=errors), encoding="utf-8")
    return path


def observations(df: pd.DataFrame) -> pd.DataFrame:
    """One vintage per value, available at the end of its week (the ingest convention without a delay)."""
    rows = []
    for s in ("y", "x1", "x2"):
        ok = df[s].notna()
        p = pd.to_datetime(df.loc[ok, "week"])
        at = (p + pd.Timedelta(days=7)).dt.tz_localize("UTC")
        rows.append(pd.DataFrame({"series": s, "period": p, "issued_at": pd.NaT, "value": df.loc[ok, s].to_numpy(),
                                  "available_at": at, "ingested_at": at}))
    out = pd.concat(rows, ignore_index=True)
    out["issued_at"] = pd.to_datetime(out["issued_at"], utc=True)
    return out


AS_OF = datetime(2024, 12, 31, tzinfo=timezone.utc)


def by_hand(df: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """y and y − x'b built here from the raw series (not drift's panel), up to the check date."""
    rows = df.iloc[1:].reset_index(drop=True)
    known = pd.to_datetime(rows["week"]) + pd.Timedelta(days=7) <= pd.Timestamp(AS_OF.replace(tzinfo=None))
    rows = rows[known]
    t = np.arange(len(rows), dtype=float)
    x1 = df["x1"].to_numpy()[: len(rows)]
    x2 = df["x2"].to_numpy()[: len(rows)]
    y = rows["y"].to_numpy()
    return y, y - (B["const"] + B["trend"] * t / 156 + B["x1"] * x1 + B["x2"] * x2)


def test_the_as_deployed_errors_are_y_minus_x_b(tmp_path: Path) -> None:
    """Known-answer: the replayed errors equal y − x'b to 1e-12 (common practice, no source: the definition)."""
    cfg = load_config(write(tmp_path))
    model = cfg.models[0]
    df = scenario()
    obs = observations(df)
    d = build_design(cfg, model, obs, pd.Timestamp(AS_OF))
    b = coefficient_vector(model, 1, d)
    assert b.tolist() == [B["const"], B["trend"], B["x1"], B["x2"]]
    e = as_deployed_errors(model, d.y, d.X, b)
    y, want = by_hand(df)
    assert len(e) == len(want)
    np.testing.assert_allclose(d.y, y, rtol=0, atol=1e-12)
    np.testing.assert_allclose(e, want, rtol=0, atol=1e-12)

    # the check scores these errors, and shows the deployed coefficients as the reference
    payloads, errors = analyse(cfg, [model], obs, AS_OF)
    assert errors == {}
    (p,) = payloads
    mon = np.arange(d.n) >= d.n_ref
    recent = np.where(mon, want, np.nan)[-26:]
    assert p["accuracy"]["model"]["mae"] == round(float(np.nanmean(np.abs(recent))), 4)
    assert p["accuracy"]["model"]["n"] == int(np.isfinite(recent).sum())
    fc = np.array([np.nan if v is None else v for v in p["charts"]["forecast"]["forecast"]])
    np.testing.assert_allclose(fc[mon], (y - want)[mon], atol=1e-6)
    assert {dr["series"]: dr["coef_reference"] for dr in p["drivers"]} == {"x1": B["x1"], "x2": B["x2"]}


def test_the_gap_to_the_reestimate_is_the_reference_ols_fit(tmp_path: Path) -> None:
    """drift's re-estimate and its standard errors against statsmodels OLS (statsmodels 0.14/0.15
    ``OLS.fit().params`` / ``.bse``) on the reference rows, built from the raw series."""
    import statsmodels.api as sm

    cfg = load_config(write(tmp_path))
    df = scenario()
    (p,), _ = analyse(cfg, cfg.models, observations(df), AS_OF)
    rows = df.iloc[1:157].reset_index(drop=True)
    t = np.arange(156, dtype=float)
    X = np.column_stack([np.ones(156), t / 156, df["x1"].to_numpy()[:156], df["x2"].to_numpy()[:156]])
    fit = sm.OLS(rows["y"].to_numpy(), X).fit()
    gap = {g["term"]: g for g in p["deployed"]["coefficients"]}
    for j, term in enumerate(["const", "trend", "x1", "x2"]):
        assert gap[term]["deployed"] == B[term]
        assert gap[term]["reestimated"] == pytest.approx(fit.params[j], abs=2e-6)
        assert gap[term]["se"] == pytest.approx(fit.bse[j], abs=2e-6)
        assert gap[term]["gap"] == pytest.approx(B[term] - fit.params[j], abs=2e-6)
    assert p["deployed"]["reestimated_on"] == {"start": "2021-01-04", "end": "2023-12-25"}


def test_arma_errors_replay_as_the_filter_scipy_computes(tmp_path: Path) -> None:
    """With ``errors: {ar: [0.6], ma: [0.3]}`` the one-step errors are ε_t = u_t − 0.6 u_{t−1} − 0.3 ε_{t−1},
    u = y − x'b, started with ε = 0 before the first full row: scipy.signal.lfilter with lfiltic initial
    conditions (scipy 1.x) on the same u."""
    from scipy.signal import lfilter, lfiltic

    cfg = load_config(write(tmp_path, errors="      errors: {ar: [0.6], ma: [0.3]}\n"))
    model = cfg.models[0]
    df = scenario()
    d = build_design(cfg, model, observations(df), pd.Timestamp(AS_OF))
    e = as_deployed_errors(model, d.y, d.X, coefficient_vector(model, 1, d))
    _, u = by_hand(df)
    b, a = [1.0, -0.6], [1.0, 0.3]
    want = lfilter(b, a, u[1:], zi=lfiltic(b, a, y=[0.0], x=[u[0]]))[0]
    assert np.isnan(e[0])
    np.testing.assert_allclose(e[1:], want, rtol=0, atol=1e-10)


def test_coefficient_names_are_checked_when_the_config_is_read(tmp_path: Path) -> None:
    r = CliRunner().invoke(cli, ["check", "--config", str(write(tmp_path, "{const: 99, trend: 7.9, x1: 2, xx2: 1.5}"))])
    assert r.exit_code == 2
    assert "'xx2' (did you mean 'x2'?) is not a column of model 'sim'" in r.stderr
    assert "key 'models[0].deployed.coefficients'" in r.stderr
    r = CliRunner().invoke(cli, ["check", "--config", str(write(tmp_path, "{const: 99, x1: 2, x2: 1.5}"))])
    assert r.exit_code == 2 and "no deployed coefficient for trend" in r.stderr


def test_expected_terms_follow_the_design_columns(tmp_path: Path) -> None:
    """The documented names are the design's own column names (fourier terms, target lags)."""
    path = tmp_path / "f.yaml"
    path.write_text(CONFIG.format(coefficients="{const: 1}", errors="").replace("preprocess: {season: none}",
                    "preprocess: {harmonics: 2}\n    target_lags: [1]").replace(
        "      coefficients: {const: 1}\n", "      coefficients: {const: 1, trend: 0, sin1: 0, cos1: 0, sin2: 0, "
                                           "cos2: 0, x1: 2, x2: 1.5, 'y[L1]': 0.1}\n"), encoding="utf-8")
    cfg = load_config(path)
    model = cfg.models[0]
    must, _ = expected_terms(model)
    df = scenario()
    d = build_design(cfg, model, observations(df), pd.Timestamp(AS_OF))
    by_col = {j: s for s, j in d.driver_columns.items()}
    assert must == [by_col.get(j, c) for j, c in enumerate(d.columns)]


def test_coefficients_belong_to_their_epoch(tmp_path: Path) -> None:
    cfg = load_config(write(tmp_path))
    model = cfg.models[0]
    assert apply_epoch(model, configured(model)).deployed is not None
    later = configured(model).__class__(model="sim", number=2, action="refit", effective=date(2024, 12, 31),
                                        decided_by="alice", recorded_at=None, note=None,
                                        reference=(date(2024, 3, 4), date(2024, 12, 23)))
    assert apply_epoch(model, later).deployed is None
