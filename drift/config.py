"""Configuration: YAML -> validated, typed objects, with errors that name the file, key path and line.

Defaults are defined exactly once, here, on the pydantic models. :func:`load_config` is the only entry
point; everything else receives a :class:`Config`.

Time conventions
----------------
- A period value names the period's first day (``W``: the week starting that day) unless the source says
  ``period_label: end``; periods are normalised to their first day at ingest.
- ``delay`` (per driver, or per source as a default) is a publication delay such as ``2 days``: without an
  ``available_column``, the first vintage of a value counts as available at the end of its period plus the
  delay; a revision counts as available when it was ingested.
"""

from __future__ import annotations

import codecs
import difflib
import gc
import glob as _glob
import math
import os
import re
from datetime import date, timedelta
from pathlib import Path
from typing import Annotated, Any, Literal

import pandas as pd
import yaml
from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    PrivateAttr,
    ValidationError,
    field_validator,
    model_validator,
)

from drift.exceptions import ConfigError

FREQUENCIES = ("D", "W", "M", "Q")
#: periods per year, per frequency (used for the default annual season and lag ranges)
SEASON_BY_FREQ = {"D": 7, "W": 52, "M": 12, "Q": 4}
#: default largest lag scanned by the lag profile, per frequency
MAX_LAG_BY_FREQ = {"D": 14, "W": 8, "M": 3, "Q": 2}
#: the databases a store can live in (the ``store`` URL's backend)
STORE_BACKENDS = ("sqlite", "postgresql")
#: the dates drift computes with (config dates, --as-of and friends): inside pandas' nanosecond timestamps
#: (1677-09-22 .. 2262-04-11) with room for horizons and delays on either side
DATE_RANGE = (date(1700, 1, 1), date(2200, 12, 31))
#: largest magnitude of a value drift stores or computes with: sums of squares of such values stay far from
#: float64 overflow (~1.8e308; 1e154 squared is already there); a larger value is a broken input, not data
#: (common practice, no source). Ingest quarantines larger values; the check refuses them.
MAX_ABS_VALUE = 1e100
#: longest name (model, source, series, channel) drift keeps: the store's name columns hold this many
#: characters (PostgreSQL enforces it; SQLite would keep a longer one, so every store is held to it)
MAX_NAME_LENGTH = 200


#: the words a frequency may also be written as
_FREQUENCY_WORDS = {"daily": "D", "weekly": "W", "monthly": "M", "quarterly": "Q"}


def frequency_letter(v: Any) -> Any:
    """A frequency as its letter: ``D``/``W``/``M``/``Q`` in any case, or ``daily``, ``weekly``, ``monthly``,
    ``quarterly``; anything else is left as written, so the error quotes what the user wrote."""
    if isinstance(v, str):
        t = v.strip()
        if t.upper() in FREQUENCIES:
            return t.upper()
        return _FREQUENCY_WORDS.get(t.lower(), v)
    return v


def check_date(v: date) -> date:
    """``v`` when it lies in :data:`DATE_RANGE`; ValueError naming the range otherwise."""
    lo, hi = DATE_RANGE
    if not lo <= v <= hi:
        raise ValueError(f"{v.isoformat()} is out of range: drift works with dates from {lo.isoformat()} to "
                         f"{hi.isoformat()}")
    return v

def check_name(v: str) -> str:
    """``v`` when a store can keep it as a name: at most :data:`MAX_NAME_LENGTH` characters, no NUL byte (one
    written as ``\\0`` is refused for every string when the YAML is parsed; this catches one decoded from
    ``!!binary``); ValueError otherwise."""
    if "\x00" in v:
        raise ValueError(f"{v[:40]!r} contains a NUL byte: no store keeps one in text; remove it")
    if len(v) > MAX_NAME_LENGTH:
        raise ValueError(f"'{v[:40]}…' is {len(v)} characters long; names are at most {MAX_NAME_LENGTH} "
                         "characters (the store keeps no more)")
    return v


#: a model, source, series or channel name (see :func:`check_name`)
Name = Annotated[str, AfterValidator(check_name)]

_DURATION_RE = re.compile(
    r"^\s*(\d+(?:\.\d+)?)\s*(s|sec|secs|second|seconds|m|min|mins|minute|minutes|h|hour|hours|"
    r"d|day|days|w|week|weeks)\s*$",
    re.IGNORECASE,
)
_UNIT_SECONDS = {
    "s": 1, "sec": 1, "secs": 1, "second": 1, "seconds": 1,
    "m": 60, "min": 60, "mins": 60, "minute": 60, "minutes": 60,
    "h": 3600, "hour": 3600, "hours": 3600,
    "d": 86400, "day": 86400, "days": 86400,
    "w": 604800, "week": 604800, "weeks": 604800,
}


#: longest duration a config may give (delays, back-offs, timeouts)
MAX_DURATION = timedelta(days=3660)
#: longest lag, target lag or forecast horizon, in years of the model's periods
MAX_SPAN_YEARS = 100


def parse_duration(text: str | float | timedelta) -> timedelta:
    """Parse ``"2 days"``, ``"36h"``, ``"10m"``, ``"1 week"`` (or a number of days) into a timedelta.

    Raises
    ------
    ValueError
        for text that is not a duration, and for a negative, non-finite or longer than
        :data:`MAX_DURATION` one.
    """
    if isinstance(text, timedelta):
        seconds = text.total_seconds()
    elif isinstance(text, (int, float)) and not isinstance(text, bool):
        seconds = float(text) * 86400.0
    else:
        m = _DURATION_RE.match(str(text))
        if not m:
            raise ValueError(
                f"'{text}' is not a duration; write a number and a unit, e.g. '2 days', '36 hours', '10m', '1 week'"
            )
        seconds = float(m.group(1)) * _UNIT_SECONDS[m.group(2).lower()]
    if not math.isfinite(seconds) or seconds < 0 or seconds > MAX_DURATION.total_seconds():
        raise ValueError(f"'{text}' is not a usable duration: it must be between 0 and "
                         f"{MAX_DURATION.days} days")
    return text if isinstance(text, timedelta) else timedelta(seconds=seconds)


Duration = Annotated[timedelta, Field()]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)


