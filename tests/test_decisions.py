"""After a verdict: propose (drift refit), decide (drift accept), move on — end to end through the CLI, and
the proposal's fit against statsmodels.

Invented scenario (simulation, seeded): weekly from 2021-01-04, y = 100 + 0.05 t + b1 x1_{t-1} + 1.5 x2_{t-1}
+ N(0, 1), drivers AR(1) around 20; the x1 effect b1 falls from 2.0 to 0.8 from 2024-03-04. Reference
period 2021-01-04 .. 2023-12-25, no season terms.
"""

from __future__ import annotations

import json
from datetime import date
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from drift.cli import cli

BREAK = "2024-03-04"
B1_AFTER = 0.8

CONFIG = """\
# invented scenario (simulation), see tests/test_decisions.py
store: sqlite:///drift.db
sources:
  - {name: sim, kind: csv, path: data.csv, period_column: week}
models:
  - name: sim
    target: y
    frequency: W
    preprocess: {season: none}
    drivers:
      - {series: x1, lag: 1}
      - {series: x2, lag: 1}
    reference: {start: 2021-01-04, end: 2023-12-25}
alerts:
  channels:
    - {kind: folder, path: alerts/}
"""


def scenario(seed: int = 3) -> pd.DataFrame:
    """The invented weekly data (module docstring); x1 and x2 start a week before y (their lag-1 values)."""
    rng = np.random.default_rng(seed)
    weeks = pd.date_range("2020-12-28", "2025-12-29", freq="7D")
    n = len(weeks)
    x = {}
    for s in ("x1", "x2"):
        e = rng.normal(0, 3, n)
        v = np.zeros(n)
        for i in range(1, n):
            v[i] = 0.5 * v[i - 1] + e[i]
        x[s] = 20 + v
    t = np.arange(n - 1)
    b1 = np.where(weeks[1:] >= pd.Timestamp(BREAK), B1_AFTER, 2.0)
    y = 100 + 0.05 * t + b1 * x["x1"][:-1] + 1.5 * x["x2"][:-1] + rng.normal(0, 1, n - 1)
    return pd.DataFrame({"week": weeks.date.astype(str), "y": np.r_[np.nan, y], "x1": x["x1"], "x2": x["x2"]})


def run(*args: str, cwd: Path) -> SimpleNamespace:
    """The CLI in this process (click's runner): returncode, stdout, stderr."""
    res = CliRunner().invoke(cli, [*args, "--config", str(cwd / "drift.yaml")], catch_exceptions=False)
    return SimpleNamespace(returncode=res.exit_code, stdout=res.stdout, stderr=res.stderr)


def notices(folder: Path) -> list[dict]:
    f = folder / "alerts" / "alerts.jsonl"
    return [json.loads(x) for x in f.read_text().splitlines()] if f.exists() else []


@pytest.fixture()
def project(tmp_path: Path) -> Path:
    scenario().to_csv(tmp_path / "data.csv", index=False)
    (tmp_path / "drift.yaml").write_text(CONFIG, encoding="utf-8")
    return tmp_path


