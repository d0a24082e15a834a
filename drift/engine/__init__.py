"""drift's statistics engine: pure functions on arrays, batched over models (first axis = model).

No I/O, no globals, no logging of data. A single model (1-D ``y``, 2-D ``X``) is a batch of one and the
results are squeezed back to scalars / 1-D paths. Public names are re-exported here lazily so that
importing :mod:`drift.engine` stays cheap.
"""

from __future__ import annotations

import importlib
from typing import Any

from drift.engine.results import TestResult

# public name -> submodule of drift.engine that defines it
_EXPORTS: dict[str, str] = {
    # recursive least squares, recursive residuals, CUSUM family, rolling
    "recursive_residuals": "recursive",
    "recursive_fit": "recursive",
    "RecursiveFit": "recursive",
    "cusum": "cusum",
    "cusum_squares": "cusum",
    "first_signal": "cusum",
    "ols_cusum": "cusum",
    "CusumResult": "cusum",
    "rolling_coefficients": "rolling",
    "RollingFit": "rolling",
    # break tests and parameter stability
    "chow": "breaks",
    "predictive_failure": "breaks",
    "sup_f": "breaks",
    "nyblom": "breaks",
    # change points
    "change_points": "changepoints",
    # sequential monitoring
    "monitor": "monitor",
    "monitor_levels": "monitor",
    "MonitorResult": "monitor",
    # tracking signals
    "tracking_signal": "tracking",
    "trigg_signal": "tracking",
    # ARMA error prewhitening
    "fit_error_model": "arma",
    "prewhiten": "arma",
    # forecast comparison and driver worth
    "clark_west": "worth",
    "diebold_mariano": "worth",
    # lag profiles
    "lag_profile": "lags",
    "compare_profiles": "lags",
    "LagProfile": "lags",
    # result types and helpers
    "BreakResult": "breaks",
    "NyblomResult": "breaks",
    "ChangePointResult": "changepoints",
    "Segment": "changepoints",
    "check_partition": "changepoints",
    "reference_fit": "monitor",
    "family_levels": "monitor",
    "score_weights": "monitor",
    "parse_error_spec": "arma",
    "ErrorModel": "arma",
    "TrackingResult": "tracking",
    "split_coefficients": "split",
}

__all__ = ["TestResult", *_EXPORTS]  # noqa: PLE0604 - built from the export table


def __getattr__(name: str) -> Any:
    try:
        mod = _EXPORTS[name]
    except KeyError:
        raise AttributeError(f"module 'drift.engine' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(f"drift.engine.{mod}"), name)
    globals()[name] = value
    return value


# Functions that share their module's name: importing the submodule (``drift.engine.monitor``) would set
# the package attribute to the module and shadow the lazy export, so bind these two eagerly.
from drift.engine.cusum import cusum as cusum
from drift.engine.monitor import monitor as monitor
