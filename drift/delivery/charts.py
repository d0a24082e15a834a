"""Charts of one model's check, as PNG bytes, for the digest, shock runs and the demo.

Every chart is drawn on its own :class:`matplotlib.figure.Figure` attached to an Agg canvas: no pyplot,
no global figure manager, no ``rcParams`` changes, so charts can be drawn from several threads at once.
Output is deterministic (the PNG carries no software/version or time metadata): the same data gives the
same bytes on the same matplotlib and font set.

Two layers:

- plain-array functions, one per chart (:func:`cusum_chart`, :func:`coefficient_chart`,
  :func:`forecast_chart`, :func:`lag_profile_chart`, :func:`feeds_chart`); bad arguments raise
  ``ValueError``/``TypeError`` naming the parameter;
- :func:`render_model_charts` / :func:`render_model_chart_set`, which read the ``"charts"`` block of a
  per-model check payload, tolerate any missing or null key, and leave a chart out (with a one-line
  note) when it has no data.

Design: 800 x 400 pixels for a single panel (taller when there is one panel per driver), constrained
layout, dates on the x axis with a concise formatter, a legend on every chart. The palette is a small
set of colours that stay apart for the common colour-vision deficiencies (blue / orange / vermilion /
grey, with line styles as a second cue).
"""

from __future__ import annotations

import base64
import io
import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime, timezone
from typing import Any

import numpy as np
from markupsafe import Markup, escape
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.dates import AutoDateLocator, ConciseDateFormatter
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from PIL import Image

from drift.verdicts import Z95

log = logging.getLogger(__name__)

#: chart kinds, in the order a reader meets them
KINDS: tuple[str, ...] = ("cusum", "coefficients", "forecast", "lag_profile", "feeds")

# ---------------------------------------------------------------------------------------------- style
#: pixels per inch of the PNG; 8 x 4 inches -> 800 x 400 pixels
DPI = 100
WIDTH_IN = 8.0
HEIGHT_IN = 4.0
#: height of one extra row of panels (per-driver charts), inches
PANEL_ROW_IN = 2.4
#: per-driver charts switch to two columns above this many drivers
ONE_COLUMN_MAX = 3
#: colours kept in the PNG palette (anti-aliased line charts look the same with 128)
PALETTE_COLOURS = 128
#: at most this many legend entries side by side
LEGEND_COLUMNS = 5
#: characters of legend text (labels plus their keys) that fit one row of an 800-pixel chart
LEGEND_ROW_CHARS = 110
#: a monitoring path beyond this many times its largest boundary is cut at that height (and said so)
CLIP_FACTOR = 4.0
#: periods of actuals shown before the first forecast, for context
FORECAST_CONTEXT = 26

INK = "#1f2a36"        # text, axes, actuals
BLUE = "#2463a6"       # the main series (CUSUM path, rolling coefficient, reference profile)
ORANGE = "#e08a1e"     # the second series (forecast, recent profile, 5% bound)
VERMILION = "#c4391d"  # alarms, 1% bound, late feeds
GREY = "#7d8791"       # baselines, reference lines
SHADE = "#e9edf1"      # the reference period
GRID = "#d5dbe1"

FONT = 9.0
TITLE_FONT = 10.5


def _text_kw(size: float = FONT) -> dict[str, Any]:
    # parse_math=False: model and series names are user data and may contain '$'
    return {"fontsize": size, "color": INK, "parse_math": False}


def _new_figure(rows: int = 1, cols: int = 1, *, sharex: bool = False) -> tuple[Figure, list[Axes]]:
    height = HEIGHT_IN if rows == 1 else 1.0 + PANEL_ROW_IN * rows
    fig = Figure(figsize=(WIDTH_IN, height), dpi=DPI, layout="constrained", facecolor="white")
    FigureCanvasAgg(fig)
    axes = fig.subplots(rows, cols, squeeze=False, sharex=sharex)
    flat = [ax for row in axes for ax in row]
    for ax in flat:
        _style_axes(ax)
    return fig, flat


def _style_axes(ax: Axes) -> None:
    ax.set_facecolor("white")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(GREY)
    ax.tick_params(colors=INK, labelsize=FONT - 0.5)
    ax.grid(True, color=GRID, linewidth=0.6)
    ax.set_axisbelow(True)


def _date_axis(ax: Axes) -> None:
    locator = AutoDateLocator(minticks=4, maxticks=9)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(ConciseDateFormatter(locator))


def _legend(fig: Figure, handles: Sequence[Any]) -> None:
    """One legend under the plot area (never over the data), in as few rows as fit."""
    handles = list(handles)
    ncols = min(len(handles), LEGEND_COLUMNS)
    # the row must fit the figure's width (about LEGEND_ROW_CHARS characters of legend text with keys)
    while ncols > 1 and sum(len(str(h.get_label())) + 6 for h in handles[:ncols]) > LEGEND_ROW_CHARS:
        ncols -= 1
    fig.legend(handles=handles, loc="outside lower center", ncols=ncols, fontsize=FONT - 0.5, frameon=False)


