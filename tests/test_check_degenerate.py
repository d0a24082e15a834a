"""Models that cannot be judged say so, through the CLI (``drift ingest`` then ``drift check --json``): a
degenerate design or a target out of computable scale is the model's ``error`` entry with a reason naming the
columns or the series, never a verdict with blank coefficients (common practice, no source; invented kiosk
data from tests/test_cli_end_to_end.py, edited per case).

Expected relations are exact by construction: a driver set to 5 everywhere is 5 × the intercept column; a
driver set to 2 × another is that multiple of it (checked against numpy.linalg.lstsq, numpy 2.x, in
``drift.check._validate``).
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest

from tests.test_cli_end_to_end import kiosk_data
from tests.test_cli_robustness import invoke
from tests.test_config import MINIMUM

Edit = Callable[[pd.DataFrame], None]


def _misspell(df: pd.DataFrame) -> None:
    df.columns = ["k000_promos" if c == "k000_promo" else c for c in df.columns]


def _set(col: str, fn: Callable[[pd.DataFrame], object]) -> Edit:
    def edit(df: pd.DataFrame) -> None:
        df[col] = fn(df)
    return edit


# case: (edit of the kiosk data, words the reason must contain)
CASES: dict[str, tuple[Edit, list[str]]] = {
    "a driver always 0": (_set("k000_promo", lambda df: 0.0),
                          ["k000_promo[L1] are zero on every usable reference row"]),
    "a driver constant at 5": (_set("k000_promo", lambda df: 5.0),
                               ["regressors are collinear", "k000_promo[L1] = 5 × const"]),
    "two collinear drivers": (_set("k000_promo", lambda df: 2.0 * df["k000_temp"]),
                              ["regressors are collinear", "k000_temp[L1] = 0.5 × k000_promo[L1]"]),
    "a driver = another + 3": (_set("k000_promo", lambda df: df["k000_temp"] + 3.0),
                               ["regressors are collinear", "k000_temp[L1] = -3 × const + 1 × k000_promo[L1]"]),
    "a constant target": (_set("k000_units", lambda df: 7.0), ["the target 'k000_units' is constant (7)"]),
    # squares of values near 1e-300 underflow to 0: least squares then sees an all-zero target or column
    "a target near 1e-300": (_set("k000_units", lambda df: df["k000_units"] * 1e-300),
                             ["target 'k000_units'", "too small in scale", "rescale"]),
    "a driver near 1e-300": (_set("k000_promo", lambda df: df["k000_promo"] * 1e-300),
                             ["driver 'k000_promo'", "too small in scale", "rescale"]),
    # values near 1e308 are quarantined at ingest (their squares overflow); the check says so
    "a target near 1e308": (_set("k000_units", lambda df: df["k000_units"] * 1e305),
                            ["'k000_units' has 259 value(s) in quarantine", "beyond ±1e+100"]),
    # the file's header misspells the driver: the store's nearest name is offered
    "a misspelt driver column": (_misspell,
                                 ["no observations of 'k000_promo'",
                                  "'k000_promo' is not in the store; did you mean 'k000_promos'?"]),
}


def _project(tmp_path: Path, edit: Edit) -> Path:
    kiosk_data(tmp_path / "data")
    for f in sorted((tmp_path / "data").glob("*.csv")):
        df = pd.read_csv(f)
        edit(df)
        df.to_csv(f, index=False)
    (tmp_path / "drift.yaml").write_text(MINIMUM, encoding="utf-8")
    return tmp_path


@pytest.mark.parametrize("case", list(CASES))
def test_degenerate_model_is_an_error_entry_naming_the_problem(tmp_path: Path, case: str) -> None:
    edit, words = CASES[case]
    folder = _project(tmp_path, edit)
    code, _, err = invoke("ingest", "--config", "drift.yaml", cwd=folder)
    assert code == 0, err
    code, out, err = invoke("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--json", "--no-deliver",
                            cwd=folder)
    assert code == 4 and "Traceback" not in err, (code, err)
    (m,) = json.loads(out)["models"]
    assert m["verdict"] == "error", m
    for w in words:
        assert w in m["reason"], m["reason"]


def test_a_feed_refused_at_ingest_is_not_only_late(tmp_path: Path) -> None:
    """The target's values since 2025-06-02 are 1.5e308: quarantined at ingest, so the feed looks late; the
    data-late reason says what ingest refused (was: only 'late', an unrelated reason)."""
    def edit(df: pd.DataFrame) -> None:
        df.loc[pd.to_datetime(df["week"]) >= "2025-06-02", "k000_units"] = 1.5e308

    folder = _project(tmp_path, edit)
    assert invoke("ingest", "--config", "drift.yaml", cwd=folder)[0] == 0
    code, out, err = invoke("check", "--config", "drift.yaml", "--as-of", "2025-12-31", "--json", "--no-deliver",
                            cwd=folder)
    assert code == 0, err
    (m,) = json.loads(out)["models"]
    (late,) = [a for a in m["actions"] if a["action"] == "data-late"]
    assert late["driver"] == "k000_units" and late["missing_periods"] == 30
    assert "Ingest quarantined 30 value(s) of 'k000_units'" in late["reason"], late["reason"]
    assert "beyond ±1e+100" in late["reason"]


def test_series_names_on_every_store(store, tmp_path: Path) -> None:
    """The names the did-you-mean of a missing series is drawn from, read alike from SQLite and PostgreSQL."""
    from drift.ingest import ingest_all
    from tests.ingest.helpers import NOW, make_config

    (tmp_path / "data.csv").write_text("week,b,a\n2024-01-01,1,1e308\n2024-01-08,2,2\n")
    src = {"name": "src", "kind": "csv", "path": "data.csv", "period_column": "week", "frequency": "W"}
    ingest_all(make_config(tmp_path, [src]), store, now=NOW)
    assert store.series_names() == ["a", "b"]


def test_quarantined_columns_on_every_store(store, tmp_path: Path) -> None:
    """The count and first record the check's reason quotes, read alike from SQLite and PostgreSQL."""
    from drift.ingest import ingest_all
    from tests.ingest.helpers import NOW, make_config

    (tmp_path / "data.csv").write_text("week,a,b\n2024-01-01,1e308,1\n2024-01-08,2e308,2\n2024-01-15,x,3\n")
    src = {"name": "src", "kind": "csv", "path": "data.csv", "period_column": "week", "frequency": "W"}
    ingest_all(make_config(tmp_path, [src]), store, now=NOW)
    held = store.quarantined_columns(["a", "b", "c"])
    assert list(held) == ["a"]
    n, row, why = held["a"]
    assert (n, row) == (3, 2) and "beyond ±1e+100" in why


