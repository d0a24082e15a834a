"""drift against an existing Dask cluster: `drift check` with ``check.executor: {kind: dask, address: ...}``.

A ``dask scheduler`` and two ``dask worker`` processes (one thread each) are started on 127.0.0.1 with the
``dask`` command-line programs, the scheduler choosing its own free port (it writes its address to a
scheduler file). The workers run with a guard that refuses and records any SQLite connection, so the test
shows that they only compute while the coordinator (the `drift check` process) alone reads and writes the
store. The check through the cluster, configured either way (the mapping or ``dask_scheduler``), gives the
JSON and the stored verdicts and payloads of the local executor. Invented scenario: the models of
``tests/test_executor.py`` (every second model's first-driver coefficient falls from 2.0 to 0.8). Oracle:
the local executor (common practice, no source). A scheduler that does not answer, or answers without
workers, is an error naming the configuration key, not a hang.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest
import sqlalchemy as sa

from drift import executor
from drift.check import analyse
from drift.config import Config
from drift.exceptions import ClusterError
from drift.executor import run_chunks
from tests.test_executor import N_REF, START, as_of, make_obs

N_MODELS = 6
ROOT = Path(__file__).resolve().parents[1]

# imported first by every Python process of the workers (their PYTHONPATH starts with its folder)
GUARD = """\
import os
import sqlite3
import sqlite3.dbapi2


def _refuse(*args, **kwargs):
    with open(os.environ["DRIFT_TEST_DB_MARK"], "a", encoding="utf-8") as f:
        f.write(f"pid {os.getpid()} opened {args[:1]!r}\\n")
    raise sqlite3.OperationalError("a Dask worker must not open a database")


sqlite3.connect = sqlite3.dbapi2.connect = _refuse
"""


class Cluster:
    def __init__(self, address: str, mark: Path, procs: list[subprocess.Popen[bytes]]) -> None:
        self.address, self.mark, self.procs = address, mark, procs


@pytest.fixture(scope="module")
def cluster(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cluster]:
    if shutil.which("dask") is None:
        pytest.skip("the dask command-line program is not installed")
    pytest.importorskip("distributed")
    from distributed import Client

    d = tmp_path_factory.mktemp("dask")
    (d / "guard").mkdir()
    (d / "guard" / "sitecustomize.py").write_text(GUARD, encoding="utf-8")
    mark = d / "db-opened.txt"
    env = {**os.environ, "DRIFT_TEST_DB_MARK": str(mark),
           "PYTHONPATH": os.pathsep.join(p for p in (str(d / "guard"), str(ROOT), os.environ.get("PYTHONPATH"))
                                         if p)}
    sfile = d / "scheduler.json"
    logs = [open(d / f"{name}.log", "wb") for name in ("scheduler", "w0", "w1")]  # noqa: SIM115 - closed below
    procs = [subprocess.Popen(["dask", "scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
                               "--scheduler-file", str(sfile)], env=env, stdout=logs[0], stderr=subprocess.STDOUT)]
    try:
        deadline = time.monotonic() + 60
        while not sfile.exists():
            assert procs[0].poll() is None, (d / "scheduler.log").read_text()
            assert time.monotonic() < deadline, "the scheduler wrote no scheduler file within 60 s"
            time.sleep(0.2)
        address = json.loads(sfile.read_text())["address"]
        assert address.startswith("tcp://127.0.0.1:")
        for i in range(2):
            procs.append(subprocess.Popen(
                ["dask", "worker", "--scheduler-file", str(sfile), "--host", "127.0.0.1", "--nthreads", "1",
                 "--no-dashboard", "--name", f"w{i}", "--local-directory", str(d / f"w{i}")],
                env=env, stdout=logs[i + 1], stderr=subprocess.STDOUT))
        with Client(address, timeout=60) as client:
            client.wait_for_workers(2, timeout=120)
        yield Cluster(address, mark, procs)
        # clean shutdown: the scheduler tells its workers to close, and every process ends by itself
        with Client(address, timeout=60) as client:
            client.shutdown()
        for p in procs:
            p.wait(timeout=60)
        assert [p.poll() for p in procs] == [0, 0, 0], "the cluster did not end cleanly"
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.wait()
        for f in logs:
            f.close()


@pytest.fixture(scope="module")
def project(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """A wide CSV of the scenario's series, ingested once into ``ingested.db`` (copied for each check)."""
    d = tmp_path_factory.mktemp("project")
    obs = make_obs(N_MODELS)
    wide = obs.pivot(index="period", columns="series", values="value")
    wide.index = wide.index.strftime("%Y-%m-%d")
    (d / "data").mkdir()
    wide.rename_axis("week").to_csv(d / "data" / "feed.csv")
    write_project_config(d, "ingested.db", "  executor: local\n")
    r = drift("ingest", "--config", "drift-ingested.db.yaml", cwd=d)
    assert r.returncode == 0, r.stderr
    return d, as_of().date().isoformat()


