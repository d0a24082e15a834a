"""Scale benchmark: ingest, re-ingest, the daily append and the whole check at 1,000 / 10,000 models.

    PYTHONPATH=$PWD python benchmarks/bench_scale.py --models 1000
    PYTHONPATH=$PWD python benchmarks/bench_scale.py --models 10000 --stages ingest reingest append check \\
        --backends sqlite --layouts wide --executors local --timeout 900
    PYTHONPATH=$PWD python benchmarks/bench_scale.py --models 1000 --profile      # cProfile of one check

Invented scenario (seed 20261203): ``--models`` weekly models, each a target and two AR(1) drivers at lag 1,
260 weeks from 2021-01-04 (208 reference + 52 monitored), level, trend and an annual cycle in the target;
one model in ten has its first driver's coefficient fall from 2.0 to 0.8 half-way through the monitored
year. Files: one wide CSV (a ``week`` column, one column per series) and one long CSV (series, week, value)
of the 260 weeks, plus the next week alone as a second file of each layout (the daily case: the feed
drops one new file beside the old ones).

Stages, each in a fresh interpreter so that its peak memory is its own (RSS of the stage process from
``getrusage``, and of the whole process tree sampled by psutil every 0.1 s; CPU = user + system of the
process and its finished children):

``ingest``   first ingest of the 260-week file into a fresh store (SQLite file; PostgreSQL: a schema of
             our own, ``scale_<random>``, dropped at the end), wide and long;
``reingest`` the same files again, unchanged (the daemon's every run);
``append``   the one-week file added beside the first one, ingested (the daily case);
``check``    ``run_check`` on the wide SQLite store as of the day after the appended week, with each
             executor (``local``, ``process`` with 2 workers, ``dask`` on a LocalCluster of 2 workers,
             ``dask-cluster``: an existing cluster by address, a ``dask scheduler`` and two ``dask worker``
             processes of one thread started on 127.0.0.1 before the stage, their CPU and peak memory
             reported beside it);
``engine``   ``drift.engine.recursive_fit`` and ``recursive_residuals`` on the models' designs
             (M x 260 x 4: intercept, trend, two lagged drivers);
``yardstick`` a per-model loop of statsmodels ``RecursiveLS`` (fit) over ``--sample`` models, scaled to M.

Each stage prints one row (wall s, CPU s, peak RSS of the stage process and of the process tree, load
average); ``--timeout`` stops a stage that runs longer (reported as ``> timeout``). Stage times include
loading the configuration and opening the store, as the CLI and the daemon do (the row says how much of it
was the configuration). A script, not a test: timings depend on the machine.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from datetime import date, timedelta
from pathlib import Path

import numpy as np

SEED = 20261203
START = np.datetime64("2021-01-04")
WEEKS = 260
N_REF = 208
PG_URL = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
STAGES = ("ingest", "reingest", "append", "check", "engine", "yardstick")


# ------------------------------------------------------------------------------------------------ scenario
def simulate(models: int, weeks: int = WEEKS + 1, seed: int = SEED) -> tuple[np.ndarray, np.ndarray]:
    """(values (models, 3, weeks): target, driver 1, driver 2; changed (models,) bool)."""
    rng = np.random.default_rng(seed)
    e = rng.normal(size=(models, weeks, 2))
    x = np.zeros_like(e)
    for s in range(1, weeks):  # AR(1) drivers, vectorised over models
        x[:, s] = 0.6 * x[:, s - 1] + e[:, s]
    changed = (np.arange(models) % 10) == 0
    b1 = np.full((models, weeks), 2.0)
    b1[changed, N_REF + 26:] = 0.8
    xl = np.concatenate([np.zeros((models, 1, 2)), x[:, :-1]], axis=1)
    t = np.arange(weeks, dtype=float)
    y = (50.0 + 0.02 * t + 3.0 * np.sin(2 * np.pi * t / 52.18) + b1 * xl[:, :, 0] + xl[:, :, 1]
         + rng.normal(scale=0.7, size=(models, weeks)))
    return np.round(np.stack([y, x[:, :, 0], x[:, :, 1]], axis=1), 4), changed


def series_names(models: int) -> list[str]:
    return [f"m{i:05d}_{s}" for i in range(models) for s in ("y", "x1", "x2")]


def write_files(folder: Path, models: int) -> None:
    """wide/, long/ (the 260 weeks) and daily/ (week 261 alone, wide and long) under ``folder``."""
    import pyarrow as pa
    import pyarrow.csv as pacsv

    values, _ = simulate(models)
    names = series_names(models)
    flat = values.reshape(3 * models, -1)  # (series, week)
    weeks = (START + 7 * np.arange(WEEKS + 1)).astype(str)
    for sub in ("wide", "long", "daily"):
        (folder / sub).mkdir(parents=True, exist_ok=True)

    def wide(sl: slice, path: Path) -> None:
        cols = {"week": pa.array(weeks[sl])}
        cols.update({n: pa.array(flat[j, sl]) for j, n in enumerate(names)})
        pacsv.write_csv(pa.table(cols), path)

    def long(sl: slice, path: Path) -> None:
        w = weeks[sl]
        tab = pa.table({"series": pa.array(np.repeat(np.array(names, dtype=object), len(w))),
                        "week": pa.array(np.tile(w, len(names))), "value": pa.array(flat[:, sl].reshape(-1))})
        pacsv.write_csv(tab, path)

    wide(slice(0, WEEKS), folder / "wide" / "wide-0000.csv")
    wide(slice(WEEKS, WEEKS + 1), folder / "daily" / "wide-0001.csv")
    long(slice(0, WEEKS), folder / "long" / "long-0000.csv")
    long(slice(WEEKS, WEEKS + 1), folder / "daily" / "long-0001.csv")


def write_config(folder: Path, models: int, layout: str, store_url: str, executor: str = "local",
                 address: str | None = None) -> Path:
    ref_end = str(START + 7 * (N_REF - 1))
    if layout == "wide":
        src = "  - {name: feed, kind: csv, path: 'wide/wide-*.csv', period_column: week}\n"
    else:
        src = ("  - {name: feed, kind: csv, path: 'long/long-*.csv', period_column: week, series_column: series, "
               "value_column: value}\n")
    ex = {"local": "executor: local", "process": "executor: process\n  workers: 2",
          "dask": "executor: dask\n  workers: 2",
          "dask-cluster": f"executor: {{kind: dask, address: '{address}'}}"}[executor]
    text = [f"store: '{store_url}'\n", "sources:\n", src, f"check:\n  {ex}\n  chunk_size: 500\n", "models:\n"]
    text += [f"  - name: m{i:05d}\n    target: m{i:05d}_y\n    frequency: W\n    drivers:\n"
             f"      - {{series: m{i:05d}_x1, lag: 1}}\n      - {{series: m{i:05d}_x2, lag: 1}}\n"
             f"    reference: {{start: {START}, end: {ref_end}}}\n" for i in range(models)]
    path = folder / f"drift-{layout}-{executor}.yaml"
    path.write_text("".join(text), encoding="utf-8")
    return path


def check_day() -> date:
    """The day after the appended week ends (its values are available by then)."""
    last = START + 7 * WEEKS
    return date.fromisoformat(str(last)) + timedelta(days=8)


# ------------------------------------------------------------------------------------------------ measuring
class TreePeak:
    """Peak RSS of this process (or of the processes ``pids``) and all their descendants, sampled by psutil in
    a thread."""

    def __init__(self, every: float = 0.1, pids: list[int] | None = None) -> None:
        self.peak = 0
        self._pids = pids
        self._every = every
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        import psutil

        roots = [psutil.Process(p) for p in self._pids] if self._pids else [psutil.Process()]
        while not self._stop.is_set():
            total = 0
            procs = []
            for me in roots:
                try:
                    procs += [me, *me.children(recursive=True)]
                except psutil.Error:
                    procs.append(me)
            for p in procs:
                try:
                    total += p.memory_info().rss
                except psutil.Error:
                    pass
            self.peak = max(self.peak, total)
            self._stop.wait(self._every)

    def __enter__(self) -> TreePeak:  # noqa: PYI034
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()


def _cpu() -> float:
    me = resource.getrusage(resource.RUSAGE_SELF)
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + ch.ru_utime + ch.ru_stime


def _store_url(backend: str, folder: Path, layout: str) -> str:
    if backend == "sqlite":
        return f"sqlite:///{folder / f'store-{layout}.db'}"
    schema = (folder / f"pg-schema-{layout}").read_text().strip()
    return f"{PG_URL}?options=-csearch_path%3D{schema}"


def run_stage(args: argparse.Namespace) -> dict:
    """One stage in this interpreter (called by the parent with --stage)."""
    folder = Path(args.dir)
    t_import = time.perf_counter()
    from drift.config import load_config
    from drift.pipeline import run_check, run_ingest
    from drift.store import open_store

    out: dict = {"import_s": round(time.perf_counter() - t_import, 2)}
    stage = args.stage
    with TreePeak() as tree:
        cpu0, t0 = _cpu(), time.perf_counter()
        if stage in ("ingest", "reingest", "append"):
            url = _store_url(args.backend, folder, args.layout)
            if stage == "append":
                name = f"{args.layout}-0001.csv"
                shutil.copy(folder / "daily" / name, folder / args.layout / name)
            path = write_config(folder, args.models, args.layout, url)
            tc = time.perf_counter()
            cfg = load_config(path)
            out["config_s"] = round(time.perf_counter() - tc, 2)
            store = open_store(cfg.store_url())
            summaries = run_ingest(cfg, store, progress=False)
            store.dispose()
            s = summaries[0]
            out["result"] = f"{s.stored} new, {s.known} known, {s.skipped} skipped"
        elif stage == "check":
            url = _store_url("sqlite", folder, "wide")
            path = write_config(folder, args.models, "wide", url, args.executor, args.address)
            tc = time.perf_counter()
            cfg = load_config(path)
            out["config_s"] = round(time.perf_counter() - tc, 2)
            store = open_store(cfg.store_url())
            outcome = run_check(cfg, store, as_of=check_day())
            store.dispose()
            counts: dict[str, int] = {}
            for p in outcome.entries():
                counts[p["verdict"]] = counts.get(p["verdict"], 0) + 1
            out["result"] = ", ".join(f"{k} {v}" for k, v in sorted(counts.items()))
        elif stage == "engine":
            from drift import engine

            y, X = designs(args.models)
            ta = time.perf_counter()
            engine.recursive_fit(y, X)
            out["recursive_fit_s"] = round(time.perf_counter() - ta, 2)
            ta = time.perf_counter()
            engine.recursive_residuals(y, X)
            out["recursive_residuals_s"] = round(time.perf_counter() - ta, 2)
            out["result"] = (f"recursive_fit {out['recursive_fit_s']} s, recursive_residuals "
                             f"{out['recursive_residuals_s']} s on {y.shape[0]} x {y.shape[1]} x {X.shape[2]}")
        elif stage == "yardstick":
            out.update(yardstick(args.models, args.sample))
            out["result"] = (f"statsmodels {out['statsmodels']} RecursiveLS: {out['per_model_ms']} ms wall, "
                             f"{out['per_model_cpu_ms']} ms CPU per model over {args.sample} models; scaled "
                             f"to {args.models:,}: {out['scaled_s']} s wall, {out['scaled_cpu_s']} s CPU")
        else:
            raise SystemExit(f"unknown stage {stage}")
        out["wall_s"] = round(time.perf_counter() - t0, 2)
        out["cpu_s"] = round(_cpu() - cpu0, 2)
    out["peak_rss_mb"] = round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)
    out["tree_peak_mb"] = round(tree.peak / 2**20)  # sampled: may miss a peak shorter than 0.1 s
    return out


def designs(models: int) -> tuple[np.ndarray, np.ndarray]:
    """(y (M, 260), X (M, 260, 4)): intercept, trend, both drivers at lag 1."""
    values, _ = simulate(models)
    values = values[:, :, :WEEKS]
    y = values[:, 0, 1:]
    n = y.shape[1]
    X = np.empty((models, n, 4))
    X[:, :, 0] = 1.0
    X[:, :, 1] = np.arange(n) / n
    X[:, :, 2] = values[:, 1, :-1]
    X[:, :, 3] = values[:, 2, :-1]
    return y, X


def yardstick(models: int, sample: int) -> dict:
    """statsmodels RecursiveLS fit per model over ``sample`` models, scaled to ``models``."""
    import warnings

    import statsmodels
    from statsmodels.regression.recursive_ls import RecursiveLS

    y, X = designs(min(models, sample))
    RecursiveLS(y[0], X[0]).fit()  # warm-up (first-call imports and caches)
    t0, c0 = time.perf_counter(), time.process_time()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i in range(y.shape[0]):
            res = RecursiveLS(y[i], X[i]).fit()
            _ = res.resid_recursive
    per = (time.perf_counter() - t0) / y.shape[0]
    per_cpu = (time.process_time() - c0) / y.shape[0]
    return {"per_model_ms": round(per * 1000, 2), "scaled_s": round(per * models, 1),
            "per_model_cpu_ms": round(per_cpu * 1000, 2), "scaled_cpu_s": round(per_cpu * models, 1),
            "statsmodels": statsmodels.__version__}


# ------------------------------------------------------------------------------------------------ driving
def _child(args: argparse.Namespace, stage: str, **kw: str) -> dict:
    cmd = [sys.executable, __file__, "--stage", stage, "--dir", args.dir, "--models", str(args.models[0]),
           "--sample", str(args.sample)]
    for k, v in kw.items():
        cmd += [f"--{k}", v]
    t0 = time.perf_counter()
    try:
        done = subprocess.run(cmd, check=False, capture_output=True, text=True, timeout=args.timeout)
    except subprocess.TimeoutExpired:
        return {"wall_s": f"> {args.timeout}", "result": "stopped (timeout)", "load": _load()}
    if done.returncode != 0:
        tail = (done.stderr or done.stdout).strip().splitlines()[-3:]
        return {"wall_s": round(time.perf_counter() - t0, 1), "result": "FAILED: " + " | ".join(tail),
                "load": _load()}
    row = json.loads(done.stdout.strip().splitlines()[-1])
    row["load"] = _load()
    return row


class DaskCluster:
    """A ``dask scheduler`` and two one-thread ``dask worker`` processes on 127.0.0.1 (the scheduler picks
    its port and writes it to a scheduler file); shut down through the scheduler, killed if they linger."""

    def __init__(self, folder: Path, workers: int = 2) -> None:
        self.folder, self.workers = folder, workers
        self.procs: list[subprocess.Popen] = []
        self.address = ""

    def __enter__(self) -> DaskCluster:  # noqa: PYI034
        import psutil

        self.folder.mkdir(parents=True, exist_ok=True)
        sfile = self.folder / "scheduler.json"
        env = {**os.environ, "PYTHONPATH": os.pathsep.join(
            p for p in (str(Path(__file__).resolve().parents[1]), os.environ.get("PYTHONPATH")) if p)}
        quiet = {"stdout": subprocess.DEVNULL, "stderr": subprocess.DEVNULL, "env": env}
        self.procs.append(subprocess.Popen(["dask", "scheduler", "--host", "127.0.0.1", "--port", "0",
                                            "--no-dashboard", "--scheduler-file", str(sfile)], **quiet))
        t0 = time.monotonic()
        while not sfile.exists() and time.monotonic() - t0 < 60:
            time.sleep(0.2)
        self.address = json.loads(sfile.read_text())["address"]
        for i in range(self.workers):
            self.procs.append(subprocess.Popen(
                ["dask", "worker", "--scheduler-file", str(sfile), "--host", "127.0.0.1", "--nthreads", "1",
                 "--no-dashboard", "--name", f"w{i}", "--local-directory", str(self.folder / f"w{i}")], **quiet))
        from distributed import Client

        with Client(self.address, timeout=60) as client:
            client.wait_for_workers(self.workers, timeout=120)
        self._ps = [psutil.Process(p.pid) for p in self.procs]
        self._cpu0 = self._tree_cpu()
        return self

    def _tree_cpu(self) -> float:
        import psutil

        total = 0.0
        for proc in self._ps:
            try:
                for q in (proc, *proc.children(recursive=True)):
                    t = q.cpu_times()
                    total += t.user + t.system
            except psutil.Error:
                pass
        return total

    def cpu_s(self) -> float:
        return self._tree_cpu() - self._cpu0

    def __exit__(self, *exc: object) -> None:
        try:
            from distributed import Client

            with Client(self.address, timeout=30) as client:
                client.shutdown()
        except Exception:  # noqa: BLE001, S110 - the processes are killed below
            pass
        for p in self.procs:
            try:
                p.wait(timeout=30)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()


def _load() -> str:
    return "/".join(f"{x:.1f}" for x in os.getloadavg())


def _pg_schemas(folder: Path, layouts: list[str]) -> list[str]:
    import sqlalchemy as sa

    names = []
    eng = sa.create_engine(PG_URL)
    with eng.begin() as conn:
        for layout in layouts:
            schema = f"scale_{uuid.uuid4().hex[:10]}"
            conn.execute(sa.text(f'create schema "{schema}"'))
            (folder / f"pg-schema-{layout}").write_text(schema)
            names.append(schema)
    eng.dispose()
    return names


def _drop_schemas(names: list[str]) -> None:
    import sqlalchemy as sa

    eng = sa.create_engine(PG_URL)
    with eng.begin() as conn:
        for s in names:
            conn.execute(sa.text(f'drop schema if exists "{s}" cascade'))
    eng.dispose()


def drive(args: argparse.Namespace, models: int) -> list[tuple[str, dict]]:
    rows: list[tuple[str, dict]] = []

    def show(label: str, row: dict) -> None:
        rows.append((label, row))
        extra = f" (config {row['config_s']} s)" if "config_s" in row else ""
        print(f"| {models:,} | {label} | {row.get('wall_s')}{extra} | {row.get('cpu_s', '-')} | "
              f"{row.get('peak_rss_mb', '-')} | {row.get('tree_peak_mb', '-')} | {row.get('result', '')} | "
              f"{row['load']} |", flush=True)

    with tempfile.TemporaryDirectory(prefix="bench-scale-") as d:
        args.dir = d
        args.models = [models]
        folder = Path(d)
        t0 = time.perf_counter()
        # in a child: a stage's ru_maxrss starts from its parent's high-water mark (inherited through fork),
        # so the driver must stay small
        subprocess.run([sys.executable, __file__, "--stage", "write", "--dir", d, "--models", str(models)],
                       check=True)
        print(f"\n{models:,} models: files written in {time.perf_counter() - t0:.1f} s "
              f"(wide {(folder / 'wide' / 'wide-0000.csv').stat().st_size / 1e6:.1f} MB, long "
              f"{(folder / 'long' / 'long-0000.csv').stat().st_size / 1e6:.1f} MB); load {_load()}", flush=True)
        print("| models | stage | wall s | CPU s | peak RSS MB | process tree peak MB | result | load 1/5/15 |")
        print("|---:|---|---:|---:|---:|---:|---|---|")
        schemas = _pg_schemas(folder, args.layouts) if "postgres" in args.backends else []
        try:
            for backend in args.backends:
                for layout in args.layouts:
                    for stage in ("ingest", "reingest", "append"):
                        if stage in args.stages:
                            show(f"{stage}, {layout}, {backend}",
                                 _child(args, stage, backend=backend, layout=layout))
                    extra = folder / layout / f"{layout}-0001.csv"
                    if extra.exists():
                        extra.unlink()  # the next backend starts from the 260-week file again
            if "check" in args.stages:
                if not (folder / "store-wide.db").exists():
                    _child(args, "ingest", backend="sqlite", layout="wide")
                if not (folder / "wide" / "wide-0001.csv").exists():
                    _child(args, "append", backend="sqlite", layout="wide")
                for ex in args.executors:
                    if ex == "dask-cluster":
                        with DaskCluster(folder / "dask") as cluster, \
                                TreePeak(pids=[p.pid for p in cluster.procs]) as peak:
                            row = _child(args, "check", executor=ex, address=cluster.address)
                            row["result"] = (f"{row.get('result', '')}; scheduler and workers (outside the "
                                             f"tree): {cluster.cpu_s():.1f} s CPU, peak {peak.peak / 2**20:,.0f} MB")
                        show("check, dask by address (2 workers)", row)
                        continue
                    show(f"check, {ex}" + (" (2 workers)" if ex != "local" else ""),
                         _child(args, "check", executor=ex))
            for stage in ("engine", "yardstick"):
                if stage in args.stages:
                    show(stage, _child(args, stage))
        finally:
            if schemas:
                _drop_schemas(schemas)
    return rows


def profile(models: int, top: int) -> None:
    """cProfile of one local check of ``models`` models (store built first, not profiled)."""
    import cProfile
    import pstats

    from drift.config import load_config
    from drift.pipeline import run_check, run_ingest
    from drift.store import open_store

    with tempfile.TemporaryDirectory(prefix="bench-scale-") as d:
        folder = Path(d)
        write_files(folder, models)
        shutil.copy(folder / "daily" / "wide-0001.csv", folder / "wide" / "wide-0001.csv")
        cfg = load_config(write_config(folder, models, "wide", f"sqlite:///{folder / 'store-wide.db'}"))
        store = open_store(cfg.store_url())
        run_ingest(cfg, store, progress=False)
        prof = cProfile.Profile()
        t0 = time.perf_counter()
        prof.enable()
        run_check(cfg, store, as_of=check_day())
        prof.disable()
        wall = time.perf_counter() - t0
    st = pstats.Stats(prof)
    total = max(v[3] for v in st.stats.values())  # cumulative time of the outermost call
    print(f"\ncProfile of run_check, {models} models, local executor: {wall:.1f} s wall under the profiler; "
          f"load {_load()}")
    for key, title, idx in (("cumulative", "cumulative", 3), ("tottime", "own time", 2)):
        print(f"\n| function ({title}) | calls | {title} s | share |\n|---|---:|---:|---:|")
        items = sorted(st.stats.items(), key=lambda kv: kv[1][idx], reverse=True)[:top]
        for (file, line, fn), (cc, nc, tt, ct, _callers) in items:
            where = file.split("site-packages/")[-1].split("/drift/")[-1] if "/" in file else file
            t = ct if idx == 3 else tt
            print(f"| `{where}:{line} {fn}` | {nc} | {t:.2f} | {t / total:.0%} |")


def breakdown(models: int, keep: str | None = None) -> None:
    """Wall time of each stage of one local check (no profiler): where the time goes, in seconds.

    ``keep``: a folder to build the store in once and reuse on later runs (quicker iterations)."""
    import drift.check as chk
    from drift.config import load_config
    from drift.pipeline import run_check, run_ingest
    from drift.store import Store, open_store

    spent: dict[str, float] = {}
    calls: dict[str, int] = {}

    def timed(name: str, fn):
        def wrapper(*a, **kw):
            t0 = time.perf_counter()
            try:
                return fn(*a, **kw)
            finally:
                spent[name] = spent.get(name, 0.0) + time.perf_counter() - t0
                calls[name] = calls.get(name, 0) + 1
        return wrapper

    stages = ["_prepare", "_screen", "_logged_forecasts", "_worth_batched", "_deployed_replay", "_freshness",
              "_drivers_and_worth", "_lag_profiles_batched", "_lag_drift", "_payload", "_alerts_and_delivery"]
    with tempfile.TemporaryDirectory(prefix="bench-scale-") as d:
        folder = Path(keep) if keep else Path(d)
        folder.mkdir(parents=True, exist_ok=True)
        db = folder / "store-wide.db"
        fresh = not db.exists()
        if fresh:
            write_files(folder, models)
            shutil.copy(folder / "daily" / "wide-0001.csv", folder / "wide" / "wide-0001.csv")
        cfg = load_config(write_config(folder, models, "wide", f"sqlite:///{db}"))
        store = open_store(cfg.store_url())
        if fresh:
            run_ingest(cfg, store, progress=False)
        for name in stages:
            setattr(chk, name, timed(name, getattr(chk, name)))
        for name in ("load_observations", "save_verdicts"):
            setattr(Store, name, timed(name, getattr(Store, name)))
        t0 = time.perf_counter()
        c0 = _cpu()
        run_check(cfg, store, as_of=check_day())
        wall, cpu = time.perf_counter() - t0, _cpu() - c0
    print(f"\nstages of one local check, {models} models: {wall:.1f} s wall, {cpu:.1f} s CPU "
          f"({wall / models * 1000:.1f} ms per model); load {_load()}")
    print("\n| stage | calls | wall s | share |\n|---|---:|---:|---:|")
    for name in ("load_observations", *stages, "save_verdicts"):
        if name in spent:
            print(f"| {name} | {calls[name]} | {spent[name]:.2f} | {spent[name] / wall:.0%} |")
    rest = wall - sum(v for k, v in spent.items())
    print(f"| rest (run_check around the stages) | | {rest:.2f} | {rest / wall:.0%} |")


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=int, nargs="+", default=[1000])
    ap.add_argument("--stages", nargs="+", default=list(STAGES), choices=STAGES)
    ap.add_argument("--backends", nargs="+", default=["sqlite", "postgres"], choices=["sqlite", "postgres"])
    ap.add_argument("--layouts", nargs="+", default=["wide", "long"], choices=["wide", "long"])
    ap.add_argument("--executors", nargs="+", default=["local", "process", "dask", "dask-cluster"],
                    choices=["local", "process", "dask", "dask-cluster"])
    ap.add_argument("--sample", type=int, default=100, help="models in the RecursiveLS yardstick loop")
    ap.add_argument("--timeout", type=float, default=1200, help="seconds before a stage is stopped")
    ap.add_argument("--profile", action="store_true", help="cProfile one local check instead")
    ap.add_argument("--top", type=int, default=25)
    ap.add_argument("--breakdown", action="store_true", help="wall time per stage of one local check instead")
    ap.add_argument("--keep", help="with --breakdown: build the store in this folder once and reuse it")
    # internal: one stage in a child interpreter
    ap.add_argument("--stage", help=argparse.SUPPRESS)
    ap.add_argument("--dir", help=argparse.SUPPRESS)
    ap.add_argument("--backend", default="sqlite", help=argparse.SUPPRESS)
    ap.add_argument("--layout", default="wide", help=argparse.SUPPRESS)
    ap.add_argument("--executor", default="local", help=argparse.SUPPRESS)
    ap.add_argument("--address", default=None, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.stage == "write":
        write_files(Path(args.dir), args.models[0])
        return
    if args.stage:
        args.models = args.models[0]
        print(json.dumps(run_stage(args)))
        return
    if args.profile:
        profile(args.models[0], args.top)
        return
    if args.breakdown:
        breakdown(args.models[0], args.keep)
        return
    print(f"machine: {platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
          f"{time.strftime('%Y-%m-%d %H:%M')}; load {_load()}")
    for m in args.models:
        drive(args, m)


if __name__ == "__main__":
    main()
