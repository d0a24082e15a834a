"""Charts: every kind renders a valid PNG from an invented payload, missing data skips the kind,
user text is escaped, and the bytes are deterministic. (Common practice, no source.)"""

from __future__ import annotations

import io
import threading

import numpy as np
import pytest
from PIL import Image

from drift.delivery import charts
from tests.delivery.digest_payloads import make_payload, without

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


def _image(png: bytes) -> Image.Image:
    assert png.startswith(PNG_MAGIC)
    img = Image.open(io.BytesIO(png))
    img.load()
    return img


@pytest.fixture(scope="module")
def payload() -> dict:
    return make_payload()


@pytest.fixture(scope="module")
def chart_set(payload: dict) -> charts.ChartSet:
    return charts.render_model_chart_set(payload)


def test_every_kind_renders_a_valid_png(chart_set: charts.ChartSet) -> None:
    assert list(chart_set.images) == list(charts.KINDS)
    assert chart_set.notes == {}
    for kind, png in chart_set.images.items():
        img = _image(png)
        assert img.format == "PNG"
        w, h = img.size
        assert w == 800, kind
        assert 400 <= h <= 1000, kind
        # not a blank canvas: many distinct colours
        arr = np.asarray(img.convert("RGB"))
        assert len(np.unique(arr.reshape(-1, 3), axis=0)) > 20, kind


def test_matplotlib_reads_it_back(chart_set: charts.ChartSet) -> None:
    from matplotlib.image import imread

    arr = imread(io.BytesIO(chart_set.images["cusum"]), format="png")
    assert arr.shape[:2] == (400, 800)


def test_kinds_subset_and_order(payload: dict) -> None:
    out = charts.render_model_charts(payload, kinds=["forecast", "cusum"])
    assert list(out) == ["forecast", "cusum"]


def test_unknown_kind_is_a_value_error(payload: dict) -> None:
    with pytest.raises(ValueError, match="kinds.*allowed"):
        charts.render_model_charts(payload, kinds=["cusum", "spaghetti"])


@pytest.mark.parametrize("kind", charts.KINDS)
def test_missing_data_skips_the_kind_with_a_note(payload: dict, kind: str) -> None:
    # the cusum kind draws the monitor that raised the alarm, else the retrospective CUSUM: drop both
    cs = charts.render_model_chart_set(without(payload, kind, *(("monitor",) if kind == "cusum" else ())))
    assert kind not in cs.images
    assert cs.notes.get(kind)
    assert set(cs.images) == set(charts.KINDS) - {kind}


@pytest.mark.parametrize("thin", [
    {},
    {"name": "m", "charts": None},
    {"name": "m", "charts": {"periods": None, "cusum": None}},
    {"name": "m", "charts": {"periods": ["2024-01-01"], "cusum": {"path": [None]}}},
    {"name": "m", "charts": {"periods": ["2024-01-01", "2024-01-08"], "cusum": {"path": [1.0]}}},  # misaligned
    {"name": "m", "charts": {"periods": ["not a date"], "forecast": {"actual": [1.0], "forecast": [1.0]}}},
    {"name": "m", "charts": {"lag_profile": {"x": {"lags": [0, 1], "reference": ["a", 1]}}}},
    {"name": "m", "charts": {"feeds": {"x": {"periods": ["2024-01-01"], "available_at": None,
                                             "next_due": None, "late": None}}}},
])
def test_thin_or_broken_payloads_never_raise(thin: dict) -> None:
    cs = charts.render_model_chart_set(thin)
    assert set(cs.images) | set(cs.notes) == set(charts.KINDS)
    for png in cs.images.values():
        _image(png)


def test_deterministic_bytes(payload: dict) -> None:
    a = charts.render_model_charts(payload)
    b = charts.render_model_charts(payload)
    assert a == b
    assert b"Software" not in a["cusum"]  # no version string in the PNG metadata


def test_threads_draw_the_same_bytes(payload: dict) -> None:
    expected = charts.render_model_charts(payload, kinds=["cusum", "lag_profile"])
    results: list[dict[str, bytes]] = []

    def work() -> None:
        results.append(charts.render_model_charts(payload, kinds=["cusum", "lag_profile"]))

    threads = [threading.Thread(target=work) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert results == [expected] * 3


def test_user_names_with_markup_and_dollars_render(payload: dict) -> None:
    # '$' would switch matplotlib into mathtext; names are user data
    odd = make_payload(name="<b>x</b> $a_1$")
    cs = charts.render_model_chart_set(odd)
    assert set(cs.images) == set(charts.KINDS)


def test_img_tag_escapes_alt_text(chart_set: charts.ChartSet) -> None:
    tag = str(charts.img_tag(chart_set.images["cusum"], alt='<b>x</b> "cusum"'))
    assert "<b>" not in tag
    assert "&lt;b&gt;x&lt;/b&gt;" in tag
    assert "&#34;cusum&#34;" in tag or "&quot;cusum&quot;" in tag
    assert tag.startswith('<img src="data:image/png;base64,iVBOR')


def test_plain_array_functions_validate_arguments() -> None:
    periods = ["2024-01-01", "2024-01-08", "2024-01-15"]
    with pytest.raises(ValueError, match="path has 2 values but periods has 3"):
        charts.cusum_chart(periods, [0.0, 1.0], {})
    with pytest.raises(TypeError, match=r"path\[1\]"):
        charts.cusum_chart(periods, [0.0, "x", 1.0], {})
    with pytest.raises(ValueError, match="monitor_start index"):
        charts.cusum_chart(periods, [0.0, 0.1, 0.2], {}, monitor_start=9)
    with pytest.raises(ValueError, match="drivers"):
        charts.coefficient_chart(periods, {})
    with pytest.raises(ValueError, match="context"):
        charts.forecast_chart(periods, [1, 2, 3], [None, 2, 3], context=-1)
    with pytest.raises(ValueError, match="profiles"):
        charts.lag_profile_chart({})
    with pytest.raises(ValueError, match="feeds"):
        charts.feeds_chart({})
    with pytest.raises(TypeError, match="png"):
        charts.data_uri("not bytes")  # type: ignore[arg-type]


def test_plain_arrays_with_numpy_and_dates() -> None:
    t = np.arange("2024-01-01", "2024-03-01", dtype="datetime64[D]")
    path = np.linspace(0, 2, t.size)
    png = charts.cusum_chart(t, path, {0.05: np.full(t.size, 1.5)}, alarm_date=str(t[40]), monitor_start=5)
    assert _image(png).size == (800, 400)


def test_monitor_chart_marks_the_end_of_the_horizon() -> None:
    """A monitor payload's ``horizon_end`` (the last period within the monitoring horizon) is drawn: a
    crossing after it reads as one without the false-alarm guarantee."""
    t = np.arange("2024-01-01", "2024-03-01", dtype="datetime64[D]")
    path = np.linspace(0, 2, t.size)
    plain = charts.cusum_chart(t, path, {0.05: np.full(t.size, 1.5)}, alarm_date=str(t[40]), monitor_start=5)
    marked = charts.cusum_chart(t, path, {0.05: np.full(t.size, 1.5)}, alarm_date=str(t[40]), monitor_start=5,
                                horizon_end=str(t[30]))
    assert _image(marked).size == (800, 400) and marked != plain
    p = make_payload()
    p["charts"]["monitor"]["horizon_end"] = p["charts"]["periods"][-5]
    assert charts.render_model_charts(p, ["cusum"])["cusum"] != charts.render_model_charts(make_payload(), ["cusum"])["cusum"]