def write_project_config(d: Path, store: str, check: str) -> Path:
    ref_end = (START + pd.Timedelta(weeks=N_REF - 1)).date()
    models = "".join(f"""\
  - name: m{i}
    target: y{i}
    frequency: W
    drivers:
      - {{series: a{i}, lag: 1}}
      - {{series: b{i}, lag: 1}}
    reference: {{start: {START.date()}, end: {ref_end}}}
""" for i in range(N_MODELS))
    path = d / f"drift-{store}.yaml"
    path.write_text(f"store: sqlite:///{store}\nsources:\n  - {{name: feed, kind: csv, path: data/feed.csv, "
                    f"period_column: week}}\nmodels:\n{models}check:\n  chunk_size: 1\n{check}", encoding="utf-8")
    return path


def drift(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in (str(ROOT), os.environ.get("PYTHONPATH")) if p)}
    return subprocess.run([sys.executable, "-m", "drift.cli", *args], capture_output=True, text=True, cwd=cwd,
                          env=env, timeout=600, check=False)


def check(d: Path, day: str, store: str, check_yaml: str) -> tuple[dict, list[tuple[str, str, str]], str]:
    """`drift check --json` on a copy of the ingested store; its JSON, stored verdicts and stderr."""
    shutil.copy(d / "ingested.db", d / store)
    write_project_config(d, store, check_yaml)
    r = drift("--log-level", "info", "check", "--config", f"drift-{store}.yaml", "--as-of", day, "--json",
              "--no-deliver", cwd=d)
    assert r.returncode == 0, r.stderr
    eng = sa.create_engine(f"sqlite:///{d / store}")
    with eng.connect() as conn:
        rows = [tuple(r) for r in conn.execute(sa.text("select model, verdict, payload, charts from verdicts order by id"))]
    eng.dispose()
    return json.loads(r.stdout), rows, r.stderr


@pytest.mark.slow
def test_existing_cluster_gives_the_local_verdicts_and_workers_never_open_the_store(
        cluster: Cluster, project: tuple[Path, str]) -> None:
    from distributed import Client

    d, day = project
    local, local_rows, _ = check(d, day, "local.db", "  executor: local\n")
    assert local["failed"] == 0 and len(local_rows) == N_MODELS
    assert {m["verdict"] for m in local["models"]} >= {"keep", "refit"}  # both kinds of model are there
    with Client(cluster.address, timeout=60) as client:
        before = client.run(lambda dask_worker: dask_worker.state.executed_count)
        guarded = client.run(lambda: __import__("sqlite3").connect.__name__)
    assert sorted(guarded.values()) == ["_refuse", "_refuse"]  # the guard is in force in both workers
    for store, yaml in (("mapping.db", f"  executor: {{kind: dask, address: '{cluster.address}'}}\n"),
                        ("synonym.db", f"  executor: dask\n  dask_scheduler: {cluster.address}\n")):
        got, rows, err = check(d, day, store, yaml)
        assert f"Dask scheduler {cluster.address}: 2 worker(s)" in err, err  # the cluster, not a LocalCluster
        assert got == local, store
        assert rows == local_rows, store  # the same verdicts and payloads (charts included), in the same order
    with Client(cluster.address, timeout=60) as client:
        after = client.run(lambda dask_worker: dask_worker.state.executed_count)
    ran = {w: after[w] - before.get(w, 0) for w in after}
    assert len(ran) == 2 and sum(ran.values()) >= 2 * N_MODELS and all(n > 0 for n in ran.values()), ran
    assert not cluster.mark.exists(), cluster.mark.read_text()  # no worker process tried to open a database


def with_address(address: str) -> Config:
    cfg = Config.model_validate({"models": [{"name": "m0", "target": "y0", "frequency": "W",
                                             "drivers": [{"series": "a0", "lag": 1}],
                                             "reference": {"start": "2021-01-04", "end": "2023-12-25"}}]})
    chk = cfg.check.model_validate({**cfg.check.model_dump(), "executor": {"kind": "dask", "address": address}})
    return cfg.model_copy(update={"check": chk})


def test_a_scheduler_that_does_not_answer_is_named() -> None:
    pytest.importorskip("distributed")
    import dask

    with socket.socket() as sock:  # a port nobody listens on once closed
        sock.bind(("127.0.0.1", 0))
        address = f"tcp://127.0.0.1:{sock.getsockname()[1]}"
    cfg = with_address(address)
    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}), \
            pytest.raises(ClusterError, match=rf"check.executor.address.*{address}.*dask scheduler"):
        run_chunks(cfg, cfg.models, make_obs(1), as_of(), func=analyse)


