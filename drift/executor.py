"""Run the check's statistical work chunk by chunk: in-process, in a process pool, or on a Dask cluster.

A *chunk* of models is the unit of work. :func:`run_chunks` splits the models into chunks of
``check.chunk_size``, gives each chunk only the observations of its own models' series, runs the chunk
function it is given (the check passes :func:`drift.check.analyse`; this module imports nothing of the
check) with the configured executor and puts the results back together in the original model order.

Observations come either as one frame (sliced per chunk) or as a loader ``load(series) -> frame`` that the
coordinator calls once per chunk, in a background thread one chunk ahead of the chunk being handed out (the
read overlaps the work on the previous chunk): then at most a few chunks' observations are in memory at a
time (``2 x workers`` in flight for the pool executors, plus the one read ahead), whatever the number of
models. Workers only compute; the coordinator alone reads and writes the store.

Contract
--------
- Same inputs, same output, whatever the executor: every executor runs the same chunks through the same
  function, and results are reassembled by model position, never by completion order.
- A chunk that raises does not stop the run: each of its models gets an error entry
  (``"<ExceptionType>: <message>"``), one line is logged at error level (the traceback at debug level), and
  the other chunks complete. Models that ``analyse`` itself rejects (its own per-model errors) keep their
  own messages; ``analyse`` isolates its models from each other, so a chunk fails as a whole only when its
  worker does (a killed process, memory, a lost Dask worker).
- Worker processes run their linear algebra single-threaded (``OMP_NUM_THREADS=1`` and friends, set before
  the workers start, plus ``threadpoolctl`` when it is installed), so ``w`` workers on ``w`` cores do not
  oversubscribe the machine. A variable the user has already set is left alone.

Executors
---------
``local``
    A plain loop in the calling process.
``process``
    :class:`concurrent.futures.ProcessPoolExecutor` with ``check.workers`` processes (default: the number
    of CPUs, at most one per chunk), started with the ``spawn`` method (safe next to threads, the same on
    every platform). The configuration is pickled once per worker (pool initializer), not once per chunk.
``dask``
    A :class:`distributed.Client` connected to ``check.dask_scheduler`` (``check.executor: {kind: dask,
    address: tcp://host:8786}`` sets it), or, when that is unset, to a
    :class:`distributed.LocalCluster` (``check.workers`` or 2 worker processes, one thread each, no
    dashboard) started and closed for the run. The configuration is broadcast once to every worker;
    each chunk goes out with its observations as its turn comes. The workers of an existing
    cluster need the same drift version installed; their thread caps are the cluster's own (Dask's nanny
    sets ``OMP_NUM_THREADS=1`` and friends by default, ``distributed.nanny.pre-spawn-environ``).

Notes
-----
Log records emitted inside worker processes (e.g. ``analyse``'s "model skipped" warnings) stay in the
workers; what matters reaches the caller as values, in the returned ``errors``.
"""

from __future__ import annotations

import concurrent.futures as cf
import logging
import multiprocessing
import os
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from datetime import datetime
from typing import Any, TypeAlias

import numpy as np
import pandas as pd

from drift.config import Config, ModelConfig
from drift.exceptions import ClusterError

log = logging.getLogger(__name__)

Payloads: TypeAlias = list[dict[str, Any]]
Errors: TypeAlias = dict[str, str]
#: a chunk function: ``(cfg, models, obs, as_of) -> (payloads, errors)``, like :func:`drift.check.analyse`
ChunkFunc: TypeAlias = Callable[[Config, Sequence[ModelConfig], pd.DataFrame, datetime], tuple[Payloads, Errors]]

EXECUTORS = ("local", "process", "dask")
#: environment that keeps BLAS / OpenMP pools at one thread inside each worker process
THREAD_ENV = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "VECLIB_MAXIMUM_THREADS": "1",
    "NUMEXPR_NUM_THREADS": "1",
}
#: workers of a LocalCluster started for the run when ``check.workers`` is unset
DEFAULT_DASK_WORKERS = 2
#: how long a check waits for the first worker of an existing cluster that has none yet, and for a worker to
#: come back when every worker left during the check
WORKER_WAIT_SECONDS = 60
#: how often a chunk's result is waited for before the cluster's workers are counted again (seconds)
RESULT_POLL_SECONDS = 5.0