def test_refit_accept_and_the_next_epoch_keeps_without_repeating_the_alert(project: Path) -> None:
    assert run("ingest", cwd=project).returncode == 0
    # 1. the check says refit, dated near the break
    r = run("check", "--as-of", "2024-12-31", "--json", cwd=project)
    assert r.returncode == 0, r.stderr
    (m,) = json.loads(r.stdout)["models"]
    assert m["verdict"] == "refit" and m["epoch"]["number"] == 1 and m["epoch"]["action"] == "configured"
    since = next(a["since"] for a in m["actions"] if a["action"] == "refit")
    assert "2024-02-01" <= since <= "2024-04-01"
    sent_before = notices(project)
    assert any(n["condition"] == "refit" for n in sent_before)

    # 2. drift refit: coefficients close to the post-break truth, better out of sample; nothing changes
    r = run("refit", "--model", "sim", "--json", cwd=project)
    assert r.returncode == 0, r.stderr
    p = json.loads(r.stdout)
    assert p["since"] == since and p["as_of"] == "2024-12-31" and p["current_source"] == "reference fit"
    coef = {c["term"]: c for c in p["coefficients"]}
    assert abs(coef["x1"]["proposed"] - B1_AFTER) < 0.1                       # truth 0.8
    assert coef["x1"]["proposed_ci"][0] <= B1_AFTER <= coef["x1"]["proposed_ci"][1]
    assert abs(coef["x1"]["current"] - 2.0) < 0.1 and abs(coef["x2"]["proposed"] - 1.5) < 0.15
    # the check's own estimate since the same date is quoted beside it: the refit verdict's figures
    refit_effects = next(a["effects"] for a in m["actions"] if a["action"] == "refit")
    assert p["check_effects"] == [{"driver": e["driver"], "after": e["after"], "se_after": e["se_after"]}
                                  for e in refit_effects]
    assert abs(next(e["after"] for e in p["check_effects"] if e["driver"] == "x1") - B1_AFTER) < 0.1
    acc = p["accuracy"]
    assert acc["window"]["n"] >= 20
    assert acc["proposed"]["mae"] < 0.5 * acc["current"]["mae"]
    assert acc["diebold_mariano"]["pvalue"] < 0.01 and "HLN" in acc["diebold_mariano"]["method"]
    text = run("refit", "--model", "sim", cwd=project)
    assert "Nothing was changed" in text.stdout and "Diebold–Mariano" in text.stdout
    assert f"the check's estimate since {since}" in text.stdout
    status = json.loads(run("status", "--json", cwd=project).stdout)
    assert status["epochs"]["sim"]["number"] == 1 and "refit" in {a["condition"] for a in status["open_alerts"]["sim"]}

    # 3. drift accept: a new epoch, the open alerts closed as acted on
    r = run("accept", "--model", "sim", "--action", "refit", "--by", "alice", "--note", "x1 effect fell", "--json",
            cwd=project)
    assert r.returncode == 0, r.stderr
    a = json.loads(r.stdout)
    ep = a["epoch"]
    assert (ep["number"], ep["action"], ep["since"], ep["decided_by"]) == (2, "refit", "2024-12-31", "alice")
    assert ep["reference"] == {"start": since, "end": "2024-12-23"} and len(a["closed_alerts"]) >= 1
    status = json.loads(run("status", "--json", cwd=project).stdout)
    assert status["open_alerts"] == {} and status["epochs"]["sim"]["number"] == 2

    # 4. the next check on later data: keep, in epoch 2, and no alert is sent again
    r = run("check", "--as-of", "2025-09-30", "--json", cwd=project)
    assert r.returncode == 0, r.stderr
    (m2,) = json.loads(r.stdout)["models"]
    assert m2["verdict"] == "keep", m2["actions"]
    assert m2["epoch"]["number"] == 2 and m2["reference"] == ep["reference"]
    x1 = next(d for d in m2["drivers"] if d["series"] == "x1")
    assert abs(x1["coef_reference"] - B1_AFTER) < 0.1
    assert notices(project) == sent_before

    # 5. the history shows both epochs, the old one's verdict and alerts still readable
    h = json.loads(run("history", "--model", "sim", "--json", cwd=project).stdout)
    e1, e2 = h["epochs"]
    assert [v["verdict"] for v in e1["verdicts"]] == ["refit"] and [v["verdict"] for v in e2["verdicts"]] == ["keep"]
    assert {x["status"] for x in e1["alerts"]} == {"acted"} and e2["alerts"] == []
    assert e2["note"] == "x1 effect fell"
    assert "epoch 2 (refit, since 2024-12-31 by alice)" in run("history", "--model", "sim", cwd=project).stdout
    # the digest shows the epoch too
    assert run("digest", cwd=project).returncode == 0
    (page,) = (project / "digests").glob("digest-*.html")
    assert "epoch 2: refit since 2024-12-31 by alice" in page.read_text(encoding="utf-8")


def test_decision_commands_refuse_what_does_not_fit(project: Path) -> None:
    assert run("ingest", cwd=project).returncode == 0
    r = run("refit", "--model", "sim", "--as-of", "2024-12-31", cwd=project)  # no verdict yet: no date to take
    assert r.returncode == 2 and "give --since DATE" in r.stderr
    r = run("refit", "--model", "sim", "--as-of", "2024-12-31", "--since", "2024-12-02", cwd=project)
    assert r.returncode == 2 and "usable periods" in r.stderr and "needs at least 7" in r.stderr
    r = run("accept", "--model", "sim", "--action", "relag", "--as-of", "2024-12-31", cwd=project)
    assert r.returncode == 2 and "give --driver SERIES" in r.stderr
    r = run("accept", "--model", "sim", "--action", "relag", "--driver", "x1", "--lag", "1", "--as-of",
            "2024-12-31", cwd=project)
    assert r.returncode == 2 and "already at lag 1" in r.stderr
    r = run("snooze", "--model", "sim", "--until", "2025-03-01", cwd=project)
    assert r.returncode == 2 and "nothing to snooze" in r.stderr
    r = run("refit", "--model", "nosuch", "--since", "2024-03-04", cwd=project)
    assert r.returncode == 2 and "no model named 'nosuch'" in r.stderr
    assert json.loads(run("status", "--json", cwd=project).stdout)["epochs"]["sim"]["number"] == 1


