"""As-of design matrices: a replay reads only what was available at each origin (seeded random loops).

Invented scenario (simulation): weekly series with random publication delays, revisions, forecast
vintages issued at random times and plans revised at random times. The oracle is a plain loop over rows
and vintages that applies the documented conventions of drift/panel.py literally.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from drift.config import load_config
from drift.panel import build_design

START = pd.Timestamp("2021-01-04")
N = 80
YAML = """\
# invented scenario (simulation), tests/test_panel.py
models:
  - name: m
    target: y
    frequency: W
    drivers:
      - {{series: xl, lag: {lag}, form: lagged, delay: {delay_days} days}}
      - {{series: xf, lag: {flag}, form: forecast}}
      - {{series: xk, lag: 0, form: known}}
    reference: {{start: 2021-01-04, end: 2021-12-27}}
    preprocess: {{season: none}}
"""


def _utc(ts: pd.Timestamp) -> pd.Timestamp:
    return ts.tz_localize("UTC") if ts.tzinfo is None else ts


def _random_obs(rng: np.random.Generator, delay_days: int) -> pd.DataFrame:
    """Vintages of y, xl (lagged, delayed, revised), xf (forecasts) and xk (plans); no two vintages of a
    period share a usable-from time (a batch cannot hold two values of one key)."""
    rows = []
    periods = [START + pd.Timedelta(weeks=i) for i in range(-6, N + 2)]
    hour = pd.Timedelta(hours=1)
    for p in periods:
        end = _utc(p + pd.Timedelta(days=7))
        if p >= START:
            rows.append(("y", p, pd.NaT, float(rng.normal(100, 5)), end))
        # lagged driver: first vintage up to 30 h before end + delay (the configured delay is an upper
        # bound), 0-3 revisions within 9 weeks
        t = end + pd.Timedelta(days=delay_days) - int(rng.integers(0, 30)) * hour
        for _ in range(1 + int(rng.integers(0, 4))):
            rows.append(("xl", p, pd.NaT, float(rng.normal(10, 2)), t))
            t = t + int(rng.integers(1, 24 * 7 * 3)) * hour
        # forecasts of p issued from 6 weeks before p to 1 week after; available 0-48 h after issue,
        # sometimes *before* the stated issue time (a clock skew the panel must not trust)
        n_fc = int(rng.integers(0, 5))
        issued = sorted({int(v) for v in rng.integers(-6 * 168, 168, size=n_fc)})
        for h in issued:
            it = _utc(p) + h * hour
            av = it + int(rng.integers(-3, 48)) * hour
            rows.append(("xf", p, it, float(rng.normal(50, 5)), av))
        if rng.random() < 0.3:  # a value without issue time counts as planned in advance
            rows.append(("xf", p, pd.NaT, float(rng.normal(50, 5)), _utc(p) + int(rng.integers(-500, 500)) * hour
                         + pd.Timedelta(minutes=1)))
        # plans of p, revised at random times (some after p)
        for h in sorted({int(v) for v in rng.integers(-20 * 168, 4 * 168, size=1 + int(rng.integers(0, 3)))}):
            rows.append(("xk", p, pd.NaT, float(rng.integers(0, 2)), _utc(p) + h * hour + pd.Timedelta(minutes=2)))
    df = pd.DataFrame(rows, columns=["series", "period", "issued_at", "value", "available_at"])
    df["issued_at"] = pd.to_datetime(df["issued_at"], utc=True)
    df["available_at"] = pd.to_datetime(df["available_at"], utc=True)
    df["ingested_at"] = df["available_at"]
    return df


def _oracle(obs: pd.DataFrame, series: str, form: str, period: pd.Timestamp, origin: pd.Timestamp) -> float:
    """The documented rule, by a plain loop."""
    v = obs[(obs["series"] == series) & (obs["period"] == period)]
    best, best_t = np.nan, None
    for r in v.itertuples():
        usable = r.available_at
        if form == "forecast" and pd.notna(r.issued_at):
            usable = max(r.issued_at, r.available_at)
        if usable <= origin and (best_t is None or usable > best_t):
            best, best_t = r.value, usable
    if best_t is None and form in ("known", "forecast"):
        if form == "forecast" and v["issued_at"].notna().any():
            cand = [r for r in v.itertuples() if pd.isna(r.issued_at)]  # only plain values count as planned
        else:
            cand = list(v.itertuples())
        if cand:
            best = min(cand, key=lambda r: r.available_at).value
    return float(best)


@pytest.mark.parametrize("seed", range(12))
def test_replay_reads_only_what_was_available_at_each_origin(tmp_path, seed):
    # invented scenario (simulation), seeded random vintages, delays, revisions and horizons
    rng = np.random.default_rng(9000 + seed)
    delay_days = int(rng.integers(0, 10))
    lag = 1 + -(-delay_days // 7) + int(rng.integers(0, 2))  # the shortest lag the config allows, or one more
    flag = int(rng.integers(0, 3))
    horizon = int(rng.integers(1, 4))
    path = tmp_path / "drift.yaml"
    path.write_text(YAML.format(lag=lag, delay_days=delay_days, flag=flag), encoding="utf-8")
    cfg = load_config(path)
    model = cfg.models[0]
    obs_all = _random_obs(rng, delay_days)
    as_of = _utc(START + pd.Timedelta(weeks=N - 3, hours=5))
    obs = obs_all[obs_all["available_at"] <= as_of].reset_index(drop=True)  # what the store returns
    d = build_design(cfg, model, obs, as_of, horizon=horizon)
    assert d.lags == {"xl": lag, "xf": flag, "xk": 0}
    stale = dict.fromkeys(("xl", "xf", "xk"), 0)  # rows where the as-of value is not the final vintage
    for t, period in enumerate(d.periods):
        origin = _utc(period - pd.Timedelta(weeks=horizon - 1))
        for series, form, L in (("xl", "lagged", lag), ("xf", "forecast", flag), ("xk", "known", 0)):
            want = _oracle(obs, series, form, period - pd.Timedelta(weeks=L), origin)
            got = d.X[t, d.driver_columns[series]]
            assert (np.isnan(want) and np.isnan(got)) or want == got, (seed, t, series, want, got)
            fin = obs[(obs["series"] == series) & (obs["period"] == period - pd.Timedelta(weeks=L))]
            if len(fin) and np.isfinite(got):
                stale[series] += got != fin.sort_values("available_at")["value"].iloc[-1]
        # the target: its latest vintage known at the check
        yv = obs[(obs["series"] == "y") & (obs["period"] == period)]
        want_y = float(yv.sort_values("available_at")["value"].iloc[-1]) if len(yv) else np.nan
        assert (np.isnan(want_y) and np.isnan(d.y[t])) or want_y == d.y[t]
    # the scenario really exercises the as-of rule: revisions, later forecasts and re-plans exist (with
    # h > 1 a short-lag lagged driver is simply not known yet at the origin: NaN rows, checked above)
    assert stale["xf"] > 0 and stale["xk"] > 0, stale
    if horizon == 1:
        assert stale["xl"] > 0, stale


def test_future_vintages_do_not_change_the_replay(tmp_path):
    # invented scenario (simulation): values that become available after the check moment, and revisions
    # that arrive after each row's origin, leave the replayed regressors unchanged
    rng = np.random.default_rng(9100)
    path = tmp_path / "drift.yaml"
    path.write_text(YAML.format(lag=2, delay_days=3, flag=1), encoding="utf-8")
    cfg = load_config(path)
    obs = _random_obs(rng, 3)
    as_of = _utc(START + pd.Timedelta(weeks=N - 3))
    base = obs[obs["available_at"] <= as_of].reset_index(drop=True)
    d0 = build_design(cfg, cfg.models[0], base, as_of)
    # a wild revision of every lagged-driver value, arriving one hour after the origin of the row using it
    late = []
    for t, period in enumerate(d0.periods):
        late.append(("xl", period - pd.Timedelta(weeks=2), pd.NaT, 1e9, _utc(period) + pd.Timedelta(hours=1)))
    extra = pd.DataFrame(late, columns=["series", "period", "issued_at", "value", "available_at"])
    extra["issued_at"] = pd.to_datetime(extra["issued_at"], utc=True)
    extra["ingested_at"] = extra["available_at"]
    more = pd.concat([base, extra[extra["available_at"] <= as_of]], ignore_index=True)
    d1 = build_design(cfg, cfg.models[0], more, as_of)
    j = d0.driver_columns["xl"]
    np.testing.assert_array_equal(d0.X[:, j], d1.X[:, j])
    assert not (d1.X[:, j] == 1e9).any()


def test_calendar_season_positions_do_not_drift(tmp_path) -> None:
    # common practice, no source: weekly seasonal dummies by ISO week, so a 365.25-day year does not drift
    # against a fixed 52-week cycle; monthly by calendar month
    from drift.config import load_config
    from drift.panel import season_position

    (tmp_path / "c.yaml").write_text(
        "models:\n  - name: m\n    target: y\n    frequency: W\n    reference: {start: 2021-01-04, end: 2023-12-25}\n"
        "    preprocess: {method: dummies}\n", encoding="utf-8")
    m = load_config(tmp_path / "c.yaml").models[0]
    weeks = pd.date_range("2021-01-04", "2026-12-28", freq="7D")
    pos, n = season_position(m, weeks)
    assert n == 52
    iso = np.asarray(weeks.isocalendar().week, dtype=int)
    assert np.array_equal(pos, np.minimum(iso, 52) - 1) and pos.max() == 51
    # the week containing 15 June lands within one position of itself every year (no drift)
    june = [i for i, w in enumerate(weeks) if w.month == 6 and w.day <= 15 < w.day + 7]
    assert max(pos[i] for i in june) - min(pos[i] for i in june) <= 1
    months = pd.date_range("2021-01-01", periods=30, freq="MS")
    mm = m.model_copy(update={"frequency": "M"})
    pos_m, n_m = season_position(mm, months)
    assert n_m == 12 and list(pos_m[:13]) == [*range(12), 0]


BATCH_YAML = """\
# invented scenario (simulation), tests/test_panel.py
models:
  - name: a
    target: a_y
    frequency: W
    drivers:
      - {series: a_xl, lag: 2, delay: 3 days}
      - {series: a_xf, lag: 1, form: forecast}
      - {series: a_xk, lag: 0, form: known}
    target_lags: [1, 3]
    reference: {start: 2021-01-04, end: 2021-12-27}
  - name: b
    target: b_y
    frequency: W
    drivers:
      - {series: b_xl, lag: 1}
      - {series: a_xl, lag: 2}
    reference: {start: 2021-02-01, end: 2021-10-25}
    preprocess: {method: dummies, trend: none}
  - name: c
    target: c_y
    frequency: W
    drivers:
      - {series: c_xl, lag: 3, delay: 3 days}
    reference: {start: 2021-01-04, end: 2021-12-27}
    preprocess: {season: none}
  - name: lost
    target: nowhere
    frequency: W
    drivers:
      - {series: a_xl, lag: 1}
    reference: {start: 2021-01-04, end: 2021-12-27}