# ------------------------------------------------------------------------------------------------ splitting
def chunk_models(models: Sequence[ModelConfig], size: int) -> list[list[ModelConfig]]:
    """Consecutive chunks of at most ``size`` models, in order.

    Raises
    ------
    ValueError
        when ``size`` is not a positive integer.
    """
    if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or size < 1:
        raise ValueError(f"chunk size must be a positive integer, got {size!r}")
    size = int(size)
    return [list(models[i:i + size]) for i in range(0, len(models), size)]


class _SeriesIndex:
    """Row positions of each series in ``obs``, so that slicing obs for many chunks costs one pass."""

    def __init__(self, obs: pd.DataFrame) -> None:
        codes, uniques = pd.factorize(obs["series"], sort=False)
        order = np.argsort(codes, kind="stable")
        counts = np.bincount(codes[codes >= 0], minlength=len(uniques))
        starts = np.concatenate([[0], np.cumsum(counts)])
        n_missing = int(np.sum(codes < 0))  # NaN series names sort first (code -1)
        self._obs = obs
        self._rows = {s: order[n_missing + starts[j]: n_missing + starts[j + 1]] for j, s in enumerate(uniques)}

    def take(self, series: Sequence[str]) -> pd.DataFrame:
        """The rows of ``obs`` whose series is in ``series``, in their original order and index."""
        parts = [self._rows[s] for s in dict.fromkeys(series) if s in self._rows]
        if not parts:
            return self._obs.iloc[0:0]
        pos = np.sort(np.concatenate(parts))
        return self._obs.iloc[pos]


def chunk_observations(obs: pd.DataFrame, chunks: Sequence[Sequence[ModelConfig]]) -> list[pd.DataFrame]:
    """For each chunk, the observations of its models' series only (original row order kept).

    Raises
    ------
    ValueError
        when ``obs`` has no ``series`` column.
    """
    if "series" not in obs.columns:
        raise ValueError(f"obs must have a 'series' column; it has {list(obs.columns)}")
    index = _SeriesIndex(obs)
    return [index.take([s for m in chunk for s in m.read_series]) for chunk in chunks]