def _png(fig: Figure) -> bytes:
    """Render to PNG, reduced to an adaptive palette (a third of the size; charts have few colours)."""
    buf = io.BytesIO()
    # no 'Software' entry: the bytes do not depend on the matplotlib version string
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    buf.seek(0)
    with Image.open(buf) as img:
        small = img.convert("RGB").quantize(colors=PALETTE_COLOURS, method=Image.Quantize.MEDIANCUT,
                                            dither=Image.Dither.NONE)
    out = io.BytesIO()
    small.save(out, format="PNG", optimize=True)  # Pillow writes no time or software chunk
    return out.getvalue()


def _title(fig: Figure, title: str | None) -> None:
    if title:
        fig.suptitle(title, **_text_kw(TITLE_FONT), fontweight="bold")


# ---------------------------------------------------------------------------------------------- inputs
def _floats(values: Sequence[Any] | np.ndarray | None, name: str, n: int | None = None) -> np.ndarray:
    """Float64 array with NaN for None/non-finite; checks the length against ``n``."""
    if values is None:
        raise ValueError(f"{name} is missing")
    if isinstance(values, (str, bytes)) or not hasattr(values, "__len__"):
        raise TypeError(f"{name} must be a sequence of numbers, got {type(values).__name__}")
    out = np.empty(len(values), dtype=np.float64)
    for i, v in enumerate(values):
        if v is None:
            out[i] = np.nan
            continue
        try:
            x = float(v)
        except (TypeError, ValueError):
            raise TypeError(f"{name}[{i}] must be a number or null, got {v!r}") from None
        out[i] = x if math.isfinite(x) else np.nan
    if n is not None and out.size != n:
        raise ValueError(f"{name} has {out.size} values but periods has {n}; they must be aligned")
    return out


def _to_datetime64(value: Any) -> np.datetime64:
    """A date / datetime / ISO string -> naive-UTC datetime64[s]; None -> NaT."""
    if value is None:
        return np.datetime64("NaT", "s")
    if isinstance(value, np.datetime64):
        return value.astype("datetime64[s]")
    if isinstance(value, datetime):
        dt = value
    elif isinstance(value, date):
        dt = datetime(value.year, value.month, value.day)
    elif isinstance(value, str):
        try:
            dt = datetime.fromisoformat(value.replace("Z", "+00:00"))
        except ValueError:
            raise ValueError(f"'{value}' is not an ISO date or time") from None
    else:
        try:  # pandas Timestamp and friends
            dt = value.to_pydatetime()
        except AttributeError:
            raise TypeError(f"cannot read {value!r} as a date") from None
    if dt.tzinfo is not None:
        dt = dt.astimezone(timezone.utc).replace(tzinfo=None)
    return np.datetime64(dt.replace(microsecond=0), "s")


def _dates(values: Sequence[Any] | np.ndarray | None, name: str) -> np.ndarray:
    if values is None:
        raise ValueError(f"{name} is missing")
    if isinstance(values, (str, bytes)) or not hasattr(values, "__len__"):
        raise TypeError(f"{name} must be a sequence of dates, got {type(values).__name__}")
    try:
        return np.array([_to_datetime64(v) for v in values], dtype="datetime64[s]")
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name}: {exc}") from None


def _monitor_date(periods: np.ndarray, monitor_start: Any) -> np.datetime64 | None:
    """The first monitoring period, from an index into ``periods`` or a date."""
    if monitor_start is None:
        return None
    if isinstance(monitor_start, (int, np.integer)) and not isinstance(monitor_start, bool):
        i = int(monitor_start)
        if not 0 <= i < periods.size:
            raise ValueError(f"monitor_start index {i} is outside periods (0..{periods.size - 1})")
        return periods[i]
    return _to_datetime64(monitor_start)


def _mark_reference(ax: Axes, periods: np.ndarray, start: np.datetime64 | None) -> list[Any]:
    """Shade the reference period (before ``start``); returns legend handles."""
    if start is None or np.isnat(start) or periods.size == 0:
        return []
    first = periods[0]
    if start <= first:
        return []
    ax.axvspan(first, start, color=SHADE, zorder=0, linewidth=0)  # type: ignore[arg-type]  # stubs say float; datetime64 is converted by the date units
    ax.axvline(start, color=GREY, linewidth=0.9, linestyle="-", zorder=1)  # type: ignore[arg-type]  # stubs say float; datetime64 is converted by the date units
    return [Patch(facecolor=SHADE, edgecolor="none", label="reference period")]


def _flag(ax: Axes, t: np.ndarray, at: np.datetime64, text: str, *, bold: bool = False, row: int = 0) -> None:
    """Label a vertical marker at the top of the axes, on the side with more room (``row`` 1: one text
    line lower, for a second marker near the first)."""
    right_half = bool(t.size) and at > t[0] + (t[-1] - t[0]) * 0.6
    ax.annotate(text, xy=(at, 1.0), xycoords=("data", "axes fraction"),
                xytext=(-4 if right_half else 4, -4 - 14 * row), textcoords="offset points",
                ha="right" if right_half else "left", va="top", **_text_kw(FONT),
                fontweight="bold" if bold else "normal")


