"""A readable report of one check run: Markdown with PNG charts beside it, and a self-contained HTML page.

Also the plain-text table that ``drift check`` prints without ``--json``.
"""

from __future__ import annotations

import html as _html
import logging
from pathlib import Path
from typing import Any

from drift.check import CheckOutcome
from drift.config import Config
from drift.verdicts import ERROR, headline, label

log = logging.getLogger(__name__)

FOOTER = ("These verdicts are statistical evidence, not certainty. Each one says what the data show and how "
          "strongly; whether to refit, re-lag or drop a driver stays with the people accountable for the model.")



def _charts(payload: dict[str, Any]) -> dict[str, bytes]:
    try:
        from drift.delivery.charts import render_model_charts
    except ImportError:  # pragma: no cover - charts module always ships
        return {}
    try:
        return render_model_charts(payload)
    except Exception as exc:  # noqa: BLE001 - a chart must never sink the report
        log.warning("charts for %s failed: %s", payload.get("name"), exc)
        return {}


def write_report(cfg: Config, store: Any, outcome: CheckOutcome, folder: Path) -> tuple[Path, Path]:
    """Write ``report.md`` (+ PNG charts) and ``report.html`` into ``folder``; return both paths."""
    import base64

    folder.mkdir(parents=True, exist_ok=True)
    md = [f"# drift check as of {outcome.as_of.isoformat()}", ""]
    need = [m for m in outcome.models if m["verdict"] != "keep"]
    md.append(f"{len(outcome.models)} models checked; {len(need)} need attention.")
    md.append("")
    md.append("| model | verdict | actions |")
    md.append("|---|---|---|")
    for m in outcome.models:
        acts = ", ".join(label(a["action"]) + (f" ({a['driver']})" if a.get("driver") else "") for a in m["actions"])
        md.append(f"| {m['name']} | {label(m['verdict'])} | {acts or '—'} |")
    for name, err in outcome.errors.items():
        md.append(f"| {name} | {label(ERROR)} | {err} |")
    md.append("")
    html_parts = []
    for m in outcome.models:
        md.append(f"## {m['name']}: {label(m['verdict'])}")
        md.append("")
        md.append(f"Target `{m['target']}` ({m['unit']}), reference {m['reference']['start']} to "
                  f"{m['reference']['end']}, monitored since {m['monitor_start']}, data up to {m['last_period']}.")
        md.append("")
        for a in m["actions"]:
            md.append(f"- **{label(a['action'])}** ({a['severity']}): {a['reason']}")
        if not m["actions"]:
            md.append("- No action: the monitors found no change and every feed is on time.")
        md.append("")
        if m["drivers"]:
            md.append("| driver | lag | form | coef. reference | coef. recent (95% interval) | worth (Clark–West p) |")
            md.append("|---|---|---|---|---|---|")
            for d in m["drivers"]:
                ci = d.get("ci_recent") or [None, None]
                w = d.get("worth") or {}
                md.append(f"| {d['series']} | {d['lag']} | {d['form']} | {_n(d.get('coef_reference'))} | "
                          f"{_n(d.get('coef_recent'))} [{_n(ci[0])}, {_n(ci[1])}] | {_n(w.get('pvalue'))} |")
            md.append("")
        acc = m.get("accuracy", {})
        if acc.get("model", {}).get("mae") is not None:
            md.append(f"As-deployed one-step accuracy over the last {acc.get('window')} periods: MAE "
                      f"{_n(acc['model']['mae'])}, RMSE {_n(acc['model']['rmse'])}, MASE {_n(acc['model']['mase'])}, "
                      f"bias {_n(acc['model']['bias'])} (seasonal-naive baseline MAE {_n(acc['baseline'].get('mae'))}).")
            md.append("")
        charts = _charts(m)
        imgs = []
        for kind, png in charts.items():
            fname = f"{_safe(m['name'])}-{kind}.png"
            (folder / fname).write_bytes(png)
            md.append(f"![{kind} chart for {m['name']}]({fname})")
            imgs.append(f'<img alt="{_html.escape(kind)} chart for {_html.escape(m["name"])}" '
                        f'src="data:image/png;base64,{base64.b64encode(png).decode()}" style="max-width:100%">')
        md.append("")
        acts_html = "".join(f"<li><b>{_html.escape(a['action'])}</b>: {_html.escape(a['reason'])}</li>"
                            for a in m["actions"]) or "<li>No action.</li>"
        html_parts.append(f"<section><h2>{_html.escape(m['name'])}: {_html.escape(label(m['verdict']))}"
                          f"</h2><ul>{acts_html}</ul>{''.join(imgs)}</section>")
    md.append("---")
    md.append(FOOTER)
    md_path = folder / "report.md"
    md_path.write_text("\n".join(md) + "\n", encoding="utf-8")
    html_path = folder / "report.html"
    html_path.write_text(
        "<!doctype html><html><head><meta charset='utf-8'><title>drift check "
        f"{outcome.as_of.isoformat()}</title><style>body{{font-family:sans-serif;max-width:960px;margin:auto;"
        "padding:1em;color:#1d2433}} section{{border-top:1px solid #ccd;margin-top:1.5em}}</style></head><body>"
        f"<h1>drift check as of {outcome.as_of.isoformat()}</h1>{''.join(html_parts)}"
        f"<footer><p><small>{_html.escape(FOOTER)}</small></p></footer></body></html>", encoding="utf-8")
    return md_path, html_path


def _n(x: Any) -> str:
    from drift.verdicts import fmt_num

    return "—" if x is None else fmt_num(float(x))


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_" else "_" for ch in name)


def format_table(outcome: CheckOutcome) -> str:
    """Plain-text summary per model for the terminal."""
    n_all = len(outcome.models) + len(outcome.errors)
    lines = [f"drift check as of {outcome.as_of.isoformat()}: {n_all} model(s), {len(outcome.models)} checked"]
    for m in outcome.models:
        lines.append("")
        lines.append(f"{m['name']}  →  {headline(m['verdict'])}")
        for a in m["actions"]:
            lines.append(f"  - {label(a['action'])}: {a['reason']}")
        for d in m["drivers"]:
            lines.append(f"    {d['series']:<28} lag {d['lag']}  coef ref {_n(d.get('coef_reference')):>8}  "
                         f"recent {_n(d.get('coef_recent')):>8}")
        for t in m["tests"]:
            lines.append(f"    {t['test']:<16} stat {_n(t.get('statistic')):>8}  p {_n(t.get('pvalue')):>8}"
                         + (f"  signalled {t['date']}" if t.get("date") else ""))
    for name, err in outcome.errors.items():
        lines.append("")
        lines.append(f"{name}  →  {label(ERROR)}: {err}")
    lines.append("")
    lines.append(FOOTER)
    return "\n".join(lines)