# ------------------------------------------------------------------------------------------------ workers
def _limit_threads() -> None:
    """Cap native thread pools in this process (threadpoolctl when installed; env is set by the parent)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:
        return
    threadpool_limits(1)


def run_chunk(func: ChunkFunc, cfg: Config, models: Sequence[ModelConfig], obs: pd.DataFrame,
              as_of: datetime) -> tuple[Payloads, Errors]:
    """Run one chunk (module level and picklable arguments, so any executor can ship it)."""
    if func is None:
        raise TypeError("run_chunk needs the chunk function (e.g. drift.check.analyse)")
    return func(cfg, models, obs, as_of)


_WORKER_CFG: Config | None = None


def _pool_init(cfg: Config) -> None:
    global _WORKER_CFG
    _WORKER_CFG = cfg
    _limit_threads()


def _pool_chunk(func: ChunkFunc, models: Sequence[ModelConfig], obs: pd.DataFrame,
                as_of: datetime) -> tuple[Payloads, Errors]:
    if _WORKER_CFG is None:  # the pool initializer always runs first; this guards misuse
        raise RuntimeError("process-pool worker used without its initializer")
    return run_chunk(func, _WORKER_CFG, models, obs, as_of)


def _dask_chunk(func: ChunkFunc, models: Sequence[ModelConfig], obs: pd.DataFrame, as_of: datetime,
                cfg: Config) -> tuple[Payloads, Errors]:
    _limit_threads()
    return run_chunk(func, cfg, models, obs, as_of)


@contextmanager
def _single_threaded_env() -> Iterator[None]:
    """Set :data:`THREAD_ENV` (where unset) while worker processes are spawned; restore afterwards."""
    added = [k for k in THREAD_ENV if k not in os.environ]
    for k in added:
        os.environ[k] = THREAD_ENV[k]
    try:
        yield
    finally:
        for k in added:
            os.environ.pop(k, None)


# ------------------------------------------------------------------------------------------------ running
#: reads the observations of the given series (all their vintages known at the check's moment)
Loader: TypeAlias = Callable[[list[str]], pd.DataFrame]
#: told the number of models of each chunk as it completes (progress display)
OnDone: TypeAlias = Callable[[int], None]


def run_chunks(cfg: Config, models: Sequence[ModelConfig], obs: pd.DataFrame | Loader, as_of: datetime, *,
               func: ChunkFunc, on_done: OnDone | None = None) -> tuple[Payloads, Errors]:
    """Run ``func`` over the models, chunk by chunk.

    Parameters
    ----------
    cfg : the configuration; ``cfg.check`` selects ``executor`` (local / process / dask), ``chunk_size``,
        ``workers`` and ``dask_scheduler``.
    models : the models to check, in the order the output should have.
    obs : observations (columns series, period, issued_at, value, available_at, ...) of at least the
        models' series, each chunk receiving only the rows of its own models' series; or a loader called
        with a chunk's series (in the coordinator, one call per chunk, as the chunk is handed out).
    as_of : the tz-aware moment of the check.
    func : the chunk function, ``(cfg, models, obs, as_of) -> (payloads, errors)``, e.g.
        :func:`drift.check.analyse`; it must be importable at module level for the process and dask
        executors.
    on_done : called with the number of models of each chunk as it completes (in chunk order).

    Returns
    -------
    payloads : the payloads ``func`` produced, chunks concatenated in model order.
    errors : model name -> reason, in model order: ``func``'s own per-model errors, and
        ``"<ExceptionType>: <message>"`` for every model of a chunk that raised (its loader included).

    Raises
    ------
    ValueError
        when ``cfg.check.executor`` is not one of :data:`EXECUTORS`.
    TypeError
        when ``func`` is not callable.
    ImportError
        for the dask executor when ``dask.distributed`` is not installed (``pip install drift[dask]``).
    ClusterError
        for the dask executor with an address, when no scheduler answers there or it has no worker within
        :data:`WORKER_WAIT_SECONDS`.
    """
    if not callable(func):
        raise TypeError(f"func must be the chunk function (e.g. drift.check.analyse), got {func!r}")
    chk = cfg.check
    executor = chk.executor
    if executor not in EXECUTORS:
        raise ValueError(f"check.executor must be one of {EXECUTORS}, got {executor!r}")
    workers = chk.workers
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int) or workers < 1):
        raise ValueError(f"check.workers must be a positive integer or None, got {workers!r}")
    chunks = chunk_models(models, chk.chunk_size)
    if not chunks:
        return [], {}
    prefetch: _Prefetch | None = None
    if isinstance(obs, pd.DataFrame):
        parts = chunk_observations(obs, chunks)
        load: Callable[[int], pd.DataFrame] = parts.__getitem__
    elif callable(obs):
        loader = obs

        def read(i: int) -> pd.DataFrame:
            return loader(list(dict.fromkeys(s for m in chunks[i] for s in m.read_series)))

        load = prefetch = _Prefetch(read, len(chunks))
    else:
        raise TypeError(f"obs must be a DataFrame or a loader function, got {type(obs).__name__}")
    done = on_done or (lambda n: None)
    log.info("checking %d models in %d chunk(s) with the %s executor", len(models), len(chunks), executor)
    try:
        if executor == "local":
            results = _run_local(func, cfg, chunks, load, as_of, done)
        elif executor == "process":
            results = _run_process(func, cfg, chunks, load, as_of, workers, done)
        else:
            results = _run_dask(func, cfg, chunks, load, as_of, workers, chk.dask_scheduler, done)
    finally:
        if prefetch is not None:
            prefetch.close()
    return _assemble(models, chunks, results)


class _Prefetch:
    """A chunk loader that reads chunk ``i + 1`` in a background thread while chunk ``i`` is worked on.

    Chunks are asked for in order (every executor hands them out in order); the read of the next one then
    overlaps the current chunk's analysis (the database read runs mostly outside the GIL: SQLite's and
    Arrow's work in C). At most one chunk is read ahead, so memory grows by one chunk's observations. A read
    that fails raises when its chunk is asked for, as without prefetching.
    """

    def __init__(self, read: Callable[[int], pd.DataFrame], n: int) -> None:
        self._read = read
        self._n = n
        self._pool = cf.ThreadPoolExecutor(max_workers=1, thread_name_prefix="drift-read-ahead")
        self._ahead: tuple[int, cf.Future[pd.DataFrame]] | None = None

    def __call__(self, i: int) -> pd.DataFrame:
        ahead, self._ahead = self._ahead, None
        try:
            if ahead is not None and ahead[0] == i:
                return ahead[1].result()
            if ahead is not None:  # asked out of order: that read is not wanted now
                ahead[1].cancel()
            return self._read(i)
        finally:
            if i + 1 < self._n:
                self._ahead = (i + 1, self._pool.submit(self._read, i + 1))

    def close(self) -> None:
        """Stop reading ahead (a read under way finishes; its result is dropped)."""
        if self._ahead is not None:
            self._ahead[1].cancel()
            self._ahead = None
        self._pool.shutdown(wait=True, cancel_futures=True)


_Outcome: TypeAlias = "tuple[Payloads, Errors] | BaseException"


def _run_local(func: ChunkFunc, cfg: Config, chunks: list[list[ModelConfig]],
               load: Callable[[int], pd.DataFrame], as_of: datetime, done: OnDone) -> list[_Outcome]:
    out: list[_Outcome] = []
    for i, chunk in enumerate(chunks):
        try:
            out.append(run_chunk(func, cfg, chunk, load(i), as_of))
        except Exception as exc:  # noqa: BLE001 - a failing chunk is isolated and reported per model
            _log_failure(i, len(chunks), chunk, exc)
            out.append(exc)
        done(len(chunk))
    return out


def _bounded(submit: Callable[[int], Any], result: Callable[[Any], tuple[Payloads, Errors]], n: int,
             in_flight: int, chunks: list[list[ModelConfig]], done: OnDone) -> list[_Outcome]:
    """Submit chunks in order keeping at most ``in_flight`` outstanding; collect results in chunk order. A
    chunk whose submission (its observations' loading) or result raises is that chunk's failure."""
    out: list[_Outcome] = []
    pending: dict[int, Any] = {}
    failed: dict[int, BaseException] = {}
    nxt = 0
    for i in range(n):
        while nxt < n and nxt - i < in_flight:
            try:
                pending[nxt] = submit(nxt)
            except Exception as exc:  # noqa: BLE001 - e.g. the loader failed: reported per model
                failed[nxt] = exc
            nxt += 1
        err: BaseException
        if i in failed:
            err = failed.pop(i)
        else:
            try:
                out.append(result(pending.pop(i)))
                done(len(chunks[i]))
                continue
            except Exception as e:  # noqa: BLE001 - includes BrokenProcessPool / a lost worker
                err = e
        _log_failure(i, n, chunks[i], err)
        out.append(err)
        done(len(chunks[i]))
    return out


def _run_process(func: ChunkFunc, cfg: Config, chunks: list[list[ModelConfig]],
                 load: Callable[[int], pd.DataFrame], as_of: datetime, workers: int | None,
                 done: OnDone) -> list[_Outcome]:
    n = max(1, min(workers or os.cpu_count() or 1, len(chunks)))
    ctx = multiprocessing.get_context("spawn")
    pool = cf.ProcessPoolExecutor(max_workers=n, mp_context=ctx, initializer=_pool_init, initargs=(cfg,))

    def submit(i: int) -> Any:
        obs = load(i)
        # workers are spawned on demand by submit(), so they inherit THREAD_ENV set around it
        with _single_threaded_env():
            return pool.submit(_pool_chunk, func, chunks[i], obs, as_of)

    try:
        out = _bounded(submit, lambda f: f.result(), len(chunks), 2 * n, chunks, done)
    except BaseException:  # interrupted: drop the chunks not started yet, then let it propagate
        pool.shutdown(wait=True, cancel_futures=True)
        raise
    pool.shutdown(wait=True)
    return out


def _run_dask(func: ChunkFunc, cfg: Config, chunks: list[list[ModelConfig]],
              load: Callable[[int], pd.DataFrame], as_of: datetime, workers: int | None,
              address: str | None, done: OnDone) -> list[_Outcome]:
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:
        raise ImportError("check.executor 'dask' needs dask.distributed: pip install 'drift[dask]'") from exc
    cluster = None
    if address is None:
        cluster = LocalCluster(n_workers=workers or DEFAULT_DASK_WORKERS, threads_per_worker=1, processes=True,
                               dashboard_address=None,
                               env={k: v for k, v in THREAD_ENV.items() if k not in os.environ})
        log.info("started a local Dask cluster with %d worker(s)", workers or DEFAULT_DASK_WORKERS)
    try:
        with _connect(Client, cluster if cluster is not None else address) as client:
            if cluster is None:
                _wait_for_a_worker(client, address)
            slots = max(1, sum(w.get("nthreads", 1) for w in client.scheduler_info()["workers"].values()))
            cfg_f = client.scatter(cfg, broadcast=True)

            def submit(i: int) -> Any:
                return client.submit(_dask_chunk, func, chunks[i], load(i), as_of, cfg=cfg_f, pure=False)

            watch = _ClusterWatch(client, address or "the local cluster")
            return _bounded(submit, watch.result, len(chunks), 2 * slots, chunks, done)
    finally:
        if cluster is not None:
            cluster.close()


_KEY = "check.executor.address (check.dask_scheduler)"


class _ClusterWatch:
    """Waits for a chunk's result while the cluster has workers, and says in the trade's words when the
    cluster lost it. Workers that leave take the configuration scattered to them along: the scheduler then
    cancels the chunks ("lost dependencies"), which become a :class:`ClusterError` naming the key. A task
    with nothing lost would wait for a new worker for ever: when the cluster has had no worker for
    :data:`WORKER_WAIT_SECONDS`, the chunk fails with a :class:`ClusterError` too, and so does every later
    chunk, at once. Either way the chunk's models get error entries and the run is recorded partial."""

    def __init__(self, client: Any, where: str) -> None:
        self.client, self.where = client, where
        self.none_since: float | None = None
        self.lost: ClusterError | None = None

    def result(self, fut: Any) -> tuple[Payloads, Errors]:
        while self.lost is None:
            try:
                return fut.result(timeout=RESULT_POLL_SECONDS)  # type: ignore[no-any-return]
            except TimeoutError:
                pass
            except cf.CancelledError as exc:  # distributed's FutureCancelledError: "lost dependencies" and the like
                raise ClusterError(
                    f"{_KEY}: the Dask cluster at {self.where} dropped this chunk during the check ({exc}): its "
                    "workers left or restarted, and the configuration sent to them with it; the models not "
                    "checked get error entries: check the workers and check again") from exc
            if len(self.client.scheduler_info().get("workers", {})):
                self.none_since = None
                continue
            now = time.monotonic()
            if self.none_since is None:
                self.none_since = now
                log.warning("the Dask cluster at %s has no worker left; waiting up to %s s for one", self.where,
                            WORKER_WAIT_SECONDS)
            elif now - self.none_since >= WORKER_WAIT_SECONDS:
                self.lost = ClusterError(
                    f"{_KEY}: every worker of the Dask cluster at {self.where} left during the check (none came "
                    f"back within {WORKER_WAIT_SECONDS} s); the models not checked get error entries: restart the "
                    "workers (`dask worker <address>`) and check again")
        fut.cancel()
        raise self.lost


def _connect(client_cls: Any, target: Any) -> Any:
    """A client of the LocalCluster, or of the scheduler at an address; an unreachable one is a ClusterError."""
    if not isinstance(target, str):
        return client_cls(target)
    try:
        return client_cls(target)
    except (OSError, TimeoutError) as exc:
        raise ClusterError(f"{_KEY}: no Dask scheduler answers at {target} ({type(exc).__name__}: {exc}); start "
                           f"one there with `dask scheduler` or correct the address") from exc


def _wait_for_a_worker(client: Any, address: str) -> None:
    """Wait up to :data:`WORKER_WAIT_SECONDS` for a first worker: chunks sent to a cluster without one would
    wait for ever."""
    n = len(client.scheduler_info()["workers"])
    if n == 0:
        log.warning("Dask scheduler %s has no worker yet; waiting up to %s s for one", address, WORKER_WAIT_SECONDS)
        try:
            client.wait_for_workers(1, timeout=WORKER_WAIT_SECONDS)
        except (OSError, TimeoutError) as exc:
            raise ClusterError(f"{_KEY}: the Dask scheduler at {address} has no worker (waited "
                               f"{WORKER_WAIT_SECONDS} s); start them with `dask worker {address}`") from exc
        n = len(client.scheduler_info()["workers"])
    log.info("Dask scheduler %s: %d worker(s)", address, n)


def _log_failure(i: int, n: int, chunk: Sequence[ModelConfig], exc: BaseException) -> None:
    names = [m.name for m in chunk]
    shown = ", ".join(names[:5]) + (f", ... ({len(names)} models)" if len(names) > 5 else "")
    log.error("chunk %d/%d failed (%s): %s: %s; its models get error entries (traceback at debug level)",
              i + 1, n, shown, type(exc).__name__, exc)
    log.debug("traceback of chunk %d/%d", i + 1, n, exc_info=exc)


def _assemble(models: Sequence[ModelConfig], chunks: list[list[ModelConfig]],
              results: list[_Outcome]) -> tuple[Payloads, Errors]:
    payloads: Payloads = []
    raw_errors: Errors = {}
    for chunk, res in zip(chunks, results):
        if isinstance(res, BaseException):
            text = f"{type(res).__name__}: {res}"
            raw_errors.update({m.name: text for m in chunk})
            continue
        got, errs = res
        payloads.extend(got)
        raw_errors.update(errs)
    errors = {m.name: raw_errors[m.name] for m in models if m.name in raw_errors}
    errors.update({k: v for k, v in raw_errors.items() if k not in errors})  # names func made up, last
    return payloads, errors
