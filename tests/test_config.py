"""Config loading and validation: every error names the file, the key path and the line.

Validators are tested on their own because a broken validator fails silently (common practice, no source).
"""

from __future__ import annotations

import subprocess
import sys
from datetime import timedelta
from pathlib import Path

import pytest

from drift.config import load_config, parse_duration, parse_trigger
from drift.exceptions import ConfigError

MINIMUM = """\
store: sqlite:///drift.db          # optional; default: a SQLite file beside the config
sources:
  - name: kiosks
    kind: csv                       # csv | parquet | sql
    path: data/*.csv                # a file or a glob, relative to the config file
    period_column: week             # wide format: every other column is a series named by its header
models:
  - name: k000
    target: k000_units
    frequency: W                    # D, W, M, Q
    drivers:
      - {series: k000_promo, lag: 1, form: lagged}   # form: lagged | forecast | known
      - {series: k000_temp, lag: 1, form: lagged}
    reference: {start: 2021-01-04, end: 2023-12-25}  # the period the deployed model was fitted on
"""


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "drift.yaml"
    p.write_text(text, encoding="utf-8")
    return p


def test_minimum_config_as_written(tmp_path: Path) -> None:
    cfg = load_config(write(tmp_path, MINIMUM))
    assert cfg.store_url() == "sqlite:///" + str((tmp_path / "drift.db").resolve())
    m = cfg.models[0]
    assert m.frequency == "W" and [d.series for d in m.drivers] == ["k000_promo", "k000_temp"]
    assert m.error_order == (0, 0) and m.season_length == 52
    assert cfg.sources[0].kind == "csv" and not cfg.sources[0].long_format


def test_default_store_is_beside_the_config(tmp_path: Path) -> None:
    cfg = load_config(write(tmp_path, MINIMUM.replace("store: sqlite:///drift.db", "")))
    assert cfg.store_url().endswith(str(tmp_path.resolve() / "drift.db"))


def test_example_config_loads() -> None:
    cfg = load_config(Path(__file__).parents[1] / "config" / "example.yaml")
    assert cfg.models[0].drivers[1].form == "forecast"
    assert cfg.schedule.timezone == "Europe/Lisbon"


@pytest.mark.parametrize(
    "old, new, key, line, words",
    [
        ("lag: 1, form: lagged}   #", "lgg: 1, form: lagged}   #", "models[0].drivers[0].lgg", 12, "did you mean 'lag'"),
        ("frequency: W ", "frequency: X ", "models[0].frequency", 10, "'X' is not allowed"),
        # the value as written (not upper-cased) is quoted back
        ("frequency: W ", "frequency: fortnightly ", "models[0].frequency", 10, "'fortnightly' is not allowed"),
        ("frequency: W ", "frequency: fortnightly ", "models[0].frequency", 10,
         "(or 'daily', 'weekly', 'monthly', 'quarterly')"),
        ("kind: csv ", "kind: excel ", "sources[0].kind", 4, "expected 'csv', 'parquet' or 'sql'"),
        ("    period_column: week", "    perod_column: week", "sources[0].perod_column", 6, "did you mean 'period_column'"),
        ("reference: {start: 2021-01-04, end: 2023-12-25}", "reference: {start: 2021-01-04, end: 2020-12-25}",
         "models[0].reference", 14, "must come after start"),
        ("lag: 1, form: lagged}   #", "lag: 1, form: lagged, delay: 2 days}   #", "models[0].drivers[0].lag", 12,
         "data from the future"),
        ("lag: 1, form: lagged}   #", "lag: 1, form: lagged, delay: 2 days}   #", "models[0].drivers[0].lag", 12,
         "its value from 1 period before the forecast period does not exist yet"),
        ("lag: 1, form: lagged}   #", "lag: 0, form: lagged}   #", "models[0].drivers[0].lag", 12,
         "its value for the forecast period itself does not exist yet"),
        ("target: k000_units", "target: k000_units\n    errors: arima(1)", "models[0].errors", 10, "ar(1)"),
    ],
)
def test_errors_name_file_key_and_line(tmp_path: Path, old: str, new: str, key: str, line: int, words: str) -> None:
    assert old in MINIMUM
    p = write(tmp_path, MINIMUM.replace(old, new, 1))
    with pytest.raises(ConfigError) as ei:
        load_config(p)
    err = ei.value
    assert err.key == key, str(err)
    assert err.line == line or (err.line is not None and abs(err.line - line) <= 1), str(err)
    assert words in str(err)
    assert str(p) in str(err)


def test_yaml_syntax_error_has_line(tmp_path: Path) -> None:
    p = write(tmp_path, MINIMUM.replace("    frequency: W", "    frequency: [W"))
    with pytest.raises(ConfigError) as ei:
        load_config(p)
    assert ei.value.line is not None and "YAML" in str(ei.value)


def test_missing_required_key(tmp_path: Path) -> None:
    p = write(tmp_path, MINIMUM.replace("    target: k000_units\n", ""))
    with pytest.raises(ConfigError, match="required key 'target' is missing"):
        load_config(p)