class SourceConfig(_Strict):
    """One data source. Wide format: every column other than the period (and available/issued) columns
    is a series named by its header. Long format: ``series_column`` and ``value_column``."""

    name: Name
    kind: Literal["csv", "parquet", "sql"]
    path: str | None = None
    url: str | None = None
    url_env: str | None = None
    query: str | None = None
    since: str | None = None
    period_column: str
    period_label: Literal["start", "end"] = "start"
    period_format: str | None = None
    series_column: str | None = None
    value_column: str | None = None
    available_column: str | None = None
    issued_column: str | None = None
    delay: timedelta = timedelta(0)
    frequency: Literal["D", "W", "M", "Q"] | None = None
    delimiter: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    columns: list[str] | None = None

    _dur = field_validator("delay", mode="before")(lambda cls, v: parse_duration(v))
    _freq = field_validator("frequency", mode="before")(lambda cls, v: frequency_letter(v))

    @model_validator(mode="after")
    def _check(self) -> SourceConfig:
        if self.kind in ("csv", "parquet") and not self.path:
            raise ValueError(f"a {self.kind} source needs 'path' (a file or a glob, relative to the config)")
        if self.kind == "sql":
            if not (self.url or self.url_env):
                raise ValueError("a sql source needs 'url' (an SQLAlchemy URL) or 'url_env' (a variable holding it)")
            if not self.query:
                raise ValueError("a sql source needs 'query' (it may use the bound parameter :since)")
        if (self.series_column is None) != (self.value_column is None):
            raise ValueError("long format needs both 'series_column' and 'value_column'")
        try:
            codecs.lookup(self.encoding)
        except LookupError:
            raise ValueError(f"encoding '{self.encoding}' is not one Python knows; use e.g. 'utf-8', "
                             "'latin-1' or 'cp1252'") from None
        if len(self.delimiter) != 1 or self.delimiter in "\r\n\"":
            raise ValueError(f"delimiter {self.delimiter!r} must be one character (not a quote or a line "
                             "break), e.g. ',' or ';'")
        if len(self.decimal) != 1 or self.decimal == self.delimiter:
            raise ValueError(f"decimal {self.decimal!r} must be one character other than the delimiter, "
                             "e.g. '.' or ','")
        if self.period_format is not None and self.period_format != "excel" and "%" not in self.period_format:
            raise ValueError(f"period_format '{self.period_format}' has no date codes; use codes such as "
                             "'%d/%m/%Y' (day first) or '%m/%d/%Y' (month first), or 'excel' for spreadsheet "
                             "serial day numbers")
        return self

    @property
    def long_format(self) -> bool:
        return self.series_column is not None


class DriverConfig(_Strict):
    series: Name
    lag: int = Field(1, ge=0)
    form: Literal["lagged", "forecast", "known"] = "lagged"
    delay: timedelta | None = None
    unit: str | None = None

    _dur = field_validator("delay", mode="before")(lambda cls, v: None if v is None else parse_duration(v))


class ReferenceConfig(_Strict):
    start: date
    end: date

    _range = field_validator("start", "end")(lambda cls, v: check_date(v))

    @model_validator(mode="after")
    def _order(self) -> ReferenceConfig:
        if self.end <= self.start:
            raise ValueError(f"reference end {self.end} must come after start {self.start}")
        return self


class PreprocessConfig(_Strict):
    trend: Literal["none", "linear"] = "linear"
    season: Literal["none", "auto"] | int = "auto"
    method: Literal["fourier", "dummies", "stl"] = "fourier"
    harmonics: int = Field(3, ge=1, le=26)

    @field_validator("season")
    @classmethod
    def _season(cls, v: Any) -> Any:
        if isinstance(v, int) and v < 2:
            raise ValueError("season must be 'none', 'auto' or a period length of at least 2")
        return v


class DeployedErrorsConfig(_Strict):
    """The production model's ARMA error parameters (sign convention
    :math:`u_t = \\sum_i \\phi_i u_{t-i} + \\varepsilon_t + \\sum_j \\theta_j \\varepsilon_{t-j}`)."""

    ar: list[float] = Field(default_factory=list, max_length=12)
    ma: list[float] = Field(default_factory=list, max_length=12)

    @field_validator("ar", "ma")
    @classmethod
    def _finite(cls, v: list[float]) -> list[float]:
        if any(not math.isfinite(x) for x in v):
            raise ValueError("error parameters must be finite numbers")
        return v


class DeployedForecastsConfig(_Strict):
    """The production system's own forecasts of the target, ingested as a series whose rows are forecasts
    of a period issued at an origin (a source with ``issued_column``); ``horizon``: periods ahead (default:
    the model's ``horizon``)."""

    series: Name
    horizon: int | None = Field(None, ge=1)


class DeployedConfig(_Strict):
    """The model as it runs in production: its coefficients by drift's design column names (see
    :func:`drift.deployed.expected_terms`): ``const``, ``trend``, ``sin1``/``cos1``... or ``season1``...,
    each driver by its series name, each target lag as ``<target>[L<j>]``; optionally its ARMA error
    parameters; and/or ``forecasts``: the series of its logged forecasts (any model, even a black box);
    ``epoch``: the monitoring epoch these belong to (1 = the config as written)."""

    coefficients: dict[str, float] | None = None
    errors: DeployedErrorsConfig | None = None
    forecasts: DeployedForecastsConfig | None = None
    epoch: int = Field(1, ge=1)

    @field_validator("coefficients")
    @classmethod
    def _finite(cls, v: dict[str, float] | None) -> dict[str, float] | None:
        if v is None:
            return v
        bad = [k for k, x in v.items() if not math.isfinite(x)]
        if bad:
            raise ValueError(f"coefficient(s) {', '.join(bad)} must be finite numbers")
        if not v:
            raise ValueError("give at least one coefficient (by drift's column names: const, trend, ... and "
                             "each driver's series)")
        return v

    @model_validator(mode="after")
    def _something(self) -> DeployedConfig:
        if self.coefficients is None and self.forecasts is None:
            raise ValueError("deployed needs 'coefficients' (the production coefficients by column name) or "
                             "'forecasts' (the series of the production forecasts), or both")
        if self.errors is not None and self.coefficients is None:
            raise ValueError("deployed 'errors' go with 'coefficients' (the error model of the replayed fit)")
        return self


_ERR_RE = re.compile(r"^\s*(ols|ar\(\s*(\d+)\s*\)|arma\(\s*(\d+)\s*,\s*(\d+)\s*\))\s*$", re.IGNORECASE)


