"""What drift says matches what it found: every number in a reason is one of the payload's own figures,
the report and the digest show those same figures, and each verdict is spelled one way.

Scenarios: the demo (invented, drift/demo.py) and a second invented simulation (tests/check_scenarios.py)
where one model has both a confirmed change and a late feed. The rule checked is the project's own
("one number, one place"; common practice, no source).
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import pandas as pd
import pytest

from drift.check import CheckOutcome, analyse, as_of_moment
from drift.delivery.digest import build_digest
from drift.demo import run_demo
from drift.report import format_table, write_report
from drift.verdicts import LABEL, accuracy_sentence, fmt_num, fmt_p
from tests.check_scenarios import N_REF, Scenario, config, known_by, observations, simulate

#: a figure in running text: 2.08, -85.3, 1,234, 7.7e-09, 45% (dates and identifiers are cut out first)
_NUMBER = re.compile(r"(?<![\w.-])-?\d[\d,]*(?:\.\d+)?(?:e[-+]\d+)?")
_DATE = re.compile(r"\d{4}-\d{2}-\d{2}(?:[ T]\d{2}:\d{2}(?::\d{2})?)?")


def _figures(obj: Any) -> Iterator[float]:
    if isinstance(obj, bool):
        return
    if isinstance(obj, (int, float)):
        yield float(obj)
    elif isinstance(obj, str):  # a figure given in words, e.g. the horizon "2 years = 104 periods"
        yield from (float(x) for x in re.findall(r"\b\d+(?:\.\d+)?\b", _DATE.sub(" ", obj)))
    elif isinstance(obj, Mapping):
        for k, v in obj.items():
            if k not in ("charts", "reason"):
                yield from _figures(v)
    elif isinstance(obj, (list, tuple)):
        for v in obj:
            yield from _figures(v)


def _printed(payload: Mapping[str, Any], cfg_level: float) -> set[str]:
    """Every way the payload's own figures are printed (fmt_num, fmt_p, integers, percentages)."""
    out = {"0", "1", "5", str(int(cfg_level * 100))}
    for x in _figures(payload):
        out.add(fmt_num(x))
        out.add(fmt_p(x))
        if float(x).is_integer():
            out.add(str(int(x)))
    return out


def _numbers(text: str, name: str) -> list[str]:
    text = _DATE.sub(" ", text).replace(name, " ")
    text = re.sub(r"\b[A-Za-z_]+\d+\w*", " ", text)  # identifiers such as x1, web_orders_east
    return [m.group(0).rstrip(".") for m in _NUMBER.finditer(text)]


def _check_reasons(payload: Mapping[str, Any], level: float) -> None:
    printed = _printed(payload, level)
    for a in payload["actions"]:
        for n in _numbers(a["reason"], payload["name"]):
            if a["action"] == "refit" and re.search(rf"by about {re.escape(n)}%", a["reason"]):
                moved = next(e for e in a["effects"] if e["driver"] == a["moved"])
                pct = abs(moved["after"] - moved["before"]) / abs(moved["before"]) * 100
                assert n == f"{pct:.0f}"
                continue
            assert n in printed, (payload["name"], a["action"], n, a["reason"])


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Any:
    return run_demo(tmp_path_factory.mktemp("demo"))


@pytest.fixture(scope="module")
def demo_json(demo: Any) -> dict[str, Any]:
    from drift.config import load_config
    from drift.pipeline import run_check
    from drift.store import open_store

    cfg = load_config(demo.config)
    store = open_store(cfg.store_url())
    try:
        from drift.demo import AS_OF

        out = run_check(cfg, store, as_of=AS_OF, record=False)
    finally:
        store.dispose()
    return {m["name"]: m for m in out.models}


def test_demo_every_number_in_a_reason_is_a_payload_figure(demo_json: dict[str, Any]) -> None:
    for p in demo_json.values():
        _check_reasons(p, 0.05)