def _num_label(x: float) -> str:
    """A figure on a chart, as the reasons print it."""
    from drift.verdicts import fmt_num

    return fmt_num(x)


def _fmt_day(d: np.datetime64) -> str:
    return str(d.astype("datetime64[D]"))


# ---------------------------------------------------------------------------------------------- charts
def cusum_chart(
    periods: Sequence[Any],
    path: Sequence[Any],
    bounds: Mapping[Any, Sequence[Any]] | None = None,
    alarm_date: Any = None,
    *,
    monitor_start: Any = None,
    title: str | None = "CUSUM of recursive residuals",
    unit: str = "standardised units",
    path_label: str = "CUSUM path",
    alarm_label: str = "alarm",
    horizon_end: Any = None,
) -> bytes:
    """A monitoring path against its own boundaries, with the crossing marked and dated.

    Parameters
    ----------
    periods : dates (ISO strings, dates or datetimes), one per observation.
    path : CUSUM values aligned to ``periods``; None/NaN where undefined (e.g. the first k periods).
    bounds : level -> boundary aligned to ``periods`` (e.g. ``{"0.05": [...], "0.01": [...]}``).
        Boundaries are drawn at +b and, when the path goes below zero, also at -b.
    alarm_date : date of the first crossing *of this path* over these bounds, or None; the marker sits on
        the path at that period.
    monitor_start : index into ``periods`` or date of the first monitoring period (shades the reference).
    title, unit : chart title and the y-axis unit.
    path_label, alarm_label : legend entries of the path and the crossing.
    horizon_end : last period within the monitoring horizon (beyond it the boundary goes on, its false-alarm
        guarantee does not), or None when the horizon covers the chart; marked with a dotted line.

    Returns
    -------
    bytes : PNG.

    Raises
    ------
    ValueError
        when an array is not aligned to ``periods`` or a date cannot be read.
    """
    t = _dates(periods, "periods")
    y = _floats(path, "path", t.size)
    fig, (ax,) = _new_figure()
    handles = _mark_reference(ax, t, _monitor_date(t, monitor_start))
    (line,) = ax.plot(t, y, color=BLUE, linewidth=1.8, label=path_label)
    handles.insert(0, line)
    two_sided = bool(np.nanmin(y) < 0) if np.isfinite(y).any() else False
    styles = [(ORANGE, "--"), (VERMILION, ":"), (GREY, "-.")]
    ordered = sorted((bounds or {}).items(), key=lambda kv: -_level_value(kv[0]))
    for (level, b), (colour, ls) in zip(ordered, styles):
        bb = _floats(b, f"bounds[{level!r}]", t.size)
        key = f"{_level_label(level)} bound" if math.isfinite(_level_value(level)) else str(level)
        (bl,) = ax.plot(t, bb, color=colour, linestyle=ls, linewidth=1.3, label=key)
        if two_sided:
            ax.plot(t, -bb, color=colour, linestyle=ls, linewidth=1.3)
        handles.append(bl)
    if alarm_date is not None:
        a = _to_datetime64(alarm_date)
        ax.axvline(a, color=VERMILION, linewidth=1.2, zorder=3)  # type: ignore[arg-type]  # stubs say float; datetime64 is converted by the date units
        idx = int(np.argmin(np.abs((t - a).astype(np.int64)))) if t.size else 0
        if t.size and np.isfinite(y[idx]):
            ax.plot([t[idx]], [y[idx]], marker="o", markersize=7, color=VERMILION, zorder=4)
        _flag(ax, t, a, f"{alarm_label} {_fmt_day(a)}", bold=True)
        handles.append(Line2D([], [], color=VERMILION, marker="o", linewidth=1.2, label=alarm_label))
    if horizon_end is not None:
        h = _to_datetime64(horizon_end)
        ax.axvline(h, color=GREY, linewidth=1.1, linestyle=":", zorder=2)  # type: ignore[arg-type]
        _flag(ax, t, h, f"horizon ends {_fmt_day(h)}", row=1)
        handles.append(Line2D([], [], color=GREY, linewidth=1.1, linestyle=":",
                              label="end of the monitoring horizon"))
    ax.axhline(0.0, color=GREY, linewidth=0.6)
    # a path far beyond its boundaries would squeeze the crossing into a few pixels: show the boundaries
    # and the crossing, and say where the path goes off the chart
    top = max((float(np.nanmax(np.abs(_floats(b, "bound", t.size)))) for _lvl, b in ordered
               if np.isfinite(_floats(b, "bound", t.size)).any()), default=math.nan)
    ymax = float(np.nanmax(np.abs(y))) if np.isfinite(y).any() else math.nan
    if math.isfinite(top) and math.isfinite(ymax) and ymax > CLIP_FACTOR * top:
        lim = CLIP_FACTOR * top
        ax.set_ylim(-lim if two_sided else -0.1 * lim, lim)
        k = int(np.nanargmax(np.abs(y)))
        ax.annotate(f"path off the chart, to {_num_label(float(y[k]))} on {_fmt_day(t[k])}",
                    xy=(1.0, 0.02 if y[k] < 0 else 0.98), xycoords="axes fraction", ha="right",
                    va="bottom" if y[k] < 0 else "top", **_text_kw(FONT - 0.5))
    ax.set_ylabel(f"{path_label} ({unit})", **_text_kw())
    ax.set_xlabel("period", **_text_kw())
    _date_axis(ax)
    _legend(fig, handles)
    _title(fig, title)
    return _png(fig)