class ModelConfig(_Strict):
    name: Name
    target: Name
    frequency: Literal["D", "W", "M", "Q"]
    drivers: list[DriverConfig] = Field(default_factory=list)
    reference: ReferenceConfig
    errors: str = "ols"
    preprocess: PreprocessConfig = Field(default_factory=PreprocessConfig)
    target_lags: list[int] = Field(default_factory=list)
    horizon: int = Field(1, ge=1)
    unit: str = "units"
    monitor_start: date | None = None
    deployed: DeployedConfig | None = None

    @field_validator("monitor_start")
    @classmethod
    def _monitor_start(cls, v: date | None) -> date | None:
        return None if v is None else check_date(v)

    _freq_case = field_validator("frequency", mode="before")(lambda cls, v: frequency_letter(v))

    @field_validator("errors")
    @classmethod
    def _errors(cls, v: str) -> str:
        if not _ERR_RE.match(v):
            raise ValueError(f"'{v}' is not an error model; use 'ols', 'ar(p)' or 'arma(p,q)', e.g. 'ar(1)'")
        return v.strip().lower().replace(" ", "")

    @field_validator("target_lags")
    @classmethod
    def _tl(cls, v: list[int]) -> list[int]:
        if any(x < 1 for x in v):
            raise ValueError("target_lags must be positive integers (lags of the target, e.g. [1])")
        return sorted(set(v))

    @model_validator(mode="after")
    def _drivers_unique(self) -> ModelConfig:
        seen = set()
        for d in self.drivers:
            if d.series in seen:
                raise ValueError(f"driver '{d.series}' is listed twice")
            seen.add(d.series)
            if d.series == self.target:
                raise ValueError(f"driver '{d.series}' is the target itself; use target_lags for its lags")
        return self

    @property
    def error_order(self) -> tuple[int, int]:
        """(p, q) of the error model; (0, 0) for OLS."""
        m = _ERR_RE.match(self.errors)
        assert m is not None  # validated above
        if m.group(2) is not None:
            return int(m.group(2)), 0
        if m.group(3) is not None:
            return int(m.group(3)), int(m.group(4))
        return 0, 0

    @property
    def season_length(self) -> int | None:
        if self.preprocess.season == "none":
            return None
        if self.preprocess.season == "auto":
            return SEASON_BY_FREQ[self.frequency]
        return int(self.preprocess.season)

    @property
    def series(self) -> list[str]:
        return [self.target, *[d.series for d in self.drivers]]

    @property
    def read_series(self) -> list[str]:
        """Every series a check reads for the model: target, drivers and the logged production forecasts."""
        fs = self.forecast_series
        return [*self.series, fs] if fs is not None else self.series

    @property
    def forecast_series(self) -> str | None:
        """The series of the production forecasts (``deployed.forecasts.series``), if any."""
        if self.deployed is None or self.deployed.forecasts is None:
            return None
        return self.deployed.forecasts.series


class CheckConfig(_Strict):
    """Thresholds of the check and of the verdicts (defaults are common practice, see README)."""

    level: float = Field(0.05, gt=0, lt=0.5)
    warn_level: float = Field(0.10, gt=0, lt=0.5)
    recent_window: int = Field(52, ge=8)
    rolling_window: int | None = Field(None, ge=8)
    max_lag: int | None = Field(None, ge=1)
    feed_limit: int = Field(4, ge=1)
    monitor_detector: Literal["csw", "mosum", "page"] = "page"
    #: the span over which the monitors' false-alarm guarantee is stated: a duration ("2 years",
    #: "104 periods", "18 months", "26 weeks", "8 quarters", "730 days") or a bare number, a multiple of
    #: the reference length (at most 6); see :meth:`horizon_periods`
    horizon: float | str = "2 years"
    #: how chunks of models are run (see drift.executor); dask_scheduler None = a LocalCluster for the run.
    #: ``executor`` may also be written as a mapping, ``{kind: dask, address: tcp://host:8786}`` (an existing
    #: cluster; ``address`` sets ``dask_scheduler``), optionally with ``workers``
    executor: Literal["local", "process", "dask"] = "local"
    chunk_size: int = Field(500, ge=1)
    workers: int | None = Field(None, ge=1)
    dask_scheduler: str | None = None

    @field_validator("horizon", mode="before")
    @classmethod
    def _horizon(cls, v: Any) -> float | str:
        if isinstance(v, bool):  # pydantic locates a ValueError (not a TypeError) at check.horizon
            raise ValueError(f"horizon must be a duration ('2 years', '104 periods') or a multiple of the "  # noqa: TRY004
                             f"reference length, got {v!r}")
        if isinstance(v, (int, float)):
            if not math.isfinite(float(v)) or not 0 < float(v) <= 6.0:
                raise ValueError(f"horizon as a multiple of the reference length must be in (0, 6], got {v!r}")
            return float(v)
        if isinstance(v, str):
            text = v.strip()
            if re.fullmatch(r"[-+0-9.eE]+", text):
                try:
                    number = float(text)
                except ValueError:
                    number = math.nan
                return cls._horizon(number)
            _parse_horizon(text)
            return text
        raise ValueError(f"horizon must be a duration ('2 years', '104 periods') or a multiple of the reference "
                         f"length, got {v!r}")

    def horizon_periods(self, freq: str, n_ref: int) -> int:
        """The monitoring horizon in periods of a model of frequency ``freq`` with ``n_ref`` reference
        periods: a duration converted at the frequency's periods per year (rounded, at least 1), or a
        bare number times ``n_ref`` (rounded up)."""
        if isinstance(self.horizon, float):
            return max(1, math.ceil(self.horizon * n_ref - 1e-9))
        count, unit = _parse_horizon(self.horizon)
        if unit == "period":
            return max(1, round(count))
        return max(1, round(count * PERIODS_PER_YEAR[freq] / UNITS_PER_YEAR[unit]))

    @model_validator(mode="before")
    @classmethod
    def _executor_mapping(cls, data: Any) -> Any:
        if not isinstance(data, dict) or not isinstance(data.get("executor"), dict):
            return data
        spec = dict(data["executor"])
        unknown = sorted(set(spec) - {"kind", "address", "workers"})
        if unknown:
            raise ValueError(f"executor: unknown key(s) {', '.join(unknown)}; an executor mapping takes kind, "
                             "address (dask only) and workers")
        if "kind" not in spec:
            raise ValueError("executor: the mapping needs 'kind' (local, process or dask)")
        out = {k: v for k, v in data.items() if k != "executor"}
        out["executor"] = spec["kind"]
        if spec.get("address") is not None:
            if spec["kind"] != "dask":
                raise ValueError(f"executor: 'address' is for kind dask (a scheduler such as "
                                 f"tcp://host:8786), not {spec['kind']!r}")
            if data.get("dask_scheduler") not in (None, spec["address"]):
                raise ValueError("executor.address and dask_scheduler both name a scheduler; keep one")
            if not isinstance(spec["address"], str) or "://" not in spec["address"]:
                raise ValueError(f"executor.address {spec['address']!r} must be a scheduler address such as "
                                 "tcp://10.0.0.5:8786")
            out["dask_scheduler"] = spec["address"]
        if "workers" in spec:
            out["workers"] = spec["workers"]
        return out

    @model_validator(mode="after")
    def _levels(self) -> CheckConfig:
        if self.warn_level < self.level:
            raise ValueError(f"warn_level {self.warn_level} must be at least level {self.level}")
        return self


