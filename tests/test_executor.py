"""drift.executor: local, process-pool and Dask executors give the same payloads; failing chunks are isolated.

The scenario is invented (seeded numpy): weekly models, three years of reference and one year of
monitoring, two AR(1) drivers at lag 1 each; every second model's first-driver coefficient falls from
2.0 to 0.8 twenty weeks into the monitoring year. Oracle: :func:`drift.check.analyse` called once on all
models in-process (common practice, no source).
"""

from __future__ import annotations

import json
import logging
from collections.abc import Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from drift.check import analyse
from drift.config import Config, ModelConfig, load_config
from drift.executor import chunk_models, chunk_observations, run_chunks
from drift.jsontext import json_default

SEED = 20260311
START = pd.Timestamp("2021-01-04")  # a Monday
N_REF = 156  # three years of weeks
N_MON = 52  # one year of monitoring
BREAK_AFTER = 20  # monitoring weeks before the coefficient break
BOOM = "boom"  # a model whose chunk the failing chunk function rejects


def make_obs(n_models: int, seed: int = SEED) -> pd.DataFrame:
    """Observations of ``y{i}``, ``a{i}``, ``b{i}`` (first vintage only, available at the period's end)."""
    rng = np.random.default_rng(seed)
    weeks = N_REF + N_MON
    periods = pd.date_range(START, periods=weeks, freq="7D")
    t = np.arange(weeks)
    frames = []
    for i in range(n_models):
        e = rng.normal(size=(weeks, 2))
        x = np.zeros((weeks, 2))
        for s in range(1, weeks):
            x[s] = 0.6 * x[s - 1] + e[s]
        b1 = np.full(weeks, 2.0)
        if i % 2 == 1:
            b1[N_REF + BREAK_AFTER:] = 0.8
        xl = np.vstack([np.zeros((1, 2)), x[:-1]])  # lag 1
        y = (50.0 + 0.02 * t + 3.0 * np.sin(2 * np.pi * t / 52.18) + b1 * xl[:, 0] + 1.0 * xl[:, 1]
             + rng.normal(scale=0.7, size=weeks))
        for name, v in ((f"y{i}", y), (f"a{i}", x[:, 0]), (f"b{i}", x[:, 1])):
            frames.append(pd.DataFrame({"series": name, "period": periods, "value": v}))
    obs = pd.concat(frames, ignore_index=True)
    obs["issued_at"] = pd.Series(pd.NaT, index=obs.index, dtype="datetime64[ns, UTC]")
    obs["available_at"] = (obs["period"] + pd.Timedelta(days=7)).dt.tz_localize("UTC")
    obs["ingested_at"] = obs["available_at"]
    return obs[["series", "period", "issued_at", "value", "available_at", "ingested_at"]]


def as_of() -> datetime:
    last = START + pd.Timedelta(weeks=N_REF + N_MON - 1)
    return (last + pd.Timedelta(days=8)).tz_localize("UTC").to_pydatetime()


def write_config(tmp_path: Path, n_models: int, *, extra_models: Sequence[str] = (), check: str = "") -> Config:
    ref_end = (START + pd.Timedelta(weeks=N_REF - 1)).date()
    names = [f"m{i}" for i in range(n_models)]
    blocks = []
    for i, name in enumerate(names):
        blocks.append(f"""\
  - name: {name}
    target: y{i}
    frequency: W
    drivers:
      - {{series: a{i}, lag: 1}}
      - {{series: b{i}, lag: 1}}
    reference: {{start: {START.date()}, end: {ref_end}}}
""")
    for name in extra_models:  # reuses model 0's series
        blocks.append(f"""\
  - name: {name}
    target: y0
    frequency: W
    drivers:
      - {{series: a0, lag: 1}}
    reference: {{start: {START.date()}, end: {ref_end}}}
""")
    path = tmp_path / "drift.yaml"
    path.write_text("models:\n" + "".join(blocks) + (f"check:\n{check}" if check else ""), encoding="utf-8")
    return load_config(path)


def with_executor(cfg: Config, executor: str, chunk_size: int = 2, workers: int | None = 2) -> Config:
    chk = cfg.check.model_copy(update={"executor": executor, "chunk_size": chunk_size, "workers": workers})
    return cfg.model_copy(update={"check": chk})


def dump(payloads: list[dict[str, Any]]) -> str:
    return json.dumps(payloads, sort_keys=True, default=json_default)  # charts: their JSON, not their str()