def test_the_proposal_is_the_least_squares_fit_since_the_date(tmp_path: Path) -> None:
    """Coefficients and 95% intervals against statsmodels OLS (statsmodels 0.14/0.15 ``OLS.conf_int``) on a
    design built here from the raw series: const, t / n_ref (t from the reference start, n_ref = 156),
    x1 and x2 of the week before."""
    import statsmodels.api as sm

    from drift.config import load_config
    from drift.pipeline import run_ingest
    from drift.refit import propose
    from drift.store import open_store

    df = scenario()
    df.to_csv(tmp_path / "data.csv", index=False)
    (tmp_path / "drift.yaml").write_text(CONFIG.replace("alerts:\n  channels:\n    - {kind: folder, path: alerts/}\n",
                                                        ""), encoding="utf-8")
    cfg = load_config(tmp_path / "drift.yaml")
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store)
        p = propose(cfg, store, "sim", since=date(2024, 3, 4), as_of=date(2024, 12, 31))
    finally:
        store.dispose()
    rows = df.iloc[1:].reset_index(drop=True)        # y's weeks, from 2021-01-04
    t = np.arange(len(rows), dtype=float)
    X = np.column_stack([np.ones(len(rows)), t / 156, df["x1"].to_numpy()[:-1], df["x2"].to_numpy()[:-1]])
    week = pd.to_datetime(rows["week"])
    use = (week >= "2024-03-04") & (week <= "2024-12-23")  # the weeks whose value is known by 2024-12-31
    fit = sm.OLS(rows["y"].to_numpy()[use], X[use]).fit()
    got = {c["term"]: c for c in p["coefficients"]}
    ci = fit.conf_int(0.05)
    for j, term in enumerate(["const", "trend", "x1", "x2"]):
        assert got[term]["proposed"] == pytest.approx(fit.params[j], abs=1e-6)
        assert got[term]["proposed_se"] == pytest.approx(fit.bse[j], abs=1e-6)
        assert got[term]["proposed_ci"] == pytest.approx(list(ci[j]), abs=1e-6)
    assert p["fit"]["rows"] == int(use.sum()) and p["until"] == "2024-12-23"


def test_a_relag_that_explains_a_break_is_fitted_from_the_break(tmp_path: Path, monkeypatch) -> None:
    """``accept --action relag`` without --since: from the break the relag explains (its ``since``) when the
    verdict's relag carries one, else on the recent window (``check.recent_window`` = 52 weeks by default).
    The verdict is given here (what the check writes for such a relag: drift.checking.actions)."""
    from drift import refit
    from drift.config import load_config
    from drift.pipeline import run_ingest
    from drift.store import open_store

    scenario().to_csv(tmp_path / "data.csv", index=False)
    (tmp_path / "drift.yaml").write_text(CONFIG, encoding="utf-8")
    cfg = load_config(tmp_path / "drift.yaml")
    store = open_store(cfg.store_url())
    day = date(2024, 12, 31)
    relag = {"action": "relag", "driver": "x1", "lag": 2}
    try:
        run_ingest(cfg, store)
        for action, want in (({**relag, "since": BREAK}, BREAK), (relag, "2024-01-01")):
            verdict = {"as_of": day.isoformat(), "epoch": {"number": 1}, "actions": [action]}
            monkeypatch.setattr(refit, "_latest_verdict", lambda *a, v=verdict, **k: v)
            p = refit.propose(cfg, store, "sim", as_of=day, action="relag", lags={"x1": 2})
            # the recent window: the last 52 of the weeks with a target known by the check date (to 2024-12-23)
            assert p["since"] == want and p["until"] == "2024-12-23"
            assert p["reference"]["start"] == want
        # a relag to another lag than the one proposed does not lend its date
        verdict = {"as_of": day.isoformat(), "epoch": {"number": 1}, "actions": [{**relag, "since": BREAK, "lag": 3}]}
        monkeypatch.setattr(refit, "_latest_verdict", lambda *a, v=verdict, **k: v)
        assert refit.propose(cfg, store, "sim", as_of=day, action="relag", lags={"x1": 2})["since"] == "2024-01-01"
    finally:
        store.dispose()


def test_history_puts_an_alert_seen_before_the_decision_in_the_epoch_it_was_seen_in(project: Path) -> None:
    """A check run before a decision was recorded ran in the epoch before it, even when its check date is on
    or after the date the decision takes effect: its alerts are listed there (common practice, no source)."""
    from datetime import datetime, timedelta, timezone

    from drift.config import load_config
    from drift.store import alerts, open_store

    assert run("ingest", cwd=project).returncode == 0
    assert run("check", "--as-of", "2024-12-31", cwd=project).returncode == 0
    store = open_store(load_config(project / "drift.yaml").store_url())
    now = datetime.now(timezone.utc)
    try:
        with store.begin() as conn:  # two cleared alerts seen by checks as of 2025-01-06: before and after
            for cond, seen in (("drop-driver:x2", now - timedelta(hours=1)), ("data-late:x2", now + timedelta(hours=1))):
                conn.execute(alerts.insert().values(
                    model="sim", condition=cond, action=cond.split(":")[0], severity=2, status="cleared",
                    first_seen=seen, last_seen=seen, cleared_at=seen, as_of=date(2025, 1, 6), payload="{}"))
    finally:
        store.dispose()
    assert run("accept", "--model", "sim", "--action", "refit", "--as-of", "2024-12-31", cwd=project).returncode == 0
    h = json.loads(run("history", "--model", "sim", "--json", cwd=project).stdout)
    e1, e2 = h["epochs"]
    assert "drop-driver:x2" in {a["condition"] for a in e1["alerts"]}
    assert [a["condition"] for a in e2["alerts"]] == ["data-late:x2"]