class EmailChannel(_Strict):
    kind: Literal["email"]
    name: Name | None = None
    host: str
    port: int = Field(25, ge=1, le=65535)
    security: Literal["none", "starttls", "ssl"] = "none"
    sender: str
    to: list[str]
    username_env: str | None = None
    password_env: str | None = None
    timeout: float = Field(20.0, gt=0)

    @field_validator("to", mode="before")
    @classmethod
    def _to(cls, v: Any) -> Any:
        return [v] if isinstance(v, str) else v


class FolderChannel(_Strict):
    kind: Literal["folder"]
    name: Name | None = None
    path: str


class WebhookChannel(_Strict):
    kind: Literal["webhook"]
    name: Name | None = None
    url: str
    timeout: float = Field(10.0, gt=0)
    headers_env: dict[str, str] = Field(default_factory=dict)

    @field_validator("url")
    @classmethod
    def _http_only(cls, v: str) -> str:
        from urllib.parse import urlsplit

        parts = urlsplit(v)
        if parts.scheme.lower() not in ("http", "https") or not parts.netloc:
            raise ValueError("a webhook url must be an http:// or https:// address with a host")
        return v


Channel = Annotated[EmailChannel | FolderChannel | WebhookChannel, Field(discriminator="kind")]


class AlertsConfig(_Strict):
    channels: list[Channel] = Field(default_factory=list)
    min_action: Literal["watch", "act"] = "act"
    retry_backoff: timedelta = timedelta(minutes=5)
    retry_max_backoff: timedelta = timedelta(hours=6)
    digest_path: str = "digests/"
    notify_cleared: bool = False
    sending_timeout: timedelta = timedelta(minutes=15)
    #: tries of one notice before it is given up (outbox status ``dead``, shown by status and the digest);
    #: with the default backoff the 20th try comes about 3.4 days after the first
    max_attempts: int = Field(20, ge=1)

    _dur = field_validator("retry_backoff", "retry_max_backoff", "sending_timeout", mode="before")(
        lambda cls, v: parse_duration(v)
    )


_EVERY_RE = re.compile(r"^\s*every\s+(\d+)\s*([smhd])\s*$", re.IGNORECASE)


def parse_trigger(text: str) -> tuple[str, Any]:
    """``"every 10m"`` -> ("interval", timedelta); a 5-field cron string -> ("cron", fields)."""
    m = _EVERY_RE.match(text)
    if m:
        n = int(m.group(1))
        if n <= 0:
            raise ValueError(f"'{text}': the interval must be positive")
        return "interval", timedelta(seconds=n * _UNIT_SECONDS[m.group(2).lower()])
    fields = text.split()
    if len(fields) != 5:
        raise ValueError(
            f"'{text}' is neither a cron expression (5 fields: minute hour day month weekday) "
            "nor an interval ('every <n>s|m|h|d')"
        )
    from apscheduler.triggers.cron import CronTrigger

    try:
        CronTrigger.from_crontab(text, timezone="UTC")
    except ValueError as exc:
        raise ValueError(f"'{text}' is not a valid cron expression: {exc}") from None
    return "cron", fields


class ScheduleConfig(_Strict):
    timezone: str | None = None
    ingest: str | None = None
    check: str | None = None
    digest: str | None = None
    retry: str | None = "every 10m"
    misfire_grace: timedelta = timedelta(hours=1)
    job_timeout: timedelta = timedelta(hours=2)

    _dur = field_validator("misfire_grace", "job_timeout", mode="before")(lambda cls, v: parse_duration(v))

    @field_validator("timezone")
    @classmethod
    def _tz(cls, v: str | None) -> str | None:
        if v is None:
            return v
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

        try:
            ZoneInfo(v)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"'{v}' is not a known time zone; use an IANA name such as 'Europe/Lisbon'") from None
        return v

    @field_validator("ingest", "check", "digest", "retry")
    @classmethod
    def _trigger(cls, v: str | None) -> str | None:
        if v is not None:
            parse_trigger(v)
        return v


