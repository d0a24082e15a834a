"""A readable report of one check: Markdown with PNG charts beside it, and a self-contained HTML page, both
rendered from one template (``templates/report.j2``) with the same content; used by ``drift demo`` and
``drift report``.

Also the plain-text table that ``drift check`` prints without ``--json``.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import jinja2
from markupsafe import Markup

from drift.check import CheckOutcome
from drift.config import Config
from drift.delivery.present import Table, accuracy_text, context_line, driver_table, keep_reason, tests_table
from drift.verdicts import ERROR, KEEP, accuracy_short, fmt_p, headline, label

log = logging.getLogger(__name__)

FOOTER = ("These verdicts are statistical evidence, not certainty. Each one says what the data show and how "
          "strongly; whether to refit, re-lag or drop a driver stays with the people accountable for the model.")

_TEMPLATES = Path(__file__).resolve().parent / "templates"


def _md_cell(value: Any) -> str:
    """A Markdown table cell: a pipe would end the cell, a newline the row."""
    return str(value).replace("|", "\\|").replace("\n", " ")


_env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(_TEMPLATES)), autoescape=True,
                          undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                          keep_trailing_newline=True)
_env.filters["cell"] = _md_cell


def _chart_set(payload: Mapping[str, Any]) -> Any:
    from drift.delivery.charts import ChartSet, render_model_chart_set

    try:
        return render_model_chart_set(payload)
    except Exception as exc:  # noqa: BLE001 - a chart must never sink the report
        log.warning("charts for %s failed: %s", payload.get("name"), exc)
        return ChartSet(images={}, notes={"charts": f"no charts: {exc}"})


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name)


def _section(m: Mapping[str, Any], i: int, folder: Path) -> dict[str, Any]:
    from drift.delivery.charts import data_uri

    name = str(m.get("name"))
    actions = [{"label": label(a.get("action")), "severity": a.get("severity", "act"), "reason": a.get("reason", "")}
               for a in m.get("actions") or []]
    if m.get("verdict") == ERROR:
        actions = [{"label": label(ERROR), "severity": "act", "reason": m.get("reason") or "no reason recorded"}]
    elif not actions:
        actions = [{"label": label(KEEP), "severity": "", "reason": keep_reason(m)}]
    images, notes = [], []
    if m.get("verdict") != ERROR:
        cs = _chart_set(m)
        for kind, png in cs.images.items():
            fname = f"{i:02d}-{_safe(name)}-{kind}.png"
            (folder / fname).write_bytes(png)
            alt = f"{kind.replace('_', ' ')} chart for {name}"
            images.append({"file": fname, "src": Markup(data_uri(png)), "alt": alt})
        notes = [f"{kind.replace('_', ' ')} chart: {why}" for kind, why in cs.notes.items()]
    return {"name": name, "anchor": f"model-{i}", "headline": headline(m.get("verdict")),
            "context": context_line(m), "actions": actions, "drivers": driver_table(m),
            "accuracy": accuracy_text(m), "tests": tests_table(m), "images": images, "notes": notes}


def write_report(cfg: Config, store: Any, outcome: CheckOutcome, folder: Path) -> tuple[Path, Path]:
    """Write ``report.md`` (+ PNG charts) and ``report.html`` into ``folder``; return both paths.

    Both come from one template with the same content: the overview table, per model its actions, driver
    table, accuracy, tests and charts (a chart that could not be drawn is named with the reason).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    for old in folder.glob("*.png"):
        old.unlink()
    entries = outcome.entries()
    need = [m for m in entries if m["verdict"] != KEEP]
    summary = (f"{len(entries)} model{'s' if len(entries) != 1 else ''} asked for; "
               f"{len(entries) - len(outcome.errors)} checked; {len(need)} need attention.")
    overview = Table(caption="", headers=("model", "verdict", "actions", "accuracy"), rows=tuple(
        (str(m["name"]), label(m["verdict"]),
         ", ".join(label(a["action"]) + (f" ({a['driver']})" if a.get("driver") else "")
                   for a in m.get("actions") or []) or "—",
         accuracy_short(m.get("accuracy")) or "—") for m in entries))
    sections = [_section(m, i, folder) for i, m in enumerate(entries)]
    ctx = {"title": f"drift check as of {outcome.as_of.isoformat()}", "summary": summary, "overview": overview,
           "sections": sections, "footer": FOOTER}
    tpl = _env.get_template("report.j2")
    md = tpl.render(fmt="md", **ctx)
    # quotes need no escaping in Markdown (< > & stay escaped: the file may be shown as HTML)
    # ('<' stays escaped before anything that could start a tag; "< 0.005" and '>' cannot start one)
    md = md.replace("&#39;", "'").replace("&#34;", '"').replace("&gt;", ">").replace("&lt; ", "< ")
    md = re.sub(r"\n{3,}", "\n\n", md).lstrip("\n")
    html = tpl.render(fmt="html", **ctx)
    md_path, html_path = folder / "report.md", folder / "report.html"
    md_path.write_text(md, encoding="utf-8")
    html_path.write_text(html, encoding="utf-8")
    return md_path, html_path


def _n(x: Any) -> str:
    from drift.verdicts import fmt_num

    return "—" if x is None else fmt_num(float(x))


def format_table(outcome: CheckOutcome) -> str:
    """Plain-text summary per model for the terminal."""
    n_all = len(outcome.models) + len(outcome.errors)
    lines = [f"drift check as of {outcome.as_of.isoformat()}: {n_all} model(s), {len(outcome.models)} checked"]
    for m in outcome.models:
        lines.append("")
        lines.append(f"{m['name']}  →  {headline(m['verdict'])}")
        for a in m["actions"]:
            lines.append(f"  - {label(a['action'])}: {a['reason']}")
        if not m["actions"] and keep_reason(m).startswith("nothing"):
            lines.append(f"  - {label(KEEP)}: {keep_reason(m)}")
        for d in m["drivers"]:
            rw = d.get("recent_window") or {}
            brk = d.get("break") or {}
            lines.append(f"    {d['series']:<28} lag {d['lag']}  coef reference fit {_n(d.get('coef_reference')):>8}  "
                         + (f"last {rw['n']} periods {_n(d.get('coef_recent')):>8}" if rw.get("n") else
                            f"{'no rolling estimate':>24}")
                         + (f"  before/since {brk.get('after_window', {}).get('start')} {_n(brk.get('before'))} / "
                            f"{_n(brk.get('after'))}" if brk else ""))
        if accuracy_text(m):
            lines.append(f"    {accuracy_text(m)}")
        for t in m["tests"]:
            name = str(t["test"]) + (f" ({t['driver']})" if t.get("driver") else "")
            lines.append(f"    {name:<34} stat {_n(t.get('statistic')):>8}  p {fmt_p(t.get('pvalue'), t.get('test')):>8}"
                         + (f"  signalled {t['date']}" if t.get("date") else "")
                         + (" (after the horizon)" if t.get("beyond_horizon") else ""))
    for name, err in outcome.errors.items():
        lines.append("")
        lines.append(f"{name}  →  {label(ERROR)}: {err}")
    lines.append("")
    lines.append(FOOTER)
    return "\n".join(lines)
