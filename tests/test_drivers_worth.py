"""The one-step forecast errors of the worth test (drift.checking.drivers): each period's forecast from the
OLS fit on the ``window`` rows before it. Oracle: one ``numpy.linalg.lstsq`` fit per window (common
practice, no source); statsmodels RollingOLS is the engine's own oracle in tests/engine/test_rolling.py."""

from __future__ import annotations

import numpy as np

from drift.checking.drivers import _rolling_forecast_errors


def _by_hand(y: np.ndarray, X: np.ndarray, window: int) -> np.ndarray:
    out = np.full(y.shape, np.nan)
    for m in range(y.shape[0]):
        for t in range(window, y.shape[1]):
            rows = slice(t - window, t)
            if not (np.isfinite(y[m, rows]).all() and np.isfinite(X[m, rows]).all()):
                continue
            b, *_ = np.linalg.lstsq(X[m, rows], y[m, rows], rcond=None)
            out[m, t] = y[m, t] - X[m, t] @ b
    return out


def test_rolling_forecast_errors_from_a_start_equal_one_fit_per_window() -> None:
    rng = np.random.default_rng(11)
    M, n, k, window = 3, 90, 3, 20
    X = np.concatenate([np.ones((M, n, 1)), rng.standard_normal((M, n, k - 1))], axis=2)
    y = X @ np.array([1.0, 0.5, -0.3]) + rng.standard_normal((M, n))
    y[1, 70] = np.nan  # a missing value: the forecasts whose window holds it are NaN, and its own error
    want = _by_hand(y, X, window)
    full = _rolling_forecast_errors(y, X, window)
    np.testing.assert_allclose(full, want, rtol=1e-9, atol=1e-12)
    for start in (0, 15, 40, 89):
        got = _rolling_forecast_errors(y, X, window, start=start)
        assert np.isnan(got[:, :start]).all()
        np.testing.assert_allclose(got[:, start:], want[:, start:], rtol=1e-9, atol=1e-12)
    assert np.isnan(_rolling_forecast_errors(y, X, window, start=n)).all()
    assert np.isnan(_rolling_forecast_errors(y, X, n)).all()  # a window as long as the series: nothing to forecast


def test_latest_values_of_many_frames_equal_one_filtered_frame_per_series() -> None:
    """The lag stage's latest values, every model's frame in one sorted pass, against
    drift.panel.latest_values of the frame filtered to each series (the per-driver computation it
    replaces): revised values, ties in available_at (the later row wins), a missing series, an empty
    frame, an aware grid. Invented data (common practice, no source)."""
    import pandas as pd

    from drift.checking.drivers import _latest_by_series
    from drift.panel import latest_values

    rng = np.random.default_rng(5)
    grid = pd.date_range("2024-01-01", periods=40, freq="7D")
    frames = []
    for f in range(4):
        rows = []
        for s in ("y", "x1", "x2"):
            per = grid[rng.permutation(40)[:30]]  # some periods missing
            avail = (per + pd.Timedelta(days=7)).tz_localize("UTC")
            rows.append(pd.DataFrame({"series": f"m{f}_{s}", "period": per, "issued_at": pd.NaT,
                                      "value": rng.standard_normal(30), "available_at": avail}))
            late = rows[-1].sample(8, random_state=f)  # revisions, known later
            rows.append(late.assign(value=late["value"] + 1.0, available_at=late["available_at"] + pd.Timedelta(days=3)))
            tie = rows[-1].head(3)  # a second value known at the same moment as a revision: the later row wins
            rows.append(tie.assign(value=-9.0))
        frames.append(pd.concat(rows, ignore_index=True).sample(frac=1.0, random_state=f).reset_index(drop=True))
    for frame in frames:
        frame["issued_at"] = pd.to_datetime(frame["issued_at"], utc=True)
    frames.append(frames[0].iloc[0:0])
    wanted = [[f"m{f}_x1", f"m{f}_x2", f"m{f}_y", "absent"] for f in range(5)]
    grids = [grid, grid[5:], grid.tz_localize("UTC"), grid[:10], grid]
    got = _latest_by_series(frames, wanted, grids)
    for frame, names, g, values in zip(frames, wanted, grids, got):
        for s in names:
            want = latest_values(frame[frame["series"] == s], g)
            np.testing.assert_array_equal(values[s], want)
    assert np.isfinite(got[0]["m0_x1"]).sum() > 20 and (got[0]["m0_x1"] == -9.0).any()
    # the same from the observations as arrays, every model's series sorted together
    from drift.checking.drivers import _latest_of_vintages
    from drift.panel import Vintages, as_ns

    jobs = []
    for frame, names, g in zip(frames, wanted, grids):
        gv = as_ns(g.tz_convert(None) if g.tz is not None else g)
        for s in names:
            part = frame[frame["series"] == s]
            if len(part):
                jobs.append((Vintages.from_frame(part), gv, np.full(gv.size, np.nan), latest_values(part, g)))
    _latest_of_vintages([j[:3] for j in jobs])
    for _, _, out, want in jobs:
        np.testing.assert_array_equal(out, want)