def failing_analyse(cfg: Config, models: Sequence[ModelConfig], obs: pd.DataFrame, as_of: datetime
                    ) -> tuple[list[dict[str, Any]], dict[str, str]]:
    """A chunk function (module level, so spawned workers can import it) that fails on the BOOM chunk."""
    if any(m.name == BOOM for m in models):
        raise ZeroDivisionError("design of model boom failed")
    return analyse(cfg, models, obs, as_of)


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> tuple[Config, pd.DataFrame, str]:
    cfg = write_config(tmp_path_factory.mktemp("cfg"), 6)
    obs = make_obs(6)
    oracle, errors = analyse(cfg, cfg.models, obs, as_of())
    assert errors == {}
    return cfg, obs, dump(oracle)


# ------------------------------------------------------------------------------------------------ config
def test_config_keys_defaults_and_validation(tmp_path: Path) -> None:
    cfg = write_config(tmp_path, 1)
    assert (cfg.check.executor, cfg.check.chunk_size, cfg.check.workers, cfg.check.dask_scheduler) == (
        "local", 500, None, None)
    cfg = write_config(tmp_path, 1, check="  executor: dask\n  chunk_size: 7\n  workers: 3\n"
                                          "  dask_scheduler: tcp://10.0.0.5:8786\n")
    assert (cfg.check.executor, cfg.check.chunk_size, cfg.check.workers, cfg.check.dask_scheduler) == (
        "dask", 7, 3, "tcp://10.0.0.5:8786")
    from drift.exceptions import ConfigError

    with pytest.raises(ConfigError, match="executor"):
        write_config(tmp_path, 1, check="  executor: threads\n")
    with pytest.raises(ConfigError, match="chunk_size"):
        write_config(tmp_path, 1, check="  chunk_size: 0\n")