def coefficient_chart(
    periods: Sequence[Any],
    drivers: Mapping[str, Mapping[str, Any]],
    *,
    monitor_start: Any = None,
    title: str | None = "Rolling coefficients",
    unit: str = "target units per driver unit",
) -> bytes:
    """Rolling coefficient per driver with its confidence band and the reference-fit value.

    Parameters
    ----------
    periods : dates, one per observation.
    drivers : driver name -> {"coef": [...], "lower": [...], "upper": [...], "reference": float,
        "window": int}; arrays aligned to ``periods`` (None where undefined). ``lower``/``upper``,
        ``reference`` and ``window`` are optional.
    monitor_start : index or date of the first monitoring period.
    title, unit : chart title and the coefficient unit.

    Returns
    -------
    bytes : PNG, one panel per driver (two columns above three drivers).
    """
    t = _dates(periods, "periods")
    if not isinstance(drivers, Mapping) or not drivers:
        raise ValueError("drivers must be a non-empty mapping of driver name -> coefficient arrays")
    names = list(drivers)
    cols = 1 if len(names) <= ONE_COLUMN_MAX else 2
    rows = math.ceil(len(names) / cols)
    fig, axes = _new_figure(rows, cols, sharex=True)
    start = _monitor_date(t, monitor_start)
    legend_handles: list[Any] = []
    for k, (ax, name) in enumerate(zip(axes, names)):
        d = drivers[name]
        coef = _floats(d.get("coef"), f"drivers[{name!r}]['coef']", t.size)
        handles = _mark_reference(ax, t, start)
        lo, hi = d.get("lower"), d.get("upper")
        if lo is not None and hi is not None:
            lo_a = _floats(lo, f"drivers[{name!r}]['lower']", t.size)
            hi_a = _floats(hi, f"drivers[{name!r}]['upper']", t.size)
            ok = np.isfinite(lo_a) & np.isfinite(hi_a)
            ax.fill_between(t, lo_a, hi_a, where=ok, color=BLUE, alpha=0.18, linewidth=0)
            handles.insert(0, Patch(facecolor=BLUE, alpha=0.18, label="confidence band"))
        window = d.get("window")
        label = f"rolling ({window} periods)" if window else "rolling"
        (line,) = ax.plot(t, coef, color=BLUE, linewidth=1.6, label=label)
        handles.insert(0, line)
        split = d.get("split")
        if isinstance(split, Mapping) and split.get("before") is not None and split.get("after") is not None:
            at = _to_datetime64(split.get("break"))
            before, after = float(split["before"]), float(split["after"])
            sb, sa = split.get("se_before"), split.get("se_after")
            seg = [(t[0], at, before, sb), (at, t[-1], after, sa)]
            for x0, x1, v, se in seg:
                ax.plot([x0, x1], [v, v], color=VERMILION, linewidth=2.0, solid_capstyle="butt")
                if se is not None and math.isfinite(float(se)):
                    ax.fill_between([x0, x1], v - Z95 * float(se), v + Z95 * float(se), color=VERMILION,
                                    alpha=0.12, linewidth=0)
            ax.axvline(at, color=VERMILION, linewidth=1.0, linestyle=":")  # type: ignore[arg-type]
            # on the side the effect moved to (away from the before line), on a light box: the rolling line,
            # its band and the reference line run through this corner
            up = after >= before
            ax.annotate(f"{_num_label(before)} → {_num_label(after)}", xy=(at, after), xytext=(4, 6 if up else -6),
                        textcoords="offset points", ha="left", va="bottom" if up else "top",
                        bbox={"boxstyle": "round,pad=0.2", "facecolor": "white", "edgecolor": "none", "alpha": 0.8},
                        **{**_text_kw(FONT - 0.5), "color": VERMILION})
            handles.append(Line2D([], [], color=VERMILION, linewidth=2.0,
                                  label=f"before / since break {_fmt_day(at)}"))
        ref = d.get("reference")
        if ref is not None and math.isfinite(float(ref)):
            rl = ax.axhline(float(ref), color=ORANGE, linestyle="--", linewidth=1.4, label="reference fit")
            ax.annotate(f"{float(ref):.3g}", xy=(1.0, float(ref)), xycoords=("axes fraction", "data"),
                        xytext=(-2, 3), textcoords="offset points", ha="right", va="bottom",
                        **_text_kw(FONT - 1))
            handles.append(rl)
        ax.set_title(str(name), **_text_kw(FONT + 0.5), loc="left")
        ax.set_ylabel("coefficient", **_text_kw())
        if k >= len(names) - cols:
            ax.set_xlabel("period", **_text_kw())
        _date_axis(ax)
        if k == 0:
            legend_handles = handles
    for ax in axes[len(names):]:
        ax.set_visible(False)
    _legend(fig, legend_handles)
    _title(fig, f"{title} ({unit})" if title else None)
    return _png(fig)