def test_unknown_top_level_key_suggests(tmp_path: Path) -> None:
    p = write(tmp_path, MINIMUM + "schedul:\n  check: '30 5 * * MON'\n")
    with pytest.raises(ConfigError, match="did you mean 'schedule'"):
        load_config(p)


def test_alerts_and_schedule_are_validated(tmp_path: Path) -> None:
    good = MINIMUM + """\
alerts:
  channels:
    - kind: email
      host: 127.0.0.1
      port: 8025
      security: none
      sender: drift@example.org
      to: [planning@example.org]
      username_env: DRIFT_SMTP_USER
      password_env: DRIFT_SMTP_PASSWORD
    - kind: folder
      path: alerts/
schedule:
  timezone: Europe/Lisbon
  ingest: "0 5 * * *"
  check: "30 5 * * MON"
  digest: "0 8 * * MON"
  retry: "every 10m"
"""
    cfg = load_config(write(tmp_path, good))
    assert [c.kind for c in cfg.alerts.channels] == ["email", "folder"]
    with pytest.raises(ConfigError, match="security"):
        load_config(write(tmp_path, good.replace("security: none", "security: tls")))
    with pytest.raises(ConfigError, match="cron"):
        load_config(write(tmp_path, good.replace('"30 5 * * MON"', '"30 5 * MON"')))
    with pytest.raises(ConfigError, match="time zone"):
        load_config(write(tmp_path, good.replace("Europe/Lisbon", "Europe/Lisboa")))
    with pytest.raises(ConfigError, match="channel kind"):
        load_config(write(tmp_path, good.replace("kind: folder", "kind: pager")))


def test_parse_duration_and_trigger() -> None:
    assert parse_duration("2 days") == timedelta(days=2)
    assert parse_duration("36h") == timedelta(hours=36)
    assert parse_duration("10m") == timedelta(minutes=10)
    assert parse_duration(1) == timedelta(days=1)
    with pytest.raises(ValueError, match="not a duration"):
        parse_duration("soon")
    assert parse_trigger("every 10m") == ("interval", timedelta(minutes=10))
    assert parse_trigger("30 5 * * MON")[0] == "cron"
    with pytest.raises(ValueError):
        parse_trigger("every 0m")


def test_cli_config_error_exits_2_without_traceback(tmp_path: Path) -> None:
    p = write(tmp_path, MINIMUM.replace("frequency: W ", "frequncy: W "))
    r = subprocess.run([sys.executable, "-m", "drift.cli", "check", "--config", str(p)], check=False,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2
    assert "Traceback" not in r.stderr
    assert "did you mean 'frequency'" in r.stderr and "drift.yaml:10" in r.stderr


def test_cli_missing_config_exits_2(tmp_path: Path) -> None:
    r = subprocess.run([sys.executable, "-m", "drift.cli", "check", "--config", str(tmp_path / "nope.yaml")], check=False,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and "not found" in r.stderr and "Traceback" not in r.stderr


# ------------------------------------------------------------------------------------------ check.horizon
@pytest.mark.parametrize("value, weekly, monthly", [
    ("2 years", 104, 24), ("104 periods", 104, 104), ("18 months", 78, 18), ("26 weeks", 26, 6),
    ("8 quarters", 104, 24), ("730 days", 104, 24), (2, 312, 120), ("0.5", 78, 30)])
def test_check_horizon_durations_in_periods(value: object, weekly: int, monthly: int) -> None:
    # common practice, no source: 365.25 / 7 weeks, 12 months, 4 quarters, 365.25 days a year; a bare
    # number is a multiple of the reference length (156 weekly, 60 monthly periods here), as before
    from drift.config import CheckConfig

    chk = CheckConfig(horizon=value)
    assert chk.horizon_periods("W", 156) == weekly
    assert chk.horizon_periods("M", 60) == monthly
    assert CheckConfig().horizon == "2 years"


@pytest.mark.parametrize("value", ["two years", "7", 0, -1, "2 fortnights", "0 years", True])
def test_check_horizon_rejects_what_it_cannot_read(value: object) -> None:
    from pydantic import ValidationError

    from drift.config import CheckConfig

    with pytest.raises(ValidationError, match="horizon"):
        CheckConfig(horizon=value)


@pytest.mark.parametrize("written, letter", [("weekly", "W"), ("Monthly", "M"), (" QUARTERLY ", "Q"), ("d", "D")])
def test_frequency_as_a_word_or_a_letter_in_any_case(tmp_path: Path, written: str, letter: str) -> None:
    text = MINIMUM.replace("frequency: W ", f"frequency: '{written}' ", 1)
    text = text.replace("period_column: week", f"period_column: week\n    frequency: '{written}'", 1)
    cfg = load_config(write(tmp_path, text))
    assert cfg.models[0].frequency == letter and cfg.sources[0].frequency == letter