def test_config_pickles(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    import pickle

    cfg = scenario[0]
    assert pickle.loads(pickle.dumps(cfg)) == cfg


# ------------------------------------------------------------------------------------------------ splitting
def test_chunk_models_sizes_and_order(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    models = scenario[0].models
    chunks = chunk_models(models, 4)
    assert [len(c) for c in chunks] == [4, 2]
    assert [m.name for c in chunks for m in c] == [m.name for m in models]
    assert chunk_models([], 3) == []
    for bad in (0, -1, 1.5, True):
        with pytest.raises(ValueError, match="chunk size"):
            chunk_models(models, bad)  # type: ignore[arg-type]


def test_chunk_observations_only_own_series(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, _ = scenario
    chunks = chunk_models(cfg.models, 2)
    parts = chunk_observations(obs, chunks)
    for chunk, part in zip(chunks, parts):
        want = {s for m in chunk for s in m.series}
        assert set(part["series"]) == want
        expected = obs[obs["series"].isin(want)]
        pd.testing.assert_frame_equal(part, expected)  # same rows, order and index as a boolean filter
    with pytest.raises(ValueError, match="series"):
        chunk_observations(obs.drop(columns="series"), chunks)


# ------------------------------------------------------------------------------------------------ executors
def test_local_matches_single_call(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, oracle = scenario
    for size in (1, 2, 500):
        payloads, errors = run_chunks(with_executor(cfg, "local", size), cfg.models, obs, as_of(), func=analyse)
        assert errors == {}
        assert dump(payloads) == oracle, f"chunk_size {size}"
    verdicts = [p["verdict"] for p in json.loads(oracle)]
    assert len(verdicts) == 6


def test_process_matches_local(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, oracle = scenario
    payloads, errors = run_chunks(with_executor(cfg, "process", 2, 2), cfg.models, obs, as_of(), func=analyse)
    assert errors == {}
    assert [p["name"] for p in payloads] == [m.name for m in cfg.models]
    assert dump(payloads) == oracle


@pytest.mark.slow
def test_dask_local_cluster_matches_local(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    pytest.importorskip("distributed")
    cfg, obs, oracle = scenario
    payloads, errors = run_chunks(with_executor(cfg, "dask", 2, 2), cfg.models, obs, as_of(), func=analyse)
    assert errors == {}
    assert dump(payloads) == oracle


def test_order_follows_the_models_argument(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, oracle = scenario
    by_name = {p["name"]: p for p in json.loads(oracle)}
    order = [cfg.models[i] for i in (5, 0, 3, 1, 4, 2)]
    payloads, _ = run_chunks(with_executor(cfg, "local", 2), order, obs, as_of(), func=analyse)
    assert [p["name"] for p in payloads] == [m.name for m in order]
    assert dump(payloads) == dump([by_name[m.name] for m in order])


def test_empty_model_list(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, _ = scenario
    assert run_chunks(with_executor(cfg, "process"), [], obs, as_of(), func=analyse) == ([], {})


def test_unknown_executor_is_a_value_error(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, _ = scenario
    bad = cfg.model_copy(update={"check": cfg.check.model_copy(update={"executor": "threads"})})
    with pytest.raises(ValueError, match="check.executor"):
        run_chunks(bad, cfg.models, obs, as_of(), func=analyse)


# ------------------------------------------------------------------------------------------------ failures
@pytest.fixture(scope="module")
def boom_case(tmp_path_factory: pytest.TempPathFactory) -> tuple[Config, pd.DataFrame, str]:
    """Models m0..m5 plus 'boom' in third place (chunks of 2: [m0, m1], [boom, m2], [m3, m4], [m5])."""
    cfg = write_config(tmp_path_factory.mktemp("boom"), 6, extra_models=[BOOM])
    models = list(cfg.models)
    models.insert(2, models.pop())
    cfg = cfg.model_copy(update={"models": models})
    obs = make_obs(6)
    oracle, _ = analyse(cfg, [m for m in models if m.name not in (BOOM, "m2")], obs, as_of())
    return cfg, obs, dump(oracle)


@pytest.mark.parametrize("executor", ["local", "process", pytest.param("dask", marks=pytest.mark.slow)])
def test_failing_chunk_only_affects_its_models(boom_case: tuple[Config, pd.DataFrame, str], executor: str,
                                               caplog: pytest.LogCaptureFixture) -> None:
    if executor == "dask":
        pytest.importorskip("distributed")
    cfg, obs, oracle = boom_case
    with caplog.at_level(logging.DEBUG, logger="drift.executor"):
        payloads, errors = run_chunks(with_executor(cfg, executor, 2), cfg.models, obs, as_of(),
                                      func=failing_analyse)
    assert list(errors) == [BOOM, "m2"]  # model order
    assert errors[BOOM] == errors["m2"] == "ZeroDivisionError: design of model boom failed"
    assert [p["name"] for p in payloads] == ["m0", "m1", "m3", "m4", "m5"]
    assert dump(payloads) == oracle
    failed = [r for r in caplog.records if "chunk 2/4 failed" in r.getMessage()]
    assert len(failed) == 1 and failed[0].levelno == logging.ERROR and failed[0].exc_info is None  # one line
    tb = [r for r in caplog.records if "traceback of chunk 2/4" in r.getMessage()]
    assert len(tb) == 1 and tb[0].levelno == logging.DEBUG and tb[0].exc_info is not None


def test_failing_chunk_function(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, oracle = scenario

    def broken(cfg: Config, models: Sequence[ModelConfig], obs: pd.DataFrame, as_of: datetime) -> Any:
        if models[0].name == "m4":
            raise np.linalg.LinAlgError("SVD did not converge")
        return analyse(cfg, models, obs, as_of)

    payloads, errors = run_chunks(with_executor(cfg, "local", 2), cfg.models, obs, as_of(), func=broken)
    assert errors == {"m4": "LinAlgError: SVD did not converge", "m5": "LinAlgError: SVD did not converge"}
    assert dump(payloads) == dump(json.loads(oracle)[:4])


def test_per_model_errors_of_analyse_are_kept(tmp_path: Path) -> None:
    """A model whose target has no data is rejected by analyse itself; its chunk neighbour is unaffected."""
    cfg = write_config(tmp_path, 3)
    obs = make_obs(3)
    obs = obs[obs["series"] != "y1"]
    single, single_err = analyse(cfg, cfg.models, obs, as_of())
    payloads, errors = run_chunks(with_executor(cfg, "local", 2), cfg.models, obs, as_of(), func=analyse)
    assert list(errors) == ["m1"]
    assert errors == single_err
    assert dump(payloads) == dump(single)


# ------------------------------------------------------------------------------------------------ loading
# oracle: the check called once on all models (above); common practice, no source
def test_loader_reads_each_chunk_once_and_matches_a_frame(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, oracle = scenario
    calls: list[list[str]] = []

    def load(series: list[str]) -> pd.DataFrame:
        calls.append(series)
        return obs[obs["series"].isin(series)]

    done: list[int] = []
    payloads, errors = run_chunks(with_executor(cfg, "local", 4), cfg.models, load, as_of(), func=analyse,
                                  on_done=done.append)
    assert errors == {} and dump(payloads) == oracle
    assert [sorted(c) for c in calls] == [sorted({s for m in ch for s in m.read_series})
                                          for ch in chunk_models(cfg.models, 4)]
    assert done == [4, 2]


def test_a_failing_loader_fails_only_its_chunk(scenario: tuple[Config, pd.DataFrame, str]) -> None:
    cfg, obs, _oracle = scenario

    def load(series: list[str]) -> pd.DataFrame:
        if "y2" in series:
            raise OSError("store went away")
        return obs[obs["series"].isin(series)]

    for ex in ("local", "process"):
        payloads, errors = run_chunks(with_executor(cfg, ex, 2), cfg.models, load, as_of(), func=analyse)
        assert errors == {"m2": "OSError: store went away", "m3": "OSError: store went away"}, ex
        assert [p["name"] for p in payloads] == ["m0", "m1", "m4", "m5"]


# common practice, no source: the next chunk's read runs while the current chunk is worked on: the work on
# chunk 0 waits for the read of chunk 1 to start (it would wait for ever with the reads done in turn)
def test_the_next_chunk_is_read_while_the_current_one_is_worked_on(
        scenario: tuple[Config, pd.DataFrame, str]) -> None:
    import threading

    cfg, obs, oracle = scenario
    second_read = threading.Event()
    calls: list[list[str]] = []

    def load(series: list[str]) -> pd.DataFrame:
        calls.append(series)
        if len(calls) == 2:
            second_read.set()
        return obs[obs["series"].isin(series)]

    def waiting(cfg: Config, models: Sequence[ModelConfig], chunk_obs: pd.DataFrame, at: datetime
                ) -> tuple[list[dict[str, Any]], dict[str, str]]:
        if models[0].name == "m0":
            assert second_read.wait(timeout=30), "chunk 1 was not read while chunk 0 was worked on"
        return analyse(cfg, models, chunk_obs, at)

    payloads, errors = run_chunks(with_executor(cfg, "local", 2), cfg.models, load, as_of(), func=waiting)
    assert errors == {} and dump(payloads) == oracle
    assert [sorted(c) for c in calls] == [sorted({s for m in ch for s in m.read_series})
                                          for ch in chunk_models(cfg.models, 2)]


def test_the_executor_needs_its_function_and_imports_no_check() -> None:
    import subprocess
    import sys

    code = "import sys, drift.executor; print('drift.check' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout
    assert out.strip() == "False"
    cfg = Config.model_validate({"models": []})
    with pytest.raises(TypeError, match="chunk function"):
        run_chunks(cfg, [], pd.DataFrame({"series": []}), as_of(), func=None)  # type: ignore[arg-type]


def test_executor_mapping_in_config(tmp_path: Path) -> None:
    cfg = write_config(tmp_path, 1, check="  executor: {kind: dask, address: 'tcp://10.0.0.5:8786', workers: 4}\n")
    assert (cfg.check.executor, cfg.check.dask_scheduler, cfg.check.workers) == ("dask", "tcp://10.0.0.5:8786", 4)
    cfg = write_config(tmp_path, 1, check="  executor: {kind: process}\n")
    assert (cfg.check.executor, cfg.check.dask_scheduler) == ("process", None)
    from drift.exceptions import ConfigError

    for bad, words in (("{kind: local, address: 'tcp://x:1'}", "for kind dask"),
                       ("{address: 'tcp://x:1'}", "needs 'kind'"),
                       ("{kind: dask, port: 1}", "unknown key"),
                       ("{kind: dask, address: somewhere}", "scheduler address")):
        with pytest.raises(ConfigError, match=words):
            write_config(tmp_path, 1, check=f"  executor: {bad}\n")


# common practice, no source: an existing Dask cluster (a scheduler and two workers started as the
# `dask` command-line programs on 127.0.0.1) gives the verdicts of the local executor
@pytest.mark.slow
def test_dask_existing_cluster_matches_local(scenario: tuple[Config, pd.DataFrame, str], tmp_path: Path) -> None:
    pytest.importorskip("distributed")
    import os
    import shutil
    import socket
    import subprocess
    import sys
    import time

    if shutil.which("dask") is None:
        pytest.skip("the dask command is not installed")
    cfg, obs, oracle = scenario
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    address = f"tcp://127.0.0.1:{port}"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(p for p in (str(Path(__file__).parents[1]),
                                                                   os.environ.get("PYTHONPATH")) if p)}
    procs = [subprocess.Popen(["dask", "scheduler", "--host", "127.0.0.1", "--port", str(port),
                               "--no-dashboard"], env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
    try:
        time.sleep(2)
        for i in range(2):
            procs.append(subprocess.Popen(["dask", "worker", address, "--nthreads", "1", "--no-dashboard",
                                           "--name", f"w{i}", "--local-directory", str(tmp_path / f"w{i}")],
                                          env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        from distributed import Client

        with Client(address, timeout=60) as client:
            client.wait_for_workers(2, timeout=60)
        chk = cfg.check.model_validate({**cfg.check.model_dump(), "chunk_size": 2,
                                        "executor": {"kind": "dask", "address": address}})
        payloads, errors = run_chunks(cfg.model_copy(update={"check": chk}), cfg.models, obs, as_of(),
                                      func=analyse)
        assert errors == {}
        assert dump(payloads) == oracle
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=20)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()
    assert sys.executable  # the workers ran this checkout (PYTHONPATH above)