class Config(_Strict):
    """The whole validated configuration. ``base_dir`` is the folder of the config file."""

    store: str | None = None
    timezone: str = "UTC"
    sources: list[SourceConfig] = Field(default_factory=list)
    models: list[ModelConfig] = Field(default_factory=list)
    check: CheckConfig = Field(default_factory=CheckConfig)
    alerts: AlertsConfig = Field(default_factory=AlertsConfig)
    schedule: ScheduleConfig = Field(default_factory=ScheduleConfig)

    # not from YAML
    base_dir: Path = Field(default=Path("."), exclude=True)
    _delays_of: tuple[list[ModelConfig], int, dict[str, timedelta]] | None = PrivateAttr(default=None)
    file: Path | None = Field(default=None, exclude=True)

    @field_validator("store")
    @classmethod
    def _store(cls, v: str | None) -> str | None:
        """A store URL drift can open: SQLite or PostgreSQL (the driver is checked when it is opened)."""
        if v is None:
            return v
        from sqlalchemy.engine import make_url
        from sqlalchemy.exc import ArgumentError

        hint = "use sqlite:///drift.db (a file, relative to the config) or postgresql+psycopg://user@host/db"
        try:
            backend = make_url(v).get_backend_name()
        except (ArgumentError, ValueError):
            raise ValueError(f"not a store URL; {hint}") from None
        if backend not in STORE_BACKENDS:
            raise ValueError(f"drift stores its data in SQLite or PostgreSQL, not '{backend}'; {hint}")
        return v

    @model_validator(mode="after")
    def _cross(self) -> Config:
        from collections import Counter

        for what, names in (("source", [s.name for s in self.sources]), ("model", [m.name for m in self.models])):
            dup = sorted(n for n, k in Counter(names).items() if k > 1)
            if dup:
                raise ValueError(f"{what} names must be unique; repeated: {dup}")
        return self

    def require(self, *sections: str) -> None:
        """Raise :class:`ConfigError` naming the first of ``sections`` ('sources', 'models') that is empty:
        a command that needs it has nothing to do without it."""
        what = {"sources": "where the data come from: a list of sources, each with name, kind, path (or url and "
                           "query) and period_column",
                "models": "what to check: a list of models, each with name, target, frequency, drivers and "
                          "reference"}
        for sec in sections:
            if not getattr(self, sec):
                raise ConfigError(f"the config has no {sec}: add '{sec}:' saying {what[sec]} (config/example.yaml "
                                  f"shows one)", file=str(self.file) if self.file else None, key=sec)

    # ----- derived views (no state) -----
    def store_url(self) -> str:
        """The SQLAlchemy URL of the store; a relative SQLite path is taken relative to the config file."""
        url = self.store or "sqlite:///drift.db"
        if url.startswith("sqlite:///") and not url.startswith("sqlite:////"):
            rel = url[len("sqlite:///"):]
            if rel and rel != ":memory:":
                return "sqlite:///" + str((self.base_dir / rel).resolve())
        return url

    def resolve(self, path: str) -> Path:
        p = Path(os.path.expanduser(path))
        return p if p.is_absolute() else (self.base_dir / p)

    def source_files(self, source: SourceConfig) -> list[Path]:
        assert source.path is not None
        pattern = str(self.resolve(source.path))
        if any(ch in source.path for ch in "*?["):
            return [Path(p) for p in sorted(_glob.glob(pattern))]
        return [Path(pattern)]

    def model(self, name: str) -> ModelConfig:
        for m in self.models:
            if m.name == name:
                return m
        raise ConfigError(
            f"no model named '{name}'" + _did_you_mean(name, [m.name for m in self.models]),
            file=str(self.file) if self.file else None, key="models",
        )

    def series_frequency(self) -> dict[str, str]:
        """Frequency of every series some model uses (the model's frequency)."""
        out: dict[str, str] = {}
        for m in self.models:
            for s in m.series:
                out.setdefault(s, m.frequency)
        return out

    def driver_delay(self, model: ModelConfig, driver: DriverConfig) -> timedelta:
        if driver.delay is not None:
            return driver.delay
        return self._series_delays().get(driver.series, timedelta(0))

    def series_delays(self) -> dict[str, timedelta]:
        """Publication delay per series: the driver's own ``delay`` when a model sets one."""
        return dict(self._series_delays())

    def _series_delays(self) -> dict[str, timedelta]:
        # computed once per models list (the check asks per driver of every model: a walk over all the
        # models each time was quadratic, a second per 1,000 models)
        cached = self._delays_of
        if cached is not None and cached[0] is self.models and cached[1] == len(self.models):
            return cached[2]
        out: dict[str, timedelta] = {}
        for m in self.models:
            for d in m.drivers:
                if d.delay is not None:
                    out[d.series] = max(out.get(d.series, timedelta(0)), d.delay)
        self._delays_of = (self.models, len(self.models), out)
        return out


# --------------------------------------------------------------------------------------------------
# loading with located errors


def _did_you_mean(word: str, options: list[str]) -> str:
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


#: largest config file read (bytes); a bigger one is refused before it is parsed
MAX_CONFIG_BYTES = 16 * 2**20
#: largest number of YAML nodes the config may expand to through its aliases (``*name`` repeats the node
#: anchored ``&name``): a legitimate config with thousands of models stays far below; a nest of aliases
#: that would expand to billions of nodes (an "alias bomb") is refused before anything walks it
MAX_CONFIG_NODES = 2_000_000
#: deepest nesting of mappings and lists a config may have (drift's own keys go about 6 deep)
MAX_CONFIG_DEPTH = 64


#: the YAML loader: PyYAML's C (libyaml) safe loader when it was built with one (several times faster on a
#: large config), else its pure-Python safe loader; both give the same nodes, marks and data
_LOADER: Any = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


def _parse_yaml(text: str, file: str) -> tuple[Any, _Lines]:
    """Safe-load the YAML text once, with limits; the data and the (lazily found) line of each key path.

    The text is composed into nodes once, one pass over the distinct nodes checks them
    (:func:`_inspect`), and the data are constructed from the same nodes. Line numbers are looked up only
    when an error needs one.

    Raises
    ------
    ConfigError : not YAML, nested too deeply, recursive aliases, an expansion beyond
        :data:`MAX_CONFIG_NODES`, a key repeated in one mapping, or a NUL byte in a value.
    """
    loader = _LOADER(text)
    try:
        root = _yaml_step(loader.get_single_node, file)
        if root is None:
            return None, _Lines(None, file)
        if _inspect(root, file):
            _expanded_size(root, file)
        return _yaml_step(lambda: _construct(loader, root), file), _Lines(root, file)
    finally:
        loader.dispose()


_STR, _MAP, _SEQ, _MERGE = (f"tag:yaml.org,2002:{t}" for t in ("str", "map", "seq", "merge"))


def _construct(loader: Any, root: yaml.Node) -> Any:
    """The data of the checked nodes, as the loader's safe constructor gives them (an oracle test compares
    with ``yaml.safe_load``): strings, plain mappings and lists are built here directly; every other node
    (numbers, booleans, null, dates, a mapping with a merge key ``<<`` or a key that is not a scalar) goes
    to the loader's constructor. A node shared through an alias gives one object, as in PyYAML. Recursion
    is bounded by :data:`MAX_CONFIG_DEPTH` (checked by :func:`_inspect`)."""
    memo: dict[int, Any] = {}
    scalar, mapping, sequence = yaml.ScalarNode, yaml.MappingNode, yaml.SequenceNode

    def build(node: yaml.Node) -> Any:
        key = id(node)
        if key in memo:
            return memo[key]
        tag, cls = node.tag, type(node)
        if tag == _STR and cls is scalar:
            out: Any = node.value
        elif tag == _MAP and cls is mapping and all(type(k) is scalar and k.tag != _MERGE for k, _ in node.value):
            out = memo[key] = {}
            for k, v in node.value:
                out[build(k)] = build(v)
        elif tag == _SEQ and cls is sequence:
            out = memo[key] = []
            out.extend(build(v) for v in node.value)
        else:
            out = loader.construct_object(node, deep=True)
        memo[key] = out
        return out

    return build(root)


