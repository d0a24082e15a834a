"""``drift demo``: an invented scenario, ingested into a fresh SQLite store, checked and written up.

The scenario (entirely invented): *Kestrel Freight* forecasts weekly parcel volumes at three depots from
last week's web orders in the depot's region (``lagged``, lag 1) and a planned marketing-campaign calendar
(``known`` in advance). Five years of weekly data: the deployed models were fitted on 2021–2023 and have
been monitored since January 2024.

- ``north`` is healthy: nothing should fire.
- ``east``: from the week of 2024-11-04 a rival parcel locker network halves the pull of web orders —
  the web-orders effect falls from 2.0 to 1.1 parcels per order.
- ``west``: the regional web-orders feed stopped arriving after the week of 2025-11-17.

Data are generated with a fixed seed, so every run of the demo gives the same numbers.
"""

from __future__ import annotations

import logging
import shutil
from dataclasses import dataclass
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd

log = logging.getLogger(__name__)

SEED = 20261201
START = date(2021, 1, 4)
WEEKS = 260  # 2021-01-04 .. 2025-12-22
AS_OF = date(2025, 12, 31)
BREAK_WEEK = date(2024, 11, 4)
WEST_STOP = date(2025, 11, 17)

CONFIG = """\
# Invented demo scenario: Kestrel Freight, weekly parcels per depot (see drift/demo.py).
store: sqlite:///drift.db
sources:
  - name: depots
    kind: csv
    path: data/parcels.csv
    period_column: week
  - name: web-orders
    kind: csv
    path: data/web_orders.csv
    period_column: week
  - name: campaigns
    kind: csv
    path: data/campaigns.csv
    period_column: week
    series_column: series
    value_column: planned
    available_column: planned_on
models:
{models}
check:
  level: 0.05
  recent_window: 52
alerts:
  channels:
    - kind: folder
      path: alerts/
  digest_path: digests/
"""

MODEL = """\
  - name: {name}
    target: parcels_{name}
    unit: parcels
    frequency: W
    drivers:
      - {{series: web_orders_{name}, lag: 1, form: lagged, unit: order}}
      - {{series: campaign_{name}, lag: 0, form: known, unit: campaign week}}
    reference: {{start: 2021-01-04, end: 2023-12-25}}
"""


@dataclass(frozen=True)
class DemoResult:
    out: Path
    config: Path
    report: Path
    report_html: Path | None
    digest: Path | None = None


def generate(out: Path) -> Path:
    """Write the scenario's CSV files and config under ``out``; return the config path."""
    rng = np.random.default_rng(SEED)
    weeks = pd.date_range(START, periods=WEEKS, freq="7D")
    t = np.arange(WEEKS, dtype=float)
    season = np.sin(2 * np.pi * t / (365.25 / 7))
    parcels, orders, camp_rows = {}, {}, []
    for name, base, beta in (("north", 900.0, 2.0), ("east", 700.0, 2.0), ("west", 800.0, 1.8)):
        # web orders: trend, season and AR(1) noise
        u = np.zeros(WEEKS)
        e = rng.normal(0, 8.0, WEEKS)
        for i in range(1, WEEKS):
            u[i] = 0.6 * u[i - 1] + e[i]
        x = 150 + 0.15 * t + 25 * season + u
        camp = (rng.random(WEEKS) < 0.12).astype(float)
        b = np.full(WEEKS, beta)
        if name == "east":
            b[weeks >= pd.Timestamp(BREAK_WEEK)] = 1.1
        xlag = np.r_[np.nan, x[:-1]]
        y = base + 0.8 * t + 60 * np.cos(2 * np.pi * t / (365.25 / 7)) + b * xlag + 45 * camp \
            + rng.normal(0, 12.0, WEEKS)
        y[0] = np.nan  # no lagged orders for the first week
        parcels[f"parcels_{name}"] = np.round(y, 0)
        xo = np.round(x, 1)
        if name == "west":
            xo = np.where(weeks > pd.Timestamp(WEST_STOP), np.nan, xo)
        orders[f"web_orders_{name}"] = xo
        # the campaign calendar is planned ahead: it runs eight weeks past the last actuals
        ahead = pd.date_range(weeks[-1] + pd.Timedelta(days=7), periods=8, freq="7D")
        camp_ahead = (rng.random(len(ahead)) < 0.12).astype(int)
        # each campaign week was planned eight weeks before it starts (the planning date is in the file)
        camp_rows += [{"week": w.date().isoformat(), "series": f"campaign_{name}", "planned": int(c),
                       "planned_on": (w - pd.Timedelta(weeks=8)).date().isoformat()}
                      for w, c in zip([*weeks, *ahead], [*camp, *camp_ahead])]
    data = out / "data"
    data.mkdir(parents=True, exist_ok=True)
    wk = [w.date().isoformat() for w in weeks]
    pd.DataFrame({"week": wk, **parcels}).iloc[1:].to_csv(data / "parcels.csv", index=False)
    pd.DataFrame({"week": wk, **orders}).to_csv(data / "web_orders.csv", index=False)
    pd.DataFrame(camp_rows).to_csv(data / "campaigns.csv", index=False)
    cfg = out / "drift.yaml"
    cfg.write_text(CONFIG.format(models="".join(MODEL.format(name=n) for n in ("north", "east", "west"))),
                   encoding="utf-8")
    return cfg


def run_demo(out: str | Path = "drift-demo") -> DemoResult:
    """Generate, ingest, check and write the report; returns where things are."""
    from drift.config import load_config
    from drift.pipeline import run_check, run_digest, run_ingest
    from drift.report import write_report
    from drift.store import open_store

    out = Path(out).resolve()
    for sub in ("drift.db", "drift.db-wal", "drift.db-shm"):
        (out / sub).unlink(missing_ok=True)
    for sub in ("alerts", "digests", "report"):
        shutil.rmtree(out / sub, ignore_errors=True)
    cfg_path = generate(out)
    cfg = load_config(cfg_path)
    store = open_store(cfg.store_url())
    try:
        run_ingest(cfg, store, progress=False)
        outcome = run_check(cfg, store, as_of=AS_OF)
        md, html = write_report(cfg, store, outcome, out / "report")
        dg = run_digest(cfg, store)
    finally:
        store.dispose()
    return DemoResult(out=out, config=cfg_path, report=md, report_html=html, digest=Path(dg.path))
