"""The check report (Markdown and HTML from one template) and the digest, rendered for a model whose name is
HTML: every chart loads in headless Chromium, no template text leaks, the name is escaped everywhere.

Invented scenario (simulation, tests/check_scenarios.py). Browser checks are common practice, no source.
"""

from __future__ import annotations

import re
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from drift.check import CheckOutcome, analyse, as_of_moment
from drift.config import load_config
from drift.delivery import digest as dg
from drift.report import write_report
from drift.store import open_store
from tests.check_scenarios import CONFIG, N_REF, Scenario, known_by, observations, simulate
from tests.delivery.test_digest_browser import CHROMIUM, _probe

EVIL = "<img src=x onerror=alert(1)>"


@pytest.fixture(scope="module")
def outputs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    tmp = tmp_path_factory.mktemp("report")
    text = CONFIG.format(errors="ols", lag1=1, level=0.05, recent=52, sources="").replace(
        "  - name: sim", f'  - name: "{EVIL}"')
    text += "alerts:\n  digest_path: digests/\n"
    (tmp / "drift.yaml").write_text(text, encoding="utf-8")
    cfg = load_config(tmp / "drift.yaml")
    sc = Scenario(seed=331, n_mon=90, b1_after=0.5, change_at=N_REF + 20, stop_x1_after=N_REF + 90 - 3)
    periods, values = simulate(sc)
    day = (periods[-1] + pd.Timedelta(days=7)).date()
    moment = as_of_moment(day)
    payloads, errors = analyse(cfg, cfg.models, known_by(observations(periods, values), moment), moment)
    assert not errors and payloads[0]["name"] == EVIL
    out = CheckOutcome(run_id=None, as_of=day, models=payloads, order=[EVIL])
    md, html = write_report(cfg, None, out, tmp / "report")
    store = open_store(f"sqlite:///{tmp / 'drift.db'}")
    try:
        rid = store.start_run("check", as_of=day)
        store.save_verdicts(rid, day, payloads)
        store.finish_run(rid, "ok")
        d = dg.run_digest(cfg, store, now=datetime.combine(day + timedelta(days=1), datetime.min.time(),
                                                            tzinfo=timezone.utc))
    finally:
        store.dispose()
    return {"md": md, "html": html, "digest": d.path, "digest_txt": d.text_path, "payload": payloads[0]}


def test_report_forms_carry_the_same_content(outputs: dict[str, Any]) -> None:
    md = outputs["md"].read_text(encoding="utf-8")
    html = outputs["html"].read_text(encoding="utf-8")
    p = outputs["payload"]
    # the same sections in both: summary table, actions, driver table, accuracy, tests, charts
    for needle in ("refit", "data late", "coef., reference fit", "effect before the break", "One-step as-deployed",
                   "monitor-cusum"):
        assert needle in md and needle in html, needle
    charts_md = re.findall(r"!\[[^\]]*\]\(([^)]+\.png)\)", md)
    charts_html = re.findall(r'<img src="data:image/png;base64,', html)
    assert len(charts_md) == len(charts_html) >= 4
    for f in charts_md:
        assert (outputs["md"].parent / f).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert p["verdict"] == "refit"
    # the style sheet is CSS, not a template's doubled braces
    style = re.search(r"<style>(.*?)</style>", html, flags=re.DOTALL)
    assert style and "{{" not in style.group(1) and "body {" in style.group(1)


def test_no_template_text_and_the_name_is_escaped(outputs: dict[str, Any]) -> None:
    for key in ("md", "html", "digest"):
        text = outputs[key].read_text(encoding="utf-8")
        assert "{{" not in text and "}}" not in text and "{%" not in text, key
        assert EVIL not in text, key  # never raw
        assert "&lt;img src=x onerror=alert(1)&gt;" in text or "&lt;img src=x onerror=alert(1)>" in text, key
    # plain text is not markup: the name as it is
    assert EVIL in outputs["digest_txt"].read_text(encoding="utf-8")


@pytest.mark.browser
@pytest.mark.skipif(not CHROMIUM.exists(), reason="needs headless Chromium at /usr/bin/chromium")
@pytest.mark.parametrize("key", ["html", "digest"])
def test_every_image_loads_in_chromium(tmp_path: Path, outputs: dict[str, Any], key: str) -> None:
    html = outputs[key].read_text(encoding="utf-8")
    n_charts = html.count('src="data:image/png;base64,')
    assert n_charts >= 4
    # an unescaped name would add an <img src=x> that cannot load: the probe counts every image
    assert _probe(tmp_path, html, key) == (n_charts, 0)


def test_digest_heads_with_refit_and_lists_the_late_feed(outputs: dict[str, Any]) -> None:
    # the README's verdict order: a confirmed change outranks a late feed, which is listed beside it
    text = outputs["digest_txt"].read_text(encoding="utf-8")
    line = next(x for x in text.splitlines() if x.strip().startswith(f"{EVIL}: refit"))
    assert line.rstrip().endswith("Also data late: x1.")
