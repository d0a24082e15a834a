"""The check's stages (drift/checking/) behind drift.check: the names drift.check offered before the
split stay importable there, each stage module says what it takes and gives, and the stages import
nothing of drift.check (one direction). Common practice, no source."""

from __future__ import annotations

import importlib
import pkgutil
import subprocess
import sys

import drift.check
import drift.checking

#: names other modules and tests import from drift.check (drift.refit, drift.shock, drift.report,
#: drift.pipeline, tests), and the stage functions tests patch on drift.check
OFFERED = ["run_check", "analyse", "CheckOutcome", "error_entry", "as_of_moment", "prepare_model", "_num",
           "_prewhiten", "_validate", "_screen", "_freshness", "_drivers_and_worth", "_lag_drift", "_payload",
           "_deployed_replay", "_logged_forecasts", "MIN_LEVEL", "MIN_DOF", "MIN_SCALE", "COLLINEAR_RTOL"]


def stage_modules() -> list[str]:
    return [f"drift.checking.{m.name}" for m in pkgutil.iter_modules(drift.checking.__path__)]


def test_drift_check_still_offers_its_names() -> None:
    missing = [n for n in OFFERED if not hasattr(drift.check, n)]
    assert missing == []


def test_each_stage_module_says_what_it_takes_and_gives() -> None:
    mods = stage_modules()
    assert {"drift.checking.designs", "drift.checking.screening", "drift.checking.drivers",
            "drift.checking.actions", "drift.checking.payload"} <= set(mods)
    for name in mods:
        doc = importlib.import_module(name).__doc__ or ""
        assert "takes" in doc.lower() and "give" in doc.lower(), name


def test_the_stages_do_not_import_drift_check() -> None:
    code = ("import sys, drift.checking.screening, drift.checking.drivers, drift.checking.production, "
            "drift.checking.freshness, drift.checking.payload; print('drift.check' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"
