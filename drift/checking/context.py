"""What one model carries through the check, and the helpers every stage shares.

Takes nothing: it defines the per-model context ``_Ctx`` (built by :mod:`drift.checking.designs`, filled
by each later stage: tests, alarms, actions, drivers, charts, accuracy) and gives the stages ``_num`` /
``_list`` (numbers as strict JSON) and ``_failure`` (the reason of a model's error entry, logged).
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np
import pandas as pd

from drift.config import Config, ModelConfig
from drift.exceptions import DriftError
from drift.panel import Design, Vintages
from drift.verdicts import Action

#: every stage logs under the check's one name, as when the check was one module
log = logging.getLogger("drift.check")


@dataclass
class _Ctx:
    """One model on its way through the check: its design (:mod:`drift.checking.designs`), then what each
    later stage adds (tests, alarms, actions, drivers, charts, accuracy, late feeds, the deployed block)."""

    cfg: Config
    model: ModelConfig
    design: Design
    as_of: datetime
    #: the model's observations: a frame, or a function that makes it on first use of :attr:`obs` (most
    #: checks never read it: the stages work on ``vintages``)
    obs_source: pd.DataFrame | Callable[[], pd.DataFrame] | None = None
    #: the model's observations as arrays, series -> Vintages (``c.obs`` converted once; what
    #: :func:`drift.panel.build_design`, :func:`~drift.panel.values_as_of` and :func:`~drift.panel.latest_values`
    #: take without converting a frame again)
    vintages: Mapping[str, Vintages] | None = None
    y: np.ndarray = None  # type: ignore[assignment]
    X: np.ndarray = None  # type: ignore[assignment]
    error_model: str | None = None
    scale_logvar: float = 0.0
    n_ref_ok: int = 0  # complete rows in the reference period (after prewhitening)
    horizon_n: int = 0  # monitoring horizon in periods (check.horizon at the model's frequency)
    actions: list[Action] = field(default_factory=list)
    alarms: list[dict[str, Any]] = field(default_factory=list)
    tests: list[dict[str, Any]] = field(default_factory=list)
    drivers: list[dict[str, Any]] = field(default_factory=list)
    charts: dict[str, Any] = field(default_factory=dict)
    accuracy: dict[str, Any] = field(default_factory=dict)
    late: set[str] = field(default_factory=set)
    deployed: dict[str, Any] = field(default_factory=dict)

    @property
    def obs(self) -> pd.DataFrame:
        """The model's observations (series, period, issued_at, value, available_at), made on first use."""
        if callable(self.obs_source):
            self.obs_source = self.obs_source()
        return self.obs_source  # type: ignore[return-value]


def _num(x: Any) -> float | None:
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _list(a: np.ndarray) -> list[float | None]:
    """Floats rounded to 6 decimals for the payload, NaN/inf as None (strict JSON)."""
    x = np.asarray(a, float)
    out = np.round(x, 6).astype(object)
    out[~np.isfinite(x)] = None
    return out.tolist()  # type: ignore[no-any-return]


def _failure(name: str, stage: str, exc: BaseException) -> str:
    """The reason of a model's error entry; an unexpected exception is logged with its traceback."""
    if isinstance(exc, DriftError):
        log.info("model %s not checked: %s", name, exc)
        return str(exc)
    log.warning("model %s not checked: unexpected %s while %s: %s (traceback at --log-level debug)",
                name, type(exc).__name__, stage, exc)
    log.debug("traceback for model %s", name, exc_info=exc)
    return (f"model '{name}': unexpected error while {stage} ({type(exc).__name__}: {exc}); the other models "
            "are unaffected; the log at debug level has the details")