def forecast_chart(
    periods: Sequence[Any],
    actual: Sequence[Any],
    forecast: Sequence[Any],
    baseline: Sequence[Any] | None = None,
    *,
    title: str | None = "Actual vs as-deployed forecast",
    unit: str = "units",
    context: int = FORECAST_CONTEXT,
    event: Any = None,
    event_label: str = "event",
) -> bytes:
    """Actuals against the as-deployed one-step forecast, with the driver-free baseline lighter.

    Parameters
    ----------
    periods : dates, one per observation.
    actual, forecast : aligned to ``periods``; forecast is None before monitoring.
    baseline : the driver-free baseline forecast, aligned, optional.
    title, unit : chart title and the target's unit.
    context : periods of actuals shown before the first forecast.
    event, event_label : optional date to mark with a bold vertical line (e.g. a known shock).

    Returns
    -------
    bytes : PNG.
    """
    if not isinstance(context, int) or isinstance(context, bool) or context < 0:
        raise ValueError(f"context must be a non-negative integer, got {context!r}")
    t = _dates(periods, "periods")
    a = _floats(actual, "actual", t.size)
    f = _floats(forecast, "forecast", t.size)
    b = _floats(baseline, "baseline", t.size) if baseline is not None else None
    defined = np.flatnonzero(np.isfinite(f))
    lo = max(0, int(defined[0]) - context) if defined.size else 0
    sl = slice(lo, None)
    fig, (ax,) = _new_figure()
    handles = []
    (la,) = ax.plot(t[sl], a[sl], color=INK, linewidth=1.5, marker="o", markersize=2.2, label="actual")
    handles.append(la)
    (lf,) = ax.plot(t[sl], f[sl], color=ORANGE, linewidth=1.6, label="forecast (as deployed)")
    handles.append(lf)
    if b is not None and np.isfinite(b).any():
        (lb,) = ax.plot(t[sl], b[sl], color=GREY, linewidth=1.1, linestyle="--", alpha=0.8,
                        label="seasonal-naive baseline")
        handles.append(lb)
    flagged = False
    if defined.size and defined[0] > lo:
        ax.axvline(t[defined[0]], color=GREY, linewidth=0.9)
        _flag(ax, t[sl], t[defined[0]], "monitoring starts")
        flagged = True
    if event is not None:
        at = _to_datetime64(event)
        ax.axvline(at, color=VERMILION, linewidth=1.4)  # type: ignore[arg-type]
        # a second line of labels: the two markers are often close together
        _flag(ax, t[sl], at, f"{event_label} {_fmt_day(at)}", bold=True, row=1 if flagged else 0)
    ax.set_ylabel(unit, **_text_kw())
    ax.set_xlabel("period", **_text_kw())
    _date_axis(ax)
    _legend(fig, handles)
    _title(fig, title)
    return _png(fig)


def lag_profile_chart(
    profiles: Mapping[str, Mapping[str, Any]],
    *,
    title: str | None = "Cross-correlation by lag",
) -> bytes:
    """Cross-correlation of target and driver by lag, reference vs recent, with Bartlett bands.

    Parameters
    ----------
    profiles : driver name -> {"lags": [...], "reference": [...], "recent": [...],
        "band_reference": float, "band_recent": float, "current_lag": int}; ``recent``, the bands
        and ``current_lag`` are optional.
    title : chart title.

    Returns
    -------
    bytes : PNG, one panel per driver.

    Notes
    -----
    The bands are the approximate 95% limits :math:`\\pm 1.96/\\sqrt{n}` under no correlation
    (Bartlett 1946), as computed upstream; they are drawn as given.
    """
    if not isinstance(profiles, Mapping) or not profiles:
        raise ValueError("profiles must be a non-empty mapping of driver name -> lag profile")
    names = list(profiles)
    cols = 1 if len(names) <= ONE_COLUMN_MAX else 2
    rows = math.ceil(len(names) / cols)
    fig, axes = _new_figure(rows, cols)
    legend_handles: list[Any] = []
    width = 0.38
    for k, (ax, name) in enumerate(zip(axes, names)):
        p = profiles[name]
        lags = _floats(p.get("lags"), f"profiles[{name!r}]['lags']")
        ref = _floats(p.get("reference"), f"profiles[{name!r}]['reference']", lags.size)
        rec = p.get("recent")
        rec_a = _floats(rec, f"profiles[{name!r}]['recent']", lags.size) if rec is not None else None
        handles: list[Any] = []
        cur = p.get("current_lag")
        if cur is not None:
            span = ax.axvspan(float(cur) - 0.5, float(cur) + 0.5, color=SHADE, zorder=0, linewidth=0,
                              label=f"lag in use ({int(cur)})")
            handles.append(span)
        shift = width / 2 if rec_a is not None else 0.0
        handles.append(ax.bar(lags - shift, np.nan_to_num(ref), width=width, color=BLUE,
                              label="reference period"))
        if rec_a is not None:
            handles.append(ax.bar(lags + shift, np.nan_to_num(rec_a), width=width, color=ORANGE,
                                  label="recent window"))
        for key, colour, ls, label in (("band_reference", BLUE, "--", "95% band, reference"),
                                       ("band_recent", ORANGE, ":", "95% band, recent")):
            band = p.get(key)
            if band is not None and math.isfinite(float(band)):
                h = ax.axhline(float(band), color=colour, linestyle=ls, linewidth=1.1, label=label)
                ax.axhline(-float(band), color=colour, linestyle=ls, linewidth=1.1)
                handles.append(h)
        ax.axhline(0.0, color=GREY, linewidth=0.6)
        ax.set_xticks(lags)
        ax.set_xticklabels([str(int(x)) for x in lags])
        ax.set_title(str(name), **_text_kw(FONT + 0.5), loc="left")
        ax.set_ylabel("correlation", **_text_kw())
        if k >= len(names) - cols:
            ax.set_xlabel("lag (periods)", **_text_kw())
        if k == 0:
            legend_handles = handles
    for ax in axes[len(names):]:
        ax.set_visible(False)
    _legend(fig, legend_handles)
    _title(fig, title)
    return _png(fig)


