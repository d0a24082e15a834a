"""engine.monitor_levels: one result per level, each identical to engine.monitor at that level (a check asks
for its alarm and warning levels of the same process; the shared set-up must change no number).
Invented data (a simulation test)."""

from __future__ import annotations

import numpy as np
import pytest

from drift import engine


@pytest.mark.parametrize("detector, weighted", [("csw", False), ("shift", False), ("variance", False),
                                                ("page", True), ("shift", True), ("csw", True), ("mosum", False)])
def test_each_level_equals_monitor_at_that_level(detector: str, weighted: bool) -> None:
    rng = np.random.default_rng(3)
    M, T, k = 40, 200, 3
    X = np.concatenate([np.ones((M, T, 1)), rng.standard_normal((M, T, k - 1))], axis=2)
    y = X.sum(axis=2) + rng.standard_normal((M, T))
    y[:5, 150:] += 1.5  # a shift in a few models, so some alarms fire
    m = np.full(M, 120)
    w = engine.score_weights(X, m, np.array([[1, 2]] * M))[:, 0] if weighted else None
    horizons = [0.5, np.full(M, 0.6)] + ([] if detector in ("shift", "variance") else [None])
    for hz in horizons:
        kw = {"horizon": hz, "detector": detector, "weights": w, "extend": True}
        got = engine.monitor_levels(y, X, m, levels=(0.05, 0.2), **kw)
        assert len(got) == 2
        for level, r in zip((0.05, 0.2), got):
            one = engine.monitor(y, X, m, level=level, **kw)
            for f in ("statistic", "pvalue", "path", "boundary", "alarm_index", "critical_value",
                      "horizon_end", "nobs"):
                assert np.array_equal(np.asarray(getattr(one, f)), np.asarray(getattr(r, f)), equal_nan=True), f
            assert one.params.keys() == r.params.keys() and r.params["level"] == level


def test_a_bad_level_is_refused_by_name() -> None:
    y, X = np.zeros((1, 50)), np.ones((1, 50, 1))
    with pytest.raises(ValueError, match="level must be in"):
        engine.monitor_levels(y, X, 30, levels=(0.05, 0.9), detector="shift", horizon=0.5)