def test_demo_east_one_pair_of_numbers(demo: Any, demo_json: dict[str, Any]) -> None:
    east = demo_json["east"]
    (refit,) = [a for a in east["actions"] if a["action"] == "refit"]
    moved = next(e for e in refit["effects"] if e["driver"] == refit["moved"])
    assert refit["moved"] == "web_orders_east"
    pair = f"{fmt_num(moved['before'])} before {refit['since']} → {fmt_num(moved['after'])}"
    assert pair in refit["reason"]
    # the driver entry carries the same figures, and the report's driver table shows them
    drv = next(d for d in east["drivers"] if d["series"] == "web_orders_east")
    assert (drv["break"]["before"], drv["break"]["after"]) == (moved["before"], moved["after"])
    md = demo.report.read_text(encoding="utf-8")
    row = next(line for line in md.splitlines() if line.startswith("| web_orders_east |"))
    assert f"| {fmt_num(moved['before'])} | {fmt_num(moved['after'])} |" in row
    assert f"effect before the break ({moved['before_window']['start']} to {moved['before_window']['end']})" in md
    # the monitor named is the one that crossed first, the driver named is the one that moved most
    assert refit["monitor"]["date"] in refit["reason"]
    first = min((a for a in east["alarms"] if a["test"].startswith("monitor-") and not a.get("warning")),
                key=lambda a: a["date"])
    assert (first["test"], first["date"]) == (refit["monitor"]["test"], refit["monitor"]["date"])
    assert moved["pvalue_change"] == min(e["pvalue_change"] for e in refit["effects"])
    # the coefficient chart draws those same estimates beside the rolling one, split at the dated break
    split = east["charts"]["coefficients"]["web_orders_east"]["split"]
    assert (split["break"], split["before"], split["after"]) == (refit["since"], moved["before"], moved["after"])


def test_demo_accuracy_is_one_window_and_one_scale(demo: Any, demo_json: dict[str, Any]) -> None:
    md = demo.report.read_text(encoding="utf-8")
    for name, p in demo_json.items():
        acc = p["accuracy"]
        m, b = acc["model"], acc["baseline"]
        assert m["n"] == b["n"]  # the baseline scored on the model's periods
        assert m["mase"] == pytest.approx(m["mae"] / acc["scale"]["mae"], abs=1e-4)
        assert b["mase"] == pytest.approx(b["mae"] / acc["scale"]["mae"], abs=1e-4)
        sentence = accuracy_sentence(acc, p["unit"])
        assert sentence in md
        used = "the last 52 periods" if m["n"] == 52 else f"{m['n']} of the last 52 periods"
        assert f"over {used} ({acc['start']} to {acc['end']})" in sentence, name
    # west lost its feed: its errors cover 48 of the 52 periods, and every output says so
    assert demo_json["west"]["accuracy"]["model"]["n"] == 48
    assert "48 of the last 52 periods" in md


def test_demo_west_is_data_late_with_the_cost(demo_json: dict[str, Any]) -> None:
    west = demo_json["west"]
    assert west["verdict"] == "data-late"
    assert [a["action"] for a in west["actions"]] == ["data-late"]
    (late,) = west["actions"]
    drv = next(d for d in west["drivers"] if d["series"] == "web_orders_west")
    w = late["without"]
    assert (w["mae_with"], w["mae_without"], w["n"]) == (drv["worth"]["mae_with"], drv["worth"]["mae_without"],
                                                        drv["worth"]["n"])
    assert f"from {fmt_num(w['mae_with'])} to {fmt_num(w['mae_without'])} parcels" in late["reason"]


def test_demo_verdicts_spelled_one_way(demo: Any) -> None:
    texts = {"report.md": demo.report.read_text(encoding="utf-8"),
             "digest.txt": demo.digest.with_suffix(".txt").read_text(encoding="utf-8")}
    html = demo.report_html.read_text(encoding="utf-8") + demo.digest.read_text(encoding="utf-8")
    texts["html text"] = re.sub(r"<[^>]+>", " ", re.sub(r"<(style|script)[^>]*>.*?</\1>", " ", html, flags=re.DOTALL))
    wrong = ["Data late", "data-late", "DATA LATE", "KEEP", "Keep", "REFIT", "Refit —", "NOT CHECKED",
             "Re-lag", "Drop a driver", "no change found —"]
    for where, text in texts.items():
        for w in wrong:
            assert w not in text, (where, w)
    assert f"west — {LABEL['data-late']}" in texts["report.md"]