def feeds_chart(
    feeds: Mapping[str, Mapping[str, Any]],
    *,
    now: Any = None,
    title: str | None = "Driver feeds: when each period arrived",
) -> bytes:
    """Timeline of driver feeds: which period each value covers, when it arrived, when the next is due.

    Parameters
    ----------
    feeds : driver name -> {"periods": [...], "available_at": [...], "next_due": time, "late": bool};
        ``periods`` and ``available_at`` aligned (None where unknown).
    now : the time the check looked (the right end of an overdue gap); default: the latest time given.
    title : chart title.

    Returns
    -------
    bytes : PNG with two lanes per driver: the upper lane shows the periods covered (one bar each), the
    lower lane the arrival of each period's value, joined to the end of its period by a thin line (the
    publication delay). A triangle marks when the next value is due; for a late feed the gap from that
    due time to ``now`` is shaded.
    """
    if not isinstance(feeds, Mapping) or not feeds:
        raise ValueError("feeds must be a non-empty mapping of driver name -> feed timeline")
    names = list(feeds)
    height = max(HEIGHT_IN, 1.8 + 0.7 * len(names))
    fig = Figure(figsize=(WIDTH_IN, height), dpi=DPI, layout="constrained", facecolor="white")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    _style_axes(ax)
    ax.grid(False, axis="y")
    parsed = []
    latest = np.datetime64("NaT", "s")
    for name in names:
        f = feeds[name]
        per = _dates(f.get("periods") if f.get("periods") is not None else [], f"feeds[{name!r}]['periods']")
        av_raw = f.get("available_at")
        av = _dates(av_raw, f"feeds[{name!r}]['available_at']") if av_raw is not None else \
            np.full(per.size, np.datetime64("NaT", "s"))
        if av.size != per.size:
            raise ValueError(f"feeds[{name!r}]: available_at has {av.size} values, periods has {per.size}")
        due = _to_datetime64(f.get("next_due"))
        parsed.append((name, per, av, due, bool(f.get("late")), f.get("form") in ("known", "forecast")))
        for arr in (per, av, np.array([due])):
            ok = arr[~np.isnat(arr)]
            if ok.size and (np.isnat(latest) or ok.max() > latest):
                latest = ok.max()
    end = _to_datetime64(now) if now is not None else latest
    any_late = False
    lane = 0.17
    for row, (name, per, av, due, late, ahead) in enumerate(parsed):
        y = len(names) - 1 - row
        order = np.argsort(per)
        per, av = per[order], av[order]
        known = ~np.isnat(per)
        per_k, av_k = per[known], av[known]
        if per_k.size:
            steps = np.diff(per_k)
            step = np.median(steps.astype(np.int64)).astype("timedelta64[s]") if steps.size else \
                np.timedelta64(7, "D").astype("timedelta64[s]")
            ends = np.concatenate([per_k[1:], per_k[-1:] + step])
            widths = ends - per_k
            gap = (widths.astype(np.int64) * 0.08).astype("timedelta64[s]")
            ax.barh(np.full(per_k.size, y + lane), widths - gap, left=per_k, height=0.16, color=GREY,
                    alpha=0.55, linewidth=0)
            arrived = ~np.isnat(av_k)
            # a plan or forecast arrives before its period: joining it to the period's end would only
            # cross the lanes; its markers say when it came
            for e0, a0 in zip(ends[arrived], av_k[arrived]) if not ahead else ():
                ax.plot([e0, a0], [y + lane - 0.08, y - lane], color=BLUE, linewidth=0.8, alpha=0.6)
            ax.plot(av_k[arrived], np.full(int(arrived.sum()), y - lane), linestyle="none", marker="o",
                    markersize=4.5, color=BLUE)
        if not np.isnat(due):
            ax.plot([due], [y - lane], linestyle="none", marker="v", markersize=8,
                    color=VERMILION if late else ORANGE, zorder=4)
            if late:
                any_late = True
            if late and not np.isnat(end) and end > due:
                ax.barh(y - lane, end - due, left=due, height=0.3, color=VERMILION, alpha=0.22, linewidth=0)
                days = (end - due).astype("timedelta64[h]").astype(np.int64) / 24.0
                ax.annotate(f"{days:.0f} days late", xy=(end, y - lane), xytext=(4, 0),
                            textcoords="offset points", ha="left", va="center", **_text_kw(FONT - 0.5),
                            fontweight="bold")
    if not np.isnat(end):
        ax.axvline(end, color=INK, linewidth=0.8, linestyle=":")  # type: ignore[arg-type]  # stubs say float; datetime64 is converted by the date units
    ax.set_yticks(range(len(names)))
    kinds = {n: {"known": " (plan)", "forecast": " (forecast)"}.get(str(feeds[n].get("form")), "") for n in names}
    ax.set_yticklabels([f"{n}{kinds[n]}" for n in reversed(names)], fontsize=FONT, color=INK)
    ax.set_ylim(-0.6, len(names) - 0.4)
    ax.margins(x=0.06)
    ax.set_xlabel("time (UTC)", **_text_kw())
    _date_axis(ax)
    handles: list[Any] = [
        Patch(facecolor=GREY, alpha=0.55, label="period covered"),
        Line2D([], [], color=BLUE, marker="o", markersize=4.5, linewidth=0.8, label="value arrived"),
        Line2D([], [], linestyle="none", marker="v", markersize=8, color=ORANGE, label="next value due"),
    ]
    if any_late:
        handles.append(Patch(facecolor=VERMILION, alpha=0.22, label="overdue"))
    if not np.isnat(end):
        handles.append(Line2D([], [], color=INK, linewidth=0.8, linestyle=":", label="check time"))
    _legend(fig, handles)
    _title(fig, title)
    return _png(fig)