class _Lines:
    """Key path -> 1-based line, found by walking the nodes the first time one is asked for (an error)."""

    def __init__(self, root: yaml.Node | None, file: str) -> None:
        self._root, self._file = root, file
        self._map: dict[tuple[Any, ...], int] | None = None

    def _lines(self) -> dict[tuple[Any, ...], int]:
        if self._map is None:
            self._map = _line_map(self._root, self._file) if self._root is not None else {}
        return self._map

    def get(self, key: tuple[Any, ...], default: int | None = None) -> int | None:
        return self._lines().get(key, default)

    def __contains__(self, key: tuple[Any, ...]) -> bool:
        return key in self._lines()

    def __getitem__(self, key: tuple[Any, ...]) -> int:
        return self._lines()[key]


def _yaml_step(step: Any, file: str) -> Any:
    """``step()`` with PyYAML's errors (and a recursion too deep for it) as located ConfigErrors."""
    try:
        return step()
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        problem = getattr(exc, "problem", None) or str(exc)
        if "nesting depth" in str(problem):  # libyaml's own depth limit (PyYAML 6.0.4 and later)
            raise ConfigError("not valid YAML for drift: nested too deeply (the YAML parser's own limit)",
                              file=file, line=mark.line + 1 if mark is not None else None) from None
        raise ConfigError(f"not valid YAML: {problem}", file=file,
                          line=mark.line + 1 if mark is not None else None) from None
    except RecursionError:
        raise ConfigError("not valid YAML for drift: nested too deeply", file=file) from None


def _inspect(root: yaml.Node, file: str) -> bool:
    """One pass over the distinct nodes: a key written twice in one mapping (YAML loaders keep the last one
    and silently drop the first) and a NUL byte in a scalar (no store keeps one in text) are errors.
    Returns whether some node is reached twice (through an alias): only then can the expansion be larger
    than the text, and :func:`_expanded_size` measures it."""
    seen: set[int] = set()
    shared = False
    stack = [(root, 0)]
    mapping, sequence = yaml.MappingNode, yaml.SequenceNode
    while stack:
        node, depth = stack.pop()
        if id(node) in seen:
            shared = True
            continue
        seen.add(id(node))
        if depth > MAX_CONFIG_DEPTH:
            raise ConfigError(f"not valid YAML for drift: nested too deeply (more than {MAX_CONFIG_DEPTH} levels)",
                              file=file, line=node.start_mark.line + 1)
        if isinstance(node, mapping):
            keys: set[Any] = set()
            for k, v in node.value:
                if isinstance(k, yaml.ScalarNode) and k.value != "<<":
                    if k.value in keys:
                        _twice(root, node, k, file)
                    keys.add(k.value)
                stack.append((k, depth + 1))
                stack.append((v, depth + 1))
        elif isinstance(node, sequence):
            stack.extend((v, depth + 1) for v in node.value)
        elif "\x00" in node.value:
            path = _path_of(root, node)
            raise ConfigError(
                f"{node.value[:40]!r} contains a NUL byte (\\0 or \\x00): no store keeps one in text; remove it",
                file=file, key=_key_path(path) if path else None, line=node.start_mark.line + 1)
    return shared


def _twice(root: yaml.Node, mapping: yaml.MappingNode, key: yaml.ScalarNode, file: str) -> None:
    """Raise the error for ``key`` written twice in ``mapping`` (both lines, and the key path)."""
    first = next(k for k, _ in mapping.value if isinstance(k, yaml.ScalarNode) and k.value == key.value)
    path = (_path_of(root, mapping) or ()) + (key.value,)
    raise ConfigError(f"key '{key.value}' is written twice in the same mapping (lines {first.start_mark.line + 1} "
                      f"and {key.start_mark.line + 1}); keep one", file=file, key=_key_path(path),
                      line=key.start_mark.line + 1)


def _path_of(root: yaml.Node, target: yaml.Node) -> tuple[Any, ...] | None:
    """The key path of ``target`` (the first one, for a node reached through an alias); for error messages."""
    seen: set[int] = set()
    stack: list[tuple[yaml.Node, tuple[Any, ...]]] = [(root, ())]
    while stack:
        node, path = stack.pop()
        if node is target:
            return path
        if id(node) in seen:
            continue
        seen.add(id(node))
        if isinstance(node, yaml.MappingNode):
            for k, v in node.value:
                key = k.value if isinstance(k, yaml.ScalarNode) else None
                if k is target:
                    return path
                stack.append((v, path + (key,)))
        elif isinstance(node, yaml.SequenceNode):
            stack.extend((v, path + (i,)) for i, v in enumerate(node.value))
    return None


def _expanded_size(root: yaml.Node, file: str) -> int:
    """Number of nodes the document has once every alias is expanded (iterative, memoised per node, so
    it costs one pass over the distinct nodes however large the expansion)."""
    size: dict[int, int] = {}
    on_path: set[int] = set()
    stack: list[tuple[yaml.Node, bool]] = [(root, False)]
    while stack:
        node, done = stack.pop()
        key = id(node)
        children = _children(node)
        if done:
            on_path.discard(key)
            total = 1 + sum(size[id(ch)] for ch in children)
            if total > MAX_CONFIG_NODES:
                raise ConfigError(
                    f"the config expands to more than {MAX_CONFIG_NODES:,} YAML nodes through its aliases "
                    f"(*name repeating &name): refused; write the repeated parts out or use fewer aliases",
                    file=file, line=node.start_mark.line + 1)
            size[key] = total
            continue
        if key in size:
            continue
        if key in on_path:
            raise ConfigError("the config refers to itself through an alias (an anchor used inside its own "
                              "value): refused", file=file, line=node.start_mark.line + 1)
        on_path.add(key)
        stack.append((node, True))
        for ch in children:
            if id(ch) not in size:
                if id(ch) in on_path:
                    raise ConfigError("the config refers to itself through an alias (an anchor used inside its "
                                      "own value): refused", file=file, line=ch.start_mark.line + 1)
                stack.append((ch, False))
    return size[id(root)]