# ------------------------------------------------------------------------------------- a second scenario
def test_second_scenario_refit_heads_a_late_feed_and_numbers_agree(tmp_path: Path) -> None:
    # invented scenario (simulation): the x1 effect falls from 2.0 to 0.5 at week 20 of monitoring, and
    # the x1 feed stops two weeks before the check
    cfg = config(tmp_path)
    sc = Scenario(seed=321, n_mon=90, b1_after=0.5, change_at=N_REF + 20, stop_x1_after=N_REF + 90 - 3)
    periods, values = simulate(sc)
    obs = observations(periods, values)
    day = (periods[-1] + pd.Timedelta(days=7)).date()
    moment = as_of_moment(day)
    payloads, errors = analyse(cfg, cfg.models, known_by(obs, moment), moment)
    assert not errors
    (p,) = payloads
    assert p["verdict"] == "refit"
    assert [a["action"] for a in p["actions"]][:2] == ["refit", "data-late"]
    _check_reasons(p, cfg.check.level)
    (refit,) = [a for a in p["actions"] if a["action"] == "refit"]
    assert refit["moved"] == "x1"
    json.dumps(p["actions"], allow_nan=False)
    # the report and the terminal table show the refit first and the late feed beside it, same figures
    out = CheckOutcome(run_id=None, as_of=day, models=[p], order=[p["name"]])
    md, _html = write_report(cfg, None, out, tmp_path / "report")
    text = md.read_text(encoding="utf-8")
    assert "| sim | refit | refit, data late (x1) |" in text
    moved = next(e for e in refit["effects"] if e["driver"] == "x1")
    assert f"| {fmt_num(moved['before'])} | {fmt_num(moved['after'])} |" in text
    assert accuracy_sentence(p["accuracy"], p["unit"]) in text
    table = format_table(out)
    assert table.index("  - refit:") < table.index("  - data late:")


def test_digest_shows_the_late_feed_beside_the_refit(demo: Any) -> None:
    text = demo.digest.with_suffix(".txt").read_text(encoding="utf-8")
    assert "east: refit" in text and "west: data late" in text


def test_build_digest_accuracy_uses_the_one_formatter(demo: Any) -> None:
    from drift.config import load_config
    from drift.store import open_store

    cfg = load_config(demo.config)
    store = open_store(cfg.store_url())
    try:
        d = build_digest(cfg, store)
    finally:
        store.dispose()
    east = next(m for m in d.models if m.name == "east")
    assert east.accuracy.startswith("MASE 1.46 vs ")
    assert "the last 52 periods" in east.accuracy


def test_demo_monitor_chart_is_the_monitor_that_crossed(demo_json: dict[str, Any]) -> None:
    # the chart's path and boundary are the monitor's own (its result), and the marked period is the first
    # where that path is beyond that boundary: the alarm the refit reason names
    east = demo_json["east"]
    (refit,) = [a for a in east["actions"] if a["action"] == "refit"]
    mon = east["charts"]["monitor"]
    assert mon["test"] == refit["monitor"]["test"] and mon["alarm_date"] == refit["monitor"]["date"]
    periods = east["charts"]["periods"]
    beyond = [p for p, x, b in zip(periods, mon["path"], mon["boundary"])
              if x is not None and b is not None and abs(x) > b]
    assert beyond and beyond[0] == mon["alarm_date"]
    # a model without an alarm shows the monitor nearest its boundary, never crossing it
    north = demo_json["north"]["charts"]["monitor"]
    assert north["alarm_date"] is None
    assert all(abs(x) <= b for x, b in zip(north["path"], north["boundary"]) if x is not None and b is not None)