def _boundary_label(level: Any) -> str:
    """The legend key of a monitor's boundary: ``boundary, level 1.3%``."""
    try:
        v = float(level)
    except (TypeError, ValueError):
        return "boundary"
    return f"boundary, level {v * 100:.2g}%" if math.isfinite(v) and 0 < v < 1 else "boundary"


def _lower_first(text: str) -> str:
    return text[:1].lower() + text[1:]


def _level_value(level: Any) -> float:
    try:
        return float(level)
    except (TypeError, ValueError):
        return math.inf


def _level_label(level: Any) -> str:
    v = _level_value(level)
    if math.isfinite(v) and 0 < v < 1:
        return f"{v * 100:g}%"
    return str(level)


# ---------------------------------------------------------------------------------------------- payload
@dataclass(frozen=True)
class ChartSet:
    """Charts drawn for one model: PNG bytes by kind, and a one-line note per kind left out."""

    images: Mapping[str, bytes] = field(default_factory=dict)
    notes: Mapping[str, str] = field(default_factory=dict)


def _check_kinds(kinds: Sequence[str] | None) -> tuple[str, ...]:
    if kinds is None:
        return KINDS
    if isinstance(kinds, str):
        kinds = [kinds]
    bad = [k for k in kinds if k not in KINDS]
    if bad:
        raise ValueError(f"kinds: unknown chart kind(s) {bad}; allowed: {', '.join(KINDS)}")
    return tuple(kinds)


def _nonempty(values: Any) -> bool:
    return isinstance(values, Sequence) and not isinstance(values, str) and any(
        v is not None for v in values)


