"""First ingest of one wide CSV into a fresh store, on SQLite and PostgreSQL.

    python benchmarks/bench_ingest.py                              # 1,000 models x 3 series x 260 weeks
    python benchmarks/bench_ingest.py --models 200 --repeat 1      # quicker
    python benchmarks/bench_ingest.py --backends sqlite            # without the PostgreSQL server

Run it with ``PYTHONPATH`` pointing at the checkout to measure (drift is imported from there).

Invented scenario: ``--models`` weekly models, each with a target and two lagged drivers (three series per
model), ``--weeks`` weeks of values, one wide CSV (one row per week, one column per series). Every repeat
ingests the file into a fresh store (a new SQLite file; a new PostgreSQL schema, dropped afterwards) and
times ``ingest_all`` (read, validate, classify, write): wall time, and the CPU time of this process (the
steadier figure on a shared machine; PostgreSQL's own work is not in it); a second ingest of the unchanged
file is timed too, and then the file grown by one week (read in full and compared with the stored vintages).
The best and the median of ``--repeat`` runs are printed, with the number of rows stored and the 1-minute
load average at the end.
"""

from __future__ import annotations

import argparse
import os
import statistics
import tempfile
import time
import uuid
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import sqlalchemy as sa

from drift.config import Config
from drift.ingest import ingest_all
from drift.store import observations, open_store

PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
NOW = datetime(2026, 1, 5, tzinfo=timezone.utc)


def write_csv(path: Path, models: int, weeks: int, seed: int = 20260105) -> None:
    """The wide file (``path``) and, beside it, the same file grown by one week (``grown-<name>``)."""
    rng = np.random.default_rng(seed)
    periods = pd.date_range("2021-01-04", periods=weeks + 1, freq="7D")
    cols = {"week": periods.strftime("%Y-%m-%d")}
    for i in range(models):
        for s in (f"m{i:04d}_y", f"m{i:04d}_x1", f"m{i:04d}_x2"):
            cols[s] = np.round(rng.normal(100, 10, weeks + 1), 3)
    frame = pd.DataFrame(cols)
    frame.iloc[:weeks].to_csv(path, index=False)
    frame.to_csv(path.with_name(f"grown-{path.name}"), index=False)


def config(base: Path, models: int) -> Config:
    mods = [{"name": f"m{i:04d}", "target": f"m{i:04d}_y", "frequency": "W",
             "drivers": [{"series": f"m{i:04d}_x1", "lag": 1}, {"series": f"m{i:04d}_x2", "lag": 1}],
             "reference": {"start": "2021-01-04", "end": "2023-12-25"}} for i in range(models)]
    src = [{"name": "wide", "kind": "csv", "path": "wide.csv", "period_column": "week"}]
    return Config.model_validate({"sources": src, "models": mods, "base_dir": base})


def one_run(backend: str, cfg: Config, tmp: Path) -> tuple[float, float, float, int, float]:
    schema = None
    if backend == "sqlite":
        url = f"sqlite:///{tmp / f'store-{uuid.uuid4().hex[:8]}.db'}"
    else:
        schema = f"bench_{uuid.uuid4().hex[:10]}"
        admin = sa.create_engine(PG_URL)
        with admin.begin() as conn:
            conn.execute(sa.text(f'create schema "{schema}"'))
        url = f"{PG_URL}?options=-csearch_path%3D{schema}"
    store = open_store(url)
    try:
        t0, c0 = time.perf_counter(), time.process_time()
        ingest_all(cfg, store, now=NOW, progress=False)
        first, cpu = time.perf_counter() - t0, time.process_time() - c0
        t0 = time.perf_counter()
        ingest_all(cfg, store, now=NOW, progress=False)
        again = time.perf_counter() - t0
        with store.connect() as conn:
            rows = int(conn.execute(sa.select(sa.func.count()).select_from(observations)).scalar())
        original = (tmp / "wide.csv").read_bytes()
        (tmp / "wide.csv").write_bytes((tmp / "grown-wide.csv").read_bytes())
        try:
            t0 = time.perf_counter()
            ingest_all(cfg, store, now=NOW, progress=False)
            grown = time.perf_counter() - t0
        finally:
            (tmp / "wide.csv").write_bytes(original)
    finally:
        store.dispose()
        if schema:
            with admin.begin() as conn:
                conn.execute(sa.text(f'drop schema "{schema}" cascade'))
            admin.dispose()
    return first, cpu, again, rows, grown


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--models", type=int, default=1000)
    ap.add_argument("--weeks", type=int, default=260)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--backends", nargs="+", default=["sqlite", "postgres"], choices=["sqlite", "postgres"])
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        write_csv(tmp / "wide.csv", args.models, args.weeks)
        size = (tmp / "wide.csv").stat().st_size
        cfg = config(tmp, args.models)
        print(f"{args.models} models x 3 series x {args.weeks} weeks = {3 * args.models * args.weeks:,} values, "
              f"CSV {size / 1e6:.1f} MB")
        print("| backend | first ingest best s | median s | drift process CPU median s | unchanged re-ingest "
              "median s | grown by a week, median s | rows stored | load |")
        print("|---|---:|---:|---:|---:|---:|---:|---:|")
        for backend in args.backends:
            runs = [one_run(backend, cfg, tmp) for _ in range(args.repeat)]
            firsts = [r[0] for r in runs]
            print(f"| {backend} | {min(firsts):.2f} | {statistics.median(firsts):.2f} | "
                  f"{statistics.median(r[1] for r in runs):.2f} | {statistics.median(r[2] for r in runs):.2f} | "
                  f"{statistics.median(r[4] for r in runs):.2f} | {runs[0][3]:,} | {os.getloadavg()[0]:.1f} |",
                  flush=True)


if __name__ == "__main__":
    main()