def test_designs_cleared_together_are_those_validate_passes() -> None:
    # oracle: the chunk's pre-check (drift.checking.designs._surely_valid) clears a design only where
    # _validate itself finds nothing, and clears the plain ones; invented designs, seeded (common practice,
    # no source: each case is one of _validate's own conditions, or a near-collinear column between its
    # tolerance and the pre-check's margin)
    import numpy as np

    from drift.checking.designs import COLLINEAR_RTOL, MIN_SCALE, _surely_valid, _validate
    from drift.panel import Design

    rng = np.random.default_rng(9400)
    n, n_ref = 60, 40

    def design(name: str, edit: Callable[[np.ndarray, np.ndarray], None] | None = None) -> Design:
        t = np.arange(n, dtype=float)
        X = np.column_stack([np.ones(n), t / n_ref, rng.normal(size=n), rng.normal(size=n)])
        X[:2, 2] = np.nan  # a lag's first rows
        y = X[:, 2:].sum(axis=1) + rng.normal(size=n)
        if edit is not None:
            edit(y, X)
        return Design(model=name, periods=pd.date_range("2021-01-04", periods=n, freq="7D"), y=y, X=X,
                      columns=["const", "trend", "a", "b"], driver_columns={"a": 2, "b": 3}, n_ref=n_ref,
                      deterministic=[0, 1], lags={"a": 1, "b": 1})

    def near(scale: float) -> Callable[[np.ndarray, np.ndarray], None]:
        def edit(y: np.ndarray, X: np.ndarray) -> None:
            X[:, 3] = X[:, 0] + scale * rng.normal(size=n)
        return edit

    def setter(fn: Callable[[np.ndarray, np.ndarray], None]) -> Callable[[np.ndarray, np.ndarray], None]:
        return fn

    cases = {
        "plain": None, "plain too": None,
        "huge target": setter(lambda y, X: y.__setitem__(50, 1e120)),
        "huge driver": setter(lambda y, X: X.__setitem__((45, 3), -1e150)),
        "tiny driver": setter(lambda y, X: X.__setitem__((slice(None), 3), X[:, 3] * MIN_SCALE * 1e-3)),
        "few rows": setter(lambda y, X: X.__setitem__((slice(0, 36), 3), np.nan)),
        "constant target": setter(lambda y, X: y.__setitem__(slice(None), 7.0)),
        "zero driver": setter(lambda y, X: X.__setitem__((slice(None), 3), 0.0)),
        "collinear": setter(lambda y, X: X.__setitem__((slice(None), 3), 2.0 * X[:, 1])),
        "near collinear": near(3.0 * COLLINEAR_RTOL),
        "nearer": near(0.3 * COLLINEAR_RTOL),
    }
    designs = [design(name, edit) for name, edit in cases.items()]
    cleared = dict(zip(cases, _surely_valid(designs)))
    outcome: dict[str, bool] = {}
    for d in designs:
        try:
            _validate(SimpleNamespace(design=d, model=SimpleNamespace(name=d.model, target="y"), y=d.y, X=d.X,
                                      n_ref_ok=int(np.sum(np.isfinite(d.y[:n_ref])
                                                          & np.isfinite(d.X[:n_ref]).all(axis=1)))))
            passes = True
        except Exception:  # noqa: BLE001 - any refusal
            passes = False
        assert not cleared[d.model] or passes, d.model
        outcome[d.model] = passes
    assert cleared["plain"] and cleared["plain too"]
    assert outcome["near collinear"] and not outcome["nearer"]  # the margin is exercised on both sides
    assert not any(v for k, v in cleared.items() if not k.startswith("plain")), cleared