def render_model_chart_set(model_payload: Mapping[str, Any], kinds: Sequence[str] | None = None) -> ChartSet:
    """Draw the charts of one model from its check payload; say why any kind was left out.

    Parameters
    ----------
    model_payload : the per-model payload; its ``"charts"`` block supplies the data. Any key may be
        missing or null.
    kinds : which charts (default all of :data:`KINDS`).

    Returns
    -------
    ChartSet
        ``images`` (kind -> PNG bytes, in the order of ``kinds``) and ``notes`` (kind -> why it is missing).

    Raises
    ------
    ValueError
        for an unknown kind. Bad or missing data never raises; it becomes a note.
    """
    wanted = _check_kinds(kinds)
    if not isinstance(model_payload, Mapping):
        raise TypeError(f"model_payload must be a mapping, got {type(model_payload).__name__}")
    charts = model_payload.get("charts") or {}
    if not isinstance(charts, Mapping):
        charts = {}
    periods = charts.get("periods") or []
    mstart = charts.get("monitor_start_index")
    if mstart is None and model_payload.get("monitor_start"):
        mstart = model_payload.get("monitor_start")
    unit = str(model_payload.get("unit") or "units")
    name = str(model_payload.get("name") or "model")
    target = model_payload.get("target")
    now = model_payload.get("as_of")
    images: dict[str, bytes] = {}
    notes: dict[str, str] = {}

    def draw(kind: str) -> bytes | None:
        block = charts.get(kind)
        if kind == "cusum":
            mon = charts.get("monitor")
            if isinstance(mon, Mapping) and _nonempty(mon.get("path")) and _nonempty(mon.get("boundary")) \
                    and periods:
                lvl = mon.get("level")
                crossed = mon.get("alarm_date")
                return cusum_chart(
                    periods, mon["path"], {_boundary_label(lvl): mon["boundary"]}, crossed,
                    monitor_start=mstart, path_label="monitor path", alarm_label="crossed",
                    horizon_end=mon.get("horizon_end"),
                    title=f"{name}: {_lower_first(str(mon.get('title') or mon.get('test')))}"
                          + (" crossed its boundary" if crossed else ", nearest its boundary (no alarm)"))
            if not isinstance(block, Mapping) or not _nonempty(block.get("path")) or not periods:
                notes[kind] = str(charts.get("monitor_note") or "no monitoring path in this check (nothing "
                                  "monitored after the reference period yet)")
                return None
            notes[kind] = ("no monitor ran (nothing monitored yet): the retrospective CUSUM is drawn instead; "
                           "it is reported but raises nothing alone")
            return cusum_chart(periods, block["path"], block.get("bounds") or {}, block.get("alarm_date"),
                               monitor_start=mstart, alarm_label="crossed 5%",
                               title=f"{name}: retrospective CUSUM of recursive residuals")
        if kind == "coefficients":
            usable = {k: v for k, v in (block or {}).items()
                      if isinstance(v, Mapping) and _nonempty(v.get("coef"))} if isinstance(block, Mapping) else {}
            if not usable or not periods:
                notes[kind] = "no rolling coefficients in this check"
                return None
            if any(isinstance(v.get("split"), Mapping) for v in usable.values()):
                notes[kind] = (
                    "The rolling estimate refits trend and season in each window, so it rests on the driver's "
                    "own short-run movements and follows a change of effect late and noisily; the red lines "
                    "are the effects estimated before and since the dated break (the refit's figures).")
            return coefficient_chart(periods, usable, monitor_start=mstart,
                                     title=f"{name}: rolling coefficients",
                                     unit=f"{unit} per driver unit")
        if kind == "forecast":
            if (not isinstance(block, Mapping) or not periods or not _nonempty(block.get("actual"))
                    or not _nonempty(block.get("forecast"))):
                notes[kind] = "no forecasts from the monitoring period yet"
                return None
            label = f"{name}: actual vs as-deployed forecast" + (f" ({target})" if target else "")
            return forecast_chart(periods, block["actual"], block["forecast"], block.get("baseline"),
                                  title=label, unit=unit)
        if kind == "lag_profile":
            usable = {k: v for k, v in (block or {}).items()
                      if isinstance(v, Mapping) and _nonempty(v.get("lags")) and _nonempty(v.get("reference"))
                      } if isinstance(block, Mapping) else {}
            skipped = charts.get("lag_profile_skipped")
            why = "; ".join(f"{k}: {v}" for k, v in skipped.items()) if isinstance(skipped, Mapping) else ""
            if not usable:
                notes[kind] = "no lag profile in this check" + (f" ({why})" if why else "")
                return None
            if why:
                notes[kind] = f"not drawn for {why}"
            return lag_profile_chart(usable, title=f"{name}: cross-correlation by lag")
        if kind == "feeds":
            usable = {k: v for k, v in (block or {}).items()
                      if isinstance(v, Mapping) and (_nonempty(v.get("periods")) or v.get("next_due"))
                      } if isinstance(block, Mapping) else {}
            if not usable:
                notes[kind] = "no driver feed timeline in this check"
                return None
            end = None
            if now:
                try:
                    d = date.fromisoformat(str(now)[:10])
                    end = datetime(d.year, d.month, d.day, tzinfo=timezone.utc)
                except ValueError:
                    end = None
            return feeds_chart(usable, now=end, title=f"{name}: driver feeds")
        raise AssertionError(kind)  # pragma: no cover - kinds validated above

    for kind in wanted:
        try:
            png = draw(kind)
        except (ValueError, TypeError, KeyError, IndexError) as exc:
            notes[kind] = f"could not draw the {kind} chart: {exc}"
            log.warning("chart %s for model %s left out: %s", kind, name, exc)
            continue
        if png is not None:
            images[kind] = png
        else:
            log.debug("chart %s for model %s left out: %s", kind, name, notes.get(kind))
    return ChartSet(images=images, notes=notes)


def render_model_charts(model_payload: Mapping[str, Any], kinds: Sequence[str] | None = None) -> dict[str, bytes]:
    """PNG bytes keyed by kind for one model's check payload; kinds with no data are skipped.

    See :func:`render_model_chart_set` (which also says why a kind was left out).
    """
    return dict(render_model_chart_set(model_payload, kinds).images)


# ---------------------------------------------------------------------------------------------- html
def data_uri(png: bytes) -> str:
    """A ``data:image/png;base64,...`` URI for embedding a chart in a self-contained page."""
    if not isinstance(png, (bytes, bytearray)):
        raise TypeError(f"png must be bytes, got {type(png).__name__}")
    return "data:image/png;base64," + base64.b64encode(bytes(png)).decode("ascii")


def img_tag(png: bytes, alt: str, *, width: int | None = None) -> Markup:
    """An ``<img>`` element with the chart embedded; ``alt`` (user data) is HTML-escaped."""
    w = f' width="{int(width)}"' if width is not None else ""
    return Markup(f'<img src="{data_uri(png)}" alt="{escape(alt)}"{w} style="max-width:100%;height:auto">')