def _children(node: yaml.Node) -> list[yaml.Node]:
    if isinstance(node, yaml.MappingNode):
        return [x for kv in node.value for x in kv]
    if isinstance(node, yaml.SequenceNode):
        return list(node.value)
    return []


def _line_map(root: yaml.Node, file: str) -> dict[tuple[Any, ...], int]:
    """Map key paths (tuples of keys / list indices) to 1-based line numbers; each node is visited once (a
    node repeated through an alias keeps the path where it was first seen). Called only when an error needs
    a line (:class:`_Lines`); keys written twice were refused by :func:`_inspect` already."""
    out: dict[tuple[Any, ...], int] = {}
    seen: set[int] = set()
    stack: list[tuple[yaml.Node, tuple[Any, ...]]] = [(root, ())]
    while stack:
        node, path = stack.pop()
        out.setdefault(path, node.start_mark.line + 1)
        if id(node) in seen:
            continue
        seen.add(id(node))
        if isinstance(node, yaml.MappingNode):
            for k, v in node.value:
                key = k.value if isinstance(k, yaml.ScalarNode) else None
                if key is not None and key != "<<":
                    out[path + (key,)] = k.start_mark.line + 1
                    stack.append((v, path + (key,)))
        elif isinstance(node, yaml.SequenceNode):
            for i, v in enumerate(node.value):
                stack.append((v, path + (i,)))
    return out


_MODEL_FOR_LOC: dict[str, type[BaseModel]] = {}


def _allowed_keys(loc: tuple[Any, ...]) -> list[str]:
    """Keys allowed at the mapping that contains ``loc[-1]`` (for did-you-mean)."""
    model: Any = Config
    for part in loc[:-1]:
        if isinstance(part, int):
            continue
        fields = getattr(model, "model_fields", {})
        if part not in fields:
            return []
        ann = fields[part].annotation
        model = _inner_model(ann, part)
        if model is None:
            return []
    return [k for k in getattr(model, "model_fields", {}) if k not in ("base_dir", "file")]


def _inner_model(ann: Any, part: Any) -> Any:
    import typing

    args = typing.get_args(ann)
    if isinstance(ann, type) and issubclass(ann, BaseModel):
        return ann
    for a in args:
        r = _inner_model(a, part)
        if r is not None:
            return r
    return None


def _key_path(loc: tuple[Any, ...]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def _clean_loc(loc: tuple[Any, ...]) -> tuple[Any, ...]:
    # pydantic inserts discriminator tags ('email', 'folder', ...) and function names into loc
    cleaned = []
    for part in loc:
        if isinstance(part, str) and (part in ("email", "folder", "webhook") or part.startswith("function-")):
            continue
        cleaned.append(part)
    return tuple(cleaned)


def load_config(path: str | os.PathLike[str], *, check_files: bool = False) -> Config:
    """Read and validate a YAML config file.

    Raises
    ------
    ConfigError
        naming the file, the key path and the line, with what was expected.

    Notes
    -----
    Python's cyclic garbage collector is paused while the file is loaded: the hundreds of thousands of YAML
    nodes and objects a large config creates (none of them garbage in a cycle) otherwise trigger collection
    after collection over the growing heap, which took most of the load time (bench_config.py: composing
    the nodes of 10,000 models 2.9 s with it, 0.8 s without).
    """
    paused = gc.isenabled()
    gc.disable()
    try:
        return _load_config(Path(path), check_files)
    finally:
        if paused:
            gc.enable()


def _load_config(file: Path, check_files: bool) -> Config:
    if not file.exists():
        raise ConfigError("config file not found", file=str(file))
    try:
        if file.is_dir():
            raise ConfigError("is a folder, not a config file", file=str(file))
        if file.stat().st_size > MAX_CONFIG_BYTES:
            raise ConfigError(f"the config file is larger than {MAX_CONFIG_BYTES // 2**20} MiB: refused",
                              file=str(file))
        text = file.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"cannot read the config file: {exc}", file=str(file)) from None
    data, lines = _parse_yaml(text, str(file))
    if data is None or data == {}:
        raise ConfigError("the config file is empty: it needs 'sources' (where the data come from) and 'models' "
                          "(what to check); config/example.yaml shows both", file=str(file))
    if not isinstance(data, dict):
        raise ConfigError("the config must be a mapping of keys (store, sources, models, ...)", file=str(file), line=1)
    try:
        cfg = Config.model_validate({**data, "base_dir": file.resolve().parent, "file": file})
    except ValidationError as exc:
        # a misspelt key shows up twice (unknown key + missing required key): report the misspelling
        errs = sorted(exc.errors(), key=lambda e: 0 if e["type"] == "extra_forbidden" else 1)
        err = errs[0]
        loc = _clean_loc(tuple(err["loc"]))
        line = None
        for i in range(len(loc), -1, -1):
            if loc[:i] in lines:
                line = lines[loc[:i]]
                break
        etype = err["type"]
        if etype == "extra_forbidden":
            allowed = _allowed_keys(loc)
            msg = f"unknown key '{loc[-1]}'" + _did_you_mean(str(loc[-1]), allowed)
            if allowed:
                msg += "; allowed here: " + ", ".join(allowed)
        elif etype == "missing":
            msg = f"required key '{loc[-1]}' is missing"
        elif etype == "literal_error":
            expected = err.get("ctx", {}).get("expected", "")
            msg = f"'{err.get('input')}' is not allowed; expected {expected}"
            if loc and loc[-1] == "frequency":
                msg += " (or " + ", ".join(repr(w) for w in _FREQUENCY_WORDS) + ")"
        elif etype == "union_tag_invalid":
            msg = f"'{err.get('input', {}).get('kind') if isinstance(err.get('input'), dict) else err.get('input')}' "
            msg += "is not a channel kind; expected 'email', 'folder' or 'webhook'"
        else:
            msg = err["msg"].removeprefix("Value error, ")
        if len(exc.errors()) > 1:
            msg += f" (and {len(exc.errors()) - 1} more problem(s))"
        raise ConfigError(msg, file=str(file), key=_key_path(loc) or None, line=line) from None
    _check_semantics(cfg, lines)
    if check_files:
        for s in cfg.sources:
            if s.kind != "sql" and not cfg.source_files(s):
                raise ConfigError(f"no file matches '{s.path}'", file=str(file),
                                  key=f"sources[{cfg.sources.index(s)}].path")
    return cfg