def test_demo_every_chart_is_drawn_or_says_why(demo: Any) -> None:
    md = demo.report.read_text(encoding="utf-8")
    # west's lag profile cannot be drawn (its feed is late): the report says so in its place
    assert "lag profile chart: no lag profile in this check (web_orders_west: its feed is late)" in md
    # the planned campaign feed has its timeline (it used to be an empty row)
    import sqlite3

    from drift.config import load_config  # noqa: F401 - the payload is read from the store below
    from drift.jsontext import JSONText

    con = sqlite3.connect(str(demo.out / "drift.db"))
    payload, stored = con.execute("select payload, charts from verdicts where model = 'north' order by id desc"
                                  ).fetchone()
    con.close()
    assert "charts" not in json.loads(payload)  # the charts are in their own column
    feed = JSONText.from_stored(stored)["feeds"]["campaign_north"]
    assert feed["form"] == "known" and len(feed["periods"]) > 20 and len(feed["available_at"]) == len(feed["periods"])


def test_drift_report_command_writes_the_report_and_records_nothing(demo: Any, tmp_path: Path) -> None:
    import sqlite3
    import subprocess
    import sys

    def counts() -> tuple[int, int, int]:
        con = sqlite3.connect(str(demo.out / "drift.db"))
        try:
            return tuple(con.execute(f"select count(*) from {t}").fetchone()[0]  # type: ignore[return-value]
                         for t in ("runs", "verdicts", "alerts"))
        finally:
            con.close()

    before = counts()
    out = tmp_path / "rep"
    r = subprocess.run([sys.executable, "-m", "drift.cli", "report", "--config", str(demo.config), "--model", "east",
                        "--as-of", "2025-12-31", "--out", str(out)], capture_output=True, text=True, check=False)
    assert r.returncode == 0, r.stderr
    md = (out / "report.md").read_text(encoding="utf-8")
    assert "east — refit" in md and "north" not in md
    assert (out / "report.html").exists() and list(out.glob("*.png"))
    # the same renderer as the demo: east's section reads the same in both reports
    demo_md = demo.report.read_text(encoding="utf-8")
    section = md[md.index("## east"):md.index("![")]
    assert section in demo_md
    assert counts() == before


@pytest.mark.parametrize("sc, action", [
    (Scenario(seed=200, b1=2.0, lag1_after=3, change_at=N_REF), "relag"),       # x1 now leads by 3 weeks
    (Scenario(seed=304, n_mon=100, b1_after=0.0, change_at=N_REF + 4), "drop-driver"),  # x1's effect gone
])
def test_relag_and_drop_reasons_quote_payload_figures(tmp_path: Path, sc: Scenario, action: str) -> None:
    # invented scenarios (simulation): every number of these reasons is one of the action's own figures
    from tests.check_scenarios import end_moment

    cfg = config(tmp_path)
    periods, values = simulate(sc)
    moment = end_moment(periods)
    (p,), errors = analyse(cfg, cfg.models, known_by(observations(periods, values), moment), moment)
    assert not errors
    assert action in [a["action"] for a in p["actions"]], p["actions"]
    _check_reasons(p, cfg.check.level)


def test_a_kept_model_with_nothing_monitored_says_so() -> None:
    """A model whose data end with its reference period (a new model, or a new epoch fitted up to the check)
    is kept, but not because "the monitors found no change": nothing was monitored (common practice, no
    source: the keep line must say what the check did)."""
    from drift.check import CheckOutcome
    from drift.delivery.present import keep_reason

    base = {"name": "m", "verdict": "keep", "actions": [], "drivers": [], "tests": [], "alarms": [],
            "reference": {"start": "2024-10-01", "end": "2025-12-01"}, "last_period": "2025-12-01"}
    fresh = {**base, "monitor_start": None}
    watched = {**base, "reference": {"start": "2021-01-04", "end": "2023-12-25"}, "monitor_start": "2024-01-01"}
    assert keep_reason(fresh).startswith("nothing is monitored yet: the reference period runs to 2025-12-01")
    assert keep_reason(watched) == "the monitors found no change and every feed is on time."
    text = format_table(CheckOutcome(run_id=None, as_of=pd.Timestamp("2025-12-31").date(), models=[fresh, watched],
                                     order=["m", "m"]))
    assert text.count("nothing is monitored yet") == 1