def test_a_scheduler_without_workers_is_an_error_not_a_hang(monkeypatch: pytest.MonkeyPatch) -> None:
    pytest.importorskip("distributed")
    from distributed import LocalCluster

    monkeypatch.setattr(executor, "WORKER_WAIT_SECONDS", 1)
    with LocalCluster(n_workers=0, processes=False, dashboard_address=":0") as lc:
        cfg = with_address(lc.scheduler_address)
        with pytest.raises(ClusterError, match=r"no worker.*dask worker"):
            run_chunks(cfg, cfg.models, make_obs(1), as_of(), func=analyse)


def _slow_chunk(cfg, models, obs, as_of_):  # a chunk function for the next test
    time.sleep(0.4)
    return [{"name": m.name, "verdict": "keep"} for m in models], {}


def test_workers_that_all_leave_mid_check_fail_their_chunks_not_hang(monkeypatch: pytest.MonkeyPatch) -> None:
    """Every worker of the cluster leaves during the check and none comes back: the chunks not computed fail
    with a ClusterError naming the key (their models get error entries), not a bare "cancelled: lost
    dependencies" and never a wait for ever; what was computed before is kept."""
    pytest.importorskip("distributed")
    from distributed import LocalCluster

    from drift.config import ModelConfig

    monkeypatch.setattr(executor, "WORKER_WAIT_SECONDS", 1)
    monkeypatch.setattr(executor, "RESULT_POLL_SECONDS", 0.2)
    models = [ModelConfig.model_validate({"name": f"m{i}", "target": f"y{i}", "frequency": "W",
                                          "drivers": [{"series": f"a{i}", "lag": 1}],
                                          "reference": {"start": "2021-01-04", "end": "2023-12-25"}})
              for i in range(8)]
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=False, dashboard_address=":0") as lc:
        cfg = Config.model_validate({"models": [m.model_dump() for m in models]})
        chk = cfg.check.model_validate({**cfg.check.model_dump(), "chunk_size": 1,
                                        "executor": {"kind": "dask", "address": lc.scheduler_address}})
        cfg = cfg.model_copy(update={"check": chk})
        seen: list[int] = []

        def done(n: int) -> None:
            seen.append(n)
            if len(seen) == 1:  # after the first chunk, every worker leaves
                lc.scale(0)

        t0 = time.monotonic()
        payloads, errors = run_chunks(cfg, cfg.models, make_obs(8), as_of(), func=_slow_chunk, on_done=done)
        took = time.monotonic() - t0
    assert took < 60, took
    assert payloads and payloads[0]["name"] == "m0"  # computed before the workers left: kept
    assert errors, "the chunks after the workers left must fail"
    assert len(payloads) + len(errors) == 8
    assert all("ClusterError" in r and "check.executor.address" in r and "during the check" in r
               for r in errors.values()), errors


def test_a_chunk_waiting_on_a_cluster_without_workers_fails_after_the_wait(monkeypatch: pytest.MonkeyPatch) -> None:
    """The other way a cluster can lose a check: a task with nothing lost waits for a worker for ever. The
    watch counts the workers between waits; none for WORKER_WAIT_SECONDS fails the chunk, and every later
    chunk at once; while workers are there it keeps waiting (a fake future and client)."""
    monkeypatch.setattr(executor, "WORKER_WAIT_SECONDS", 0.3)
    monkeypatch.setattr(executor, "RESULT_POLL_SECONDS", 0.05)

    class Future:
        def __init__(self, ready_after: int | None) -> None:
            self.calls, self.ready_after, self.cancelled = 0, ready_after, False

        def result(self, timeout: float) -> tuple[list, dict]:
            self.calls += 1
            if self.ready_after is not None and self.calls > self.ready_after:
                return [{"name": "m0"}], {}
            time.sleep(timeout)
            raise TimeoutError

        def cancel(self) -> None:
            self.cancelled = True

    class Client:
        def __init__(self) -> None:
            self.workers: dict = {"w1": {}}

        def scheduler_info(self) -> dict:
            return {"workers": self.workers}

    client = Client()
    watch = executor._ClusterWatch(client, "tcp://127.0.0.1:1")
    assert watch.result(Future(ready_after=5)) == ([{"name": "m0"}], {})  # slow but the workers are there
    client.workers = {}
    t0 = time.monotonic()
    stuck = Future(ready_after=None)
    with pytest.raises(ClusterError, match=r"check.executor.address.*every worker.*left during the check"):
        watch.result(stuck)
    assert 0.3 <= time.monotonic() - t0 < 5 and stuck.cancelled
    later = Future(ready_after=None)
    t0 = time.monotonic()
    with pytest.raises(ClusterError, match="left during the check"):
        watch.result(later)
    assert time.monotonic() - t0 < 0.05 and later.cancelled and later.calls == 0