def _check_semantics(cfg: Config, lines: _Lines) -> None:
    """Checks that need more than one key: lags vs delays, the time zone."""
    file = str(cfg.file) if cfg.file else None
    for i, m in enumerate(cfg.models):
        step = period_length(m.frequency)
        most = int(MAX_SPAN_YEARS * 366 / step.days)
        spans: list[tuple[tuple[Any, ...], int, str]] = [(("models", i, "horizon"), m.horizon, "horizon")]
        spans += [(("models", i, "drivers", j, "lag"), d.lag, "lag") for j, d in enumerate(m.drivers)]
        spans += [(("models", i, "target_lags"), x, "target lag") for x in m.target_lags]
        for key, v, what in spans:
            if v > most:
                raise ConfigError(f"{what} {v} is more than {MAX_SPAN_YEARS} years of '{m.frequency}' periods "
                                  f"(at most {most})", file=file, key=_key_path(key),
                                  line=lines.get(key) or lines.get(key[:-1]))
        fs = m.forecast_series
        if fs is not None and fs in m.series:
            key = ("models", i, "deployed", "forecasts", "series")
            raise ConfigError(f"'{fs}' is the model's target or one of its drivers; the production forecasts "
                              "need a series of their own", file=file, key=_key_path(key),
                              line=lines.get(key) or lines.get(key[:-1]))
        if m.deployed is not None and m.deployed.coefficients is not None:
            from drift.deployed import check_terms

            problem = check_terms(m)
            if problem:
                key = ("models", i, "deployed", "coefficients")
                raise ConfigError(problem, file=file, key=_key_path(key), line=lines.get(key) or lines.get(key[:-1]))
        for j, d in enumerate(m.drivers):
            delay = d.delay or timedelta(0)
            if d.form == "lagged":
                # value for period t-L is usable at end(t-L) + delay; the forecast for period t is made at
                # the start of t (= end of t-1), so we need L*step >= step + delay, i.e. L >= 1 + delay/step.
                need = 1 + _ceil_div(delay, step)
                if d.lag < need:
                    key = ("models", i, "drivers", j, "lag")
                    raise ConfigError(
                        f"lag {d.lag} is too short for '{d.series}': with a publication delay of "
                        f"{_fmt_td(delay)}, its value "
                        + ("for the forecast period itself" if d.lag == 0 else
                           f"from {d.lag} period{'s' if d.lag != 1 else ''} before the forecast period")
                        + " does not exist yet when the forecast is made, so the model would use data from the "
                        f"future; use lag >= {need}, or form 'forecast'/'known' if a forecast or plan of it "
                        f"is available in advance",
                        file=file, key=_key_path(key), line=lines.get(key) or lines.get(key[:-1]),
                    )
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    try:
        ZoneInfo(cfg.timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError(f"'{cfg.timezone}' is not a known time zone", file=file, key="timezone",
                          line=lines.get(("timezone",))) from None


def _ceil_div(a: timedelta, b: timedelta) -> int:
    q, r = divmod(a, b)
    return int(q) + (1 if r else 0)


def _fmt_td(td: timedelta) -> str:
    s = td.total_seconds()
    if s == 0:
        return "0"
    if s % 86400 == 0:
        d = int(s // 86400)
        return f"{d} day" + ("s" if d != 1 else "")
    if s % 3600 == 0:
        return f"{int(s // 3600)} hours"
    return str(td)


#: periods per year of each frequency, and units per year of the horizon's duration words
PERIODS_PER_YEAR = {"D": 365.25, "W": 365.25 / 7.0, "M": 12.0, "Q": 4.0}
UNITS_PER_YEAR = {"year": 1.0, "quarter": 4.0, "month": 12.0, "week": 365.25 / 7.0, "day": 365.25}
_HORIZON_RE = re.compile(r"^\s*([0-9]+(?:\.[0-9]+)?)\s*(year|quarter|month|week|day|period)s?\s*$", re.IGNORECASE)


def _parse_horizon(text: str) -> tuple[float, str]:
    """('2 years') -> (2.0, 'year'); ValueError naming the accepted forms otherwise."""
    mt = _HORIZON_RE.match(text)
    if not mt or float(mt.group(1)) <= 0:
        raise ValueError(f"horizon must be a positive duration such as '2 years', '104 periods', '18 months', "
                         f"'26 weeks', '8 quarters' or '730 days', or a multiple of the reference length "
                         f"(a number up to 6), got {text!r}")
    return float(mt.group(1)), mt.group(2).lower()


def period_length(freq: str) -> timedelta:
    """Nominal length of one period (for delays and lag checks; months and quarters are approximate)."""
    return {"D": timedelta(days=1), "W": timedelta(days=7), "M": timedelta(days=28),
            "Q": timedelta(days=89)}[freq]


def pandas_freq(freq: str, anchor: date | None = None) -> str:
    """pandas offset alias for a drift frequency (weeks anchored on the weekday of ``anchor``)."""
    if freq == "W":
        wd = (anchor or date(2021, 1, 4)).weekday()
        return "W-" + ["SUN", "MON", "TUE", "WED", "THU", "FRI", "SAT"][(wd - 1) % 7]
    return {"D": "D", "M": "MS", "Q": "QS"}[freq]


def period_start(ts: pd.Timestamp | date, freq: str, *, week_anchor: int | None = None) -> pd.Timestamp:
    """The first day of the period that contains ``ts`` (weeks start on weekday ``week_anchor``)."""
    t = pd.Timestamp(ts).normalize()
    if freq == "D":
        return t
    if freq == "W":
        anchor = 0 if week_anchor is None else week_anchor
        return t - pd.Timedelta(days=(t.weekday() - anchor) % 7)
    if freq == "M":
        return t.replace(day=1)
    if freq == "Q":
        return t.replace(day=1, month=3 * ((t.month - 1) // 3) + 1)
    raise ValueError(f"frequency must be one of {FREQUENCIES}, got {freq!r}")


def next_period(ts: pd.Timestamp, freq: str, n: int = 1) -> pd.Timestamp:
    """Start of the period ``n`` periods after the one starting at ``ts``."""
    t = pd.Timestamp(ts)
    if freq == "D":
        return t + pd.Timedelta(days=n)
    if freq == "W":
        return t + pd.Timedelta(days=7 * n)
    if freq == "M":
        return t + pd.DateOffset(months=n)
    if freq == "Q":
        return t + pd.DateOffset(months=3 * n)
    raise ValueError(f"frequency must be one of {FREQUENCIES}, got {freq!r}")
