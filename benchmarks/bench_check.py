"""Check benchmark: the whole :func:`drift.check.analyse` on N invented weekly models, per executor.

Each model: a target and two AR(1) drivers at lag 1, ``--weeks`` weeks (the last 52 monitored, the rest
reference), linear trend and annual Fourier season; every second model's first-driver coefficient falls
from 2.0 to 0.8 half-way through the monitoring year. Observations are built as a DataFrame (no store),
the configuration as a YAML file loaded with :func:`drift.config.load_config`.

Every (models, executor) case runs in a fresh interpreter so that peak memory (``ru_maxrss`` of the
parent, and of the largest worker process for the process executor) belongs to that case alone.
A script, not a test: timings depend on the machine.

Usage::

    python benchmarks/bench_check.py [--models 200 1000] [--executors local process] [--workers 2]
        [--chunk-size 500 100] [--weeks 260] [--profile N] [--append-readme]

``--profile N`` instead runs cProfile on ``analyse`` for N models in-process and prints the top entries.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd

SEED = 20260312
START = pd.Timestamp("2021-01-04")  # a Monday
N_MON = 52
README = Path(__file__).with_name("README.md")


def make_scenario(n_models: int, weeks: int, seed: int = SEED) -> tuple[pd.DataFrame, str, datetime]:
    """(observations, config YAML text, as_of) for ``n_models`` invented weekly models."""
    rng = np.random.default_rng(seed)
    n_ref = weeks - N_MON
    periods = pd.date_range(START, periods=weeks, freq="7D")
    t = np.arange(weeks, dtype=float)
    e = rng.normal(size=(n_models, weeks, 2))
    x = np.zeros_like(e)
    for s in range(1, weeks):  # AR(1) drivers, vectorised over models
        x[:, s] = 0.6 * x[:, s - 1] + e[:, s]
    b1 = np.full((n_models, weeks), 2.0)
    b1[1::2, n_ref + N_MON // 2:] = 0.8
    xl = np.concatenate([np.zeros((n_models, 1, 2)), x[:, :-1]], axis=1)
    y = (50.0 + 0.02 * t + 3.0 * np.sin(2 * np.pi * t / 52.18) + b1 * xl[:, :, 0] + xl[:, :, 1]
         + rng.normal(scale=0.7, size=(n_models, weeks)))
    names = np.concatenate([[f"y{i}", f"a{i}", f"b{i}"] for i in range(n_models)])
    values = np.stack([y, x[:, :, 0], x[:, :, 1]], axis=1).reshape(-1)  # model, series, week
    obs = pd.DataFrame({"series": np.repeat(names, weeks), "period": np.tile(periods, 3 * n_models),
                        "value": values})
    obs["issued_at"] = pd.Series(pd.NaT, index=obs.index, dtype="datetime64[ns, UTC]")
    obs["available_at"] = (obs["period"] + pd.Timedelta(days=7)).dt.tz_localize("UTC")
    obs["ingested_at"] = obs["available_at"]
    obs = obs[["series", "period", "issued_at", "value", "available_at", "ingested_at"]]
    ref_end = (START + pd.Timedelta(weeks=n_ref - 1)).date()
    text = "models:\n" + "".join(
        f"  - name: m{i}\n    target: y{i}\n    frequency: W\n    drivers:\n"
        f"      - {{series: a{i}, lag: 1}}\n      - {{series: b{i}, lag: 1}}\n"
        f"    reference: {{start: {START.date()}, end: {ref_end}}}\n" for i in range(n_models))
    as_of = (periods[-1] + pd.Timedelta(days=8)).tz_localize("UTC").to_pydatetime()
    return obs, text, as_of


def _config(text: str, executor: str, chunk_size: int, workers: int | None, folder: str):
    from drift.config import load_config

    path = Path(folder) / "drift.yaml"
    check = f"check:\n  executor: {executor}\n  chunk_size: {chunk_size}\n"
    if workers:
        check += f"  workers: {workers}\n"
    path.write_text(text + check, encoding="utf-8")
    return load_config(path)


def one_case(n_models: int, executor: str, workers: int | None, chunk_size: int, weeks: int) -> dict:
    """Run one case in this interpreter; return its figures."""
    from drift.executor import run_chunks

    obs, text, as_of = make_scenario(n_models, weeks)
    with tempfile.TemporaryDirectory() as folder:
        cfg = _config(text, executor, chunk_size, workers, folder)
        rss_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        cpu0 = _cpu_seconds()
        t0 = time.perf_counter()
        payloads, errors = run_chunks(cfg, cfg.models, obs, as_of)
        seconds = time.perf_counter() - t0
        cpu = _cpu_seconds() - cpu0
    verdicts: dict[str, int] = {}
    for p in payloads:
        verdicts[p["verdict"]] = verdicts.get(p["verdict"], 0) + 1
    return {"models": n_models, "executor": executor, "workers": workers, "chunk_size": chunk_size,
            "weeks": weeks, "seconds": round(seconds, 2),
            "seconds_per_1000": round(seconds / n_models * 1000, 1),
            "cpu_seconds": round(cpu, 2), "cpu_per_1000": round(cpu / n_models * 1000, 1),
            "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
            "rss_before_mb": round(rss_before / 1024, 1),
            "worker_peak_rss_mb": round(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024, 1)
            if executor != "local" else None,
            "errors": len(errors), "verdicts": verdicts, "load_1min": round(os.getloadavg()[0], 1)}


def _cpu_seconds() -> float:
    """User + system CPU time of this process and of its finished children (pool workers)."""
    me = resource.getrusage(resource.RUSAGE_SELF)
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + ch.ru_utime + ch.ru_stime


def profile(n_models: int, weeks: int, top: int = 30) -> None:
    import cProfile
    import pstats

    from drift.check import analyse

    obs, text, as_of = make_scenario(n_models, weeks)
    with tempfile.TemporaryDirectory() as folder:
        cfg = _config(text, "local", 500, None, folder)
        prof = cProfile.Profile()
        prof.enable()
        analyse(cfg, cfg.models, obs, as_of)
        prof.disable()
    stats = pstats.Stats(prof).sort_stats("cumulative")
    stats.print_stats(top)
    stats.sort_stats("tottime").print_stats(top)


def _markdown(rows: list[dict], command: str) -> str:
    lines = [
        "",
        "## Whole check (`analyse`) per executor — bench_check.py",
        "",
        f"Command: `{command}`",
        "",
        (f"Machine: {platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
        f"{time.strftime('%Y-%m-%d')}. Invented weekly models, {rows[0]['weeks']} weeks "
        f"({rows[0]['weeks'] - N_MON} reference + {N_MON} monitored), 2 lagged drivers, Fourier season."),
        ("Peak RSS from `getrusage` in a fresh interpreter per case (parent; for the process executor also the "
        "largest worker). CPU s = user + system of the parent and its workers; on a shared machine it is the "
        "steadier figure (the 1-minute load average at the end of each case is in the last column)."),
        "",
        ("| models | executor | workers | chunk size | wall s | wall s / 1,000 models | CPU s / 1,000 models "
        "| peak RSS parent (MB) | peak RSS worker (MB) | errors | verdicts | load |"),
        "|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---|---:|",
    ]
    for r in rows:
        lines.append(f"| {r['models']} | {r['executor']} | {r['workers'] or '-'} | {r['chunk_size']} | "
                     f"{r['seconds']} | {r['seconds_per_1000']} | {r['cpu_per_1000']} | {r['peak_rss_mb']} | "
                     f"{r['worker_peak_rss_mb'] or '-'} | {r['errors']} | "
                     + ", ".join(f"{k} {v}" for k, v in sorted(r["verdicts"].items()))
                     + f" | {r['load_1min']} |")
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=int, nargs="+", default=[200, 1000])
    ap.add_argument("--executors", nargs="+", default=["local", "process"], choices=["local", "process", "dask"])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--chunk-size", type=int, nargs="+", default=[500])
    ap.add_argument("--weeks", type=int, default=260)
    ap.add_argument("--profile", type=int, default=None, metavar="N")
    ap.add_argument("--append-readme", action="store_true", help=f"append the table to {README}")
    ap.add_argument("--one", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.profile:
        profile(args.profile, args.weeks)
        return
    if args.one:
        ex = args.executors[0]
        print(json.dumps(one_case(args.models[0], ex, None if ex == "local" else args.workers,
                                  args.chunk_size[0], args.weeks)))
        return
    rows = []
    cases = [(n, ex, c) for n in args.models for c in args.chunk_size for ex in args.executors]
    for n, ex, chunk in cases:
        cmd = [sys.executable, __file__, "--one", "--models", str(n), "--executors", ex,
               "--workers", str(args.workers), "--chunk-size", str(chunk), "--weeks", str(args.weeks)]
        out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
        row = json.loads(out.strip().splitlines()[-1])
        rows.append(row)
        print(f"{n:>6} models  {ex:<8} chunk {chunk:<5} {row['seconds']:>8.2f} s  "
              f"{row['seconds_per_1000']:>8.1f} s/1000  cpu {row['cpu_per_1000']:>8.1f} s/1000  "
              f"peak {row['peak_rss_mb']:.0f} MB  worker {row['worker_peak_rss_mb'] or '-'} MB  "
              f"errors {row['errors']}  {row['verdicts']}", flush=True)
    if args.append_readme:
        command = "python benchmarks/bench_check.py " + " ".join(a for a in (argv or sys.argv[1:]))
        with README.open("a", encoding="utf-8") as fh:
            fh.write(_markdown(rows, command.strip()))


if __name__ == "__main__":
    main()