"""


def _batch_obs(rng: np.random.Generator) -> pd.DataFrame:
    """Three models' vintages (from :func:`_random_obs`), shuffled, with ties: a few vintages repeated with
    another value at the same available time (the later stored row wins)."""
    parts = []
    for name in ("a", "b", "c"):
        df = _random_obs(rng, 3)
        df["series"] = name + "_" + df["series"]
        parts.append(df)
    obs = pd.concat(parts, ignore_index=True)
    ties = obs[obs["series"].isin(["a_xl", "b_y", "a_y"])].sample(n=40, random_state=int(rng.integers(1 << 30)))
    ties = ties.assign(value=ties["value"] + 1000.0)
    obs = pd.concat([obs, ties], ignore_index=True)
    return obs.sample(frac=1.0, random_state=int(rng.integers(1 << 30))).reset_index(drop=True)


@pytest.mark.parametrize("seed", range(4))
def test_designs_built_together_are_those_built_one_at_a_time(tmp_path, seed):
    # oracle: build_designs (the chunk's as-of selections in a few sorted searches) against build_design
    # per model, field for field; invented scenario (simulation), seeded
    from drift.panel import SeriesVintages, build_designs

    rng = np.random.default_rng(9200 + seed)
    (tmp_path / "drift.yaml").write_text(BATCH_YAML, encoding="utf-8")
    cfg = load_config(tmp_path / "drift.yaml")
    obs = _batch_obs(rng)
    as_of = _utc(START + pd.Timedelta(weeks=N - 3 - int(rng.integers(0, 10)), hours=5))
    # what the store returns, and plans of the coming periods loaded after the fact (available later)
    obs = obs[(obs["available_at"] <= as_of) | (obs["series"] == "a_xk")].reset_index(drop=True)
    got = build_designs(cfg, cfg.models, SeriesVintages(obs), as_of)
    assert sorted(got) == ["a", "b", "c"]  # 'lost' has no target: left to build_design, which says why
    for m in cfg.models[:3]:
        want = build_design(cfg, m, obs[obs["series"].isin(m.series)], as_of)
        d = got[m.name]
        assert d.periods.equals(want.periods) and d.periods.dtype == want.periods.dtype
        np.testing.assert_array_equal(d.y, want.y)
        np.testing.assert_array_equal(d.X, want.X)
        for f in ("model", "columns", "driver_columns", "n_ref", "deterministic", "lags", "season_length"):
            assert getattr(d, f) == getattr(want, f), f
        assert np.isfinite(d.X).sum() > d.X.size // 2


def test_designs_built_together_leave_sub_second_times_to_build_design(tmp_path):
    # the sorted searches compare whole seconds: a time with a fraction of a second makes build_designs
    # build nothing (build_design rounds each selection on its own time base); invented scenario
    from drift.panel import SeriesVintages, build_designs

    (tmp_path / "drift.yaml").write_text(BATCH_YAML, encoding="utf-8")
    cfg = load_config(tmp_path / "drift.yaml")
    obs = _batch_obs(np.random.default_rng(9300))
    as_of = _utc(START + pd.Timedelta(weeks=N - 3))
    obs = obs[obs["available_at"] <= as_of].reset_index(drop=True)
    assert sorted(build_designs(cfg, cfg.models, SeriesVintages(obs), as_of)) == ["a", "b", "c"]
    obs.loc[0, "available_at"] += pd.Timedelta(milliseconds=250)
    assert build_designs(cfg, cfg.models, SeriesVintages(obs), as_of) == {}
