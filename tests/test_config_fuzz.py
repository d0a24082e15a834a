"""Hostile config values (common practice, no source: property-based fuzzing with Hypothesis 6).

Every key of the example config (config/example.yaml) is given random values of every YAML type: nulls,
booleans, huge and negative integers, NaN, infinities, 1e308, −0.0, strings with control characters and
non-ASCII letters, dates at the ends of the calendar, lists and mappings. Loading such a config either
succeeds or raises ConfigError naming the file and the key path it replaced (or a key inside it) — never any
other exception; a handful of the same cases go through the CLI for exit status 2 without a traceback.
"""

from __future__ import annotations

import copy
import math
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from drift.config import load_config
from drift.exceptions import ConfigError
from tests.test_cli_robustness import invoke

EXAMPLE = Path(__file__).parents[1] / "config" / "example.yaml"
BASE: dict[str, Any] = yaml.safe_load(EXAMPLE.read_text(encoding="utf-8"))


def _paths(node: Any, path: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    out = [path] if path else []
    if isinstance(node, dict):
        for k, v in node.items():
            out += _paths(v, path + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out += _paths(v, path + (i,))
    return out


#: every key path of the example, plus the optional keys it leaves commented out
PATHS = _paths(BASE) + [("check", k) for k in ("rolling_window", "max_lag", "workers", "dask_scheduler")] + [
    ("models", 0, k) for k in ("horizon", "monitor_start")] + [("models", 0, "drivers", 0, "delay")] + [
    ("sources", 0, k) for k in ("period_format", "available_column", "columns", "delay", "frequency")]


def _key_path(path: tuple[Any, ...]) -> str:
    out = ""
    for p in path:
        out += f"[{p}]" if isinstance(p, int) else ("." if out else "") + str(p)
    return out


scalars = st.one_of(
    st.none(), st.booleans(),
    st.integers(min_value=-(10 ** 30), max_value=10 ** 30),
    st.sampled_from([0, -1, 1, 2 ** 31, 2 ** 63, 10 ** 300]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([1e308, -1e308, -0.0, math.nan, math.inf, -math.inf, 5e-324]),
    st.text(max_size=30),
    st.sampled_from(["", " ", "\x00", "é", "W", "ar(99)", "arma(0,0)", "every 0m", "1e30 days", "-5 days",
                     "99999999 weeks", "* * * * *", "9999-12-31", "0001-01-01", "../../x", "sqlite:///",
                     "postgresql://", "kiosks", "k000_units"]),
    st.dates(min_value=date(1, 1, 1), max_value=date(9999, 12, 31)),
)
values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=3), st.dictionaries(st.text(max_size=8), inner, max_size=3)), max_leaves=6)
#: values of the key's own type, plausible or extreme, so that many configs load and reach the check
typed = {
    int: st.one_of(st.integers(min_value=-3, max_value=400), st.sampled_from([0, 10 ** 4, 10 ** 6, 10 ** 30])),
    float: st.one_of(st.floats(min_value=-1.0, max_value=10.0),
                     st.sampled_from([0.0, -0.0, 1e-300, 0.4999, 0.5, 6.0, 1e308, math.nan, math.inf])),
    str: st.one_of(st.sampled_from(["", " ", "x1", "x2", "y", "W", "D", "M", "Q", "ols", "ar(1)", "ar(30)",
                                    "arma(1,1)", "arma(9,9)", "linear", "none", "auto", "dummies", "stl",
                                    "fourier", "lagged", "forecast", "known", "page", "mosum", "csw",
                                    "0 days", "3 days", "400 days", "1e30 days", "9999-12-31", "é", "\x00"]),
                   st.text(max_size=12)),
    date: st.dates(min_value=date(1, 1, 1), max_value=date(9999, 12, 31)),
}
#: the type of the optional keys the example leaves out
OPTIONAL_TYPES = {"rolling_window": int, "max_lag": int, "workers": int, "horizon": int, "monitor_start": date,
                  "delay": str, "dask_scheduler": str}


def _value_for(base: dict[str, Any], path: tuple[Any, ...]) -> st.SearchStrategy[Any]:
    node: Any = base
    try:
        for p in path:
            node = node[p]
        kind: Any = type(node)
    except (KeyError, IndexError):
        kind = OPTIONAL_TYPES.get(str(path[-1]))
    return st.one_of(typed[kind], values) if kind in typed else values


def _names(key: str | None, path: tuple[Any, ...]) -> bool:
    """Whether an error's key is the key at ``path``, one of its parents, inside it, or beside it."""
    if not key:
        return False
    full, parent = _key_path(path), _key_path(path[:-1])
    return full.startswith(key) or key.startswith(full) or (bool(parent) and key.startswith(parent + "."))


def _set(doc: dict[str, Any], path: tuple[Any, ...], value: Any) -> None:
    node: Any = doc
    for p in path[:-1]:
        node = node[p]
    node[path[-1]] = value


def _dump(doc: dict[str, Any]) -> str:
    return yaml.safe_dump(doc, allow_unicode=True, sort_keys=False)


@settings(max_examples=400, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.data())
def test_fuzzed_value_is_loaded_or_named(tmp_path: Path, data: st.DataObject) -> None:
    path = data.draw(st.sampled_from(PATHS), label="path")
    value = data.draw(_value_for(BASE, path), label="value")
    doc = copy.deepcopy(BASE)
    _set(doc, path, value)
    f = tmp_path / "fuzz.yaml"
    f.write_text(_dump(doc), encoding="utf-8")
    try:
        load_config(f)
    except ConfigError as exc:
        text = str(exc)
        assert str(f) in text, text
        # the key named is the one replaced, one of its parents or inside it, or a key beside it (a rule
        # over two keys of one mapping, e.g. a lag too short for the driver's form)
        assert _names(exc.key, path), (_key_path(path), text)


@pytest.mark.parametrize("path, value", [
    (("check", "level"), math.nan),
    (("models", 0, "drivers", 0, "lag"), 10 ** 30),
    (("models", 0, "reference", "end"), date(9999, 12, 31)),
    (("models", 0, "drivers", 0, "delay"), "1e30 days"),
    (("alerts", "retry_backoff"), -5),
    (("schedule", "timezone"), "\x00"),
])
def test_fuzzed_values_through_the_cli_exit_2(tmp_path: Path, path: tuple[Any, ...], value: Any) -> None:
    doc = copy.deepcopy(BASE)
    _set(doc, path, value)
    (tmp_path / "drift.yaml").write_text(_dump(doc), encoding="utf-8")
    code, _, err = invoke("check", "--config", "drift.yaml", cwd=tmp_path)
    assert code == 2, (code, err)
    assert "Traceback" not in err and _key_path(path) in err, err
    assert not (tmp_path / "drift.db").exists()  # refused before the store is created


def test_durations_are_bounded() -> None:
    from drift.config import parse_duration

    assert parse_duration("2 days") == timedelta(days=2)
    for bad in ("1e30 days", -5, math.nan, math.inf, "99999999 weeks"):
        with pytest.raises(ValueError):
            parse_duration(bad)


# ------------------------------------------------------------------------------------------ through the check
def _scenario_base() -> dict[str, Any]:
    from tests.check_scenarios import CONFIG

    doc: dict[str, Any] = yaml.safe_load(CONFIG.format(errors="ols", lag1=1, level=0.05, recent=52, sources=""))
    m = doc["models"][0]
    m.update(horizon=1, target_lags=[1], monitor_start=date(2024, 1, 1),
             preprocess={"trend": "linear", "season": "auto", "method": "fourier", "harmonics": 3})
    m["drivers"][0].update(delay="0 days", unit="u")
    doc["check"].update(warn_level=0.1, rolling_window=52, max_lag=8, feed_limit=4, monitor_detector="page",
                        horizon=2.0)
    return doc


SCENARIO = _scenario_base()
MODEL_PATHS = [p for p in _paths(SCENARIO) if len(p) > 1 and p[0] in ("models", "check")
               and not isinstance(p[-1], int) and p[-1] not in ("drivers", "reference", "preprocess", "name")]


@pytest.fixture(scope="module")
def scenario_obs() -> tuple[Any, Any]:
    from tests.check_scenarios import Scenario, end_moment, known_by, observations, simulate

    periods, vals = simulate(Scenario(seed=1, n_mon=52))
    moment = end_moment(periods)
    return known_by(observations(periods, vals), moment), moment


@settings(max_examples=80, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(data=st.data())
def test_fuzzed_model_values_never_break_the_check(tmp_path: Path, scenario_obs: tuple[Any, Any],
                                                   data: st.DataObject) -> None:
    """A config that loads gives the model a verdict or its own error entry; none is an unexpected error
    (invented scenario, tests/check_scenarios.py)."""
    from drift.check import analyse

    path = data.draw(st.sampled_from(MODEL_PATHS), label="path")
    own = typed.get(type(_get(SCENARIO, path)))
    value = data.draw(_value_for(SCENARIO, path) if own is None else st.one_of(own, _value_for(SCENARIO, path)),
                      label="value")
    doc = copy.deepcopy(SCENARIO)
    _set(doc, path, value)
    f = tmp_path / "fuzz.yaml"
    f.write_text(_dump(doc), encoding="utf-8")
    try:
        cfg = load_config(f)
    except ConfigError as exc:
        assert _names(exc.key, path), str(exc)
        return
    obs, moment = scenario_obs
    out, errors = analyse(cfg, cfg.models, obs, moment)
    assert len(out) + len(errors) == 1
    assert not any("unexpected" in r for r in errors.values()), errors


def _get(doc: Any, path: tuple[Any, ...]) -> Any:
    for p in path:
        doc = doc[p]
    return doc
