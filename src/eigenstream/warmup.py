"""Paying pynndescent's compile cost once per machine, and early: while the driver reads.

pynndescent keeps its import and query functions in numba's on-disk cache, but not its
NN-descent core (functions taking a distance function as an argument never hit numba's cache
across processes, pynndescent PR 226). Our searches therefore build through
:mod:`eigenstream.core.descent`, a copy of that core with the distance fixed, which numba does
cache: the first process on a machine compiles it (40-60 s of one core on the project's
machine), every later process loads it (about 0.1 s). Still, the first run on a machine (or
after an upgrade of pynndescent or numba) pays the compilation, so a run whose neighbour
stage will use pynndescent sends a tiny build to the workers at its start
(:func:`compile_ahead`): to one worker when a single task will search all rows (the task is
then sent to it; the other workers' cores stay free for the driver), to every worker when
the search is sharded. The read, prep and landmark stages run in the driver meanwhile, and
the neighbour stage collects the figures (:func:`collect`). Neighbour tasks call
:func:`warm_worker` themselves too, which costs nothing in a warmed process and covers
workers that joined later.

Numba's cache is pointed at a per-user, per-machine, per-pynndescent-release folder
(:func:`numba_cache_dir`) unless ``NUMBA_CACHE_DIR`` is set, so what is cached survives a
read-only site-packages and never mixes code of two pynndescent releases (numba checks the
cached function's own source file, not the pynndescent code compiled into it).
``EIGENSTREAM_COMPILE_AHEAD=0`` turns the early submission off (for measuring it).
"""

from __future__ import annotations

import importlib.metadata
import logging
import os
import socket
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from eigenstream.errors import EigenstreamError

log = logging.getLogger(__name__)

WARMUP_ROWS = 300
_WARMUP_COLUMNS = 8
_WARMUP_NEIGHBORS = 16  # leaves of 80 rows: the forest splits, as on real tables
_COMPILED: set[tuple[str, bool]] = set()
_COMPILING = threading.Lock()
_PENDING: dict[str, list[Any]] = {}


def numba_cache_dir() -> Path:
    """``$XDG_CACHE_HOME/eigenstream/numba/<host>/pynndescent-<release>`` (``~/.cache`` when unset).

    The host name keeps machines apart when home folders are shared: concurrent cache writes
    over a network file system are a known race (numba issue 10128).
    """
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    try:
        release = importlib.metadata.version("pynndescent")
    except importlib.metadata.PackageNotFoundError:
        release = "none"
    return Path(base) / "eigenstream" / "numba" / socket.gethostname() / f"pynndescent-{release}"


def use_numba_cache_dir() -> Path | None:
    """Set ``NUMBA_CACHE_DIR`` to :func:`numba_cache_dir` unless the user set it.

    Returns the cache folder in force, or None when numba's default applies (pynndescent is
    already imported in this process, so its cached functions have chosen where to look, or
    the folder cannot be created).
    """
    if os.environ.get("NUMBA_CACHE_DIR"):
        return Path(os.environ["NUMBA_CACHE_DIR"])
    if "pynndescent" in sys.modules:
        return None
    path = numba_cache_dir()
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError:
        return None
    os.environ["NUMBA_CACHE_DIR"] = str(path)
    if "numba" in sys.modules:  # numba reads its settings once, at import
        from numba.core import config

        config.reload_config()
    return path


@contextmanager
def _first_fill(cache_dir: Path | None) -> Iterator[None]:
    """Let one process per machine fill an empty numba cache while the others wait.

    Worker processes writing the same cache entries at once have crashed (numba issue 4807);
    once entries exist the others only read them, so the lock is released at once.
    """
    try:
        import fcntl
    except ImportError:  # not a POSIX system: no lock
        fcntl = None
    if cache_dir is None or fcntl is None:
        yield
        return
    with open(cache_dir / ".fill.lock", "a") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        if any("descent.descend" in p.name for p in cache_dir.rglob("*.nbi")):
            fcntl.flock(fh, fcntl.LOCK_UN)
        try:
            yield
        finally:
            fcntl.flock(fh, fcntl.LOCK_UN)


def _worker_threads() -> int:
    try:
        from distributed import get_worker

        return int(get_worker().state.nthreads)
    except ValueError:  # not inside a dask worker
        return 1


def warm_worker(metric: str = "euclidean", query: bool = False,
                n_jobs: int | None = None) -> float:
    """Compile pynndescent's build (and query) code in this process; return the seconds spent.

    Parameters
    ----------
    metric : {"euclidean", "cosine"}
        The run's metric (the sharded search compiles per metric).
    query : bool, default=False
        Also compile ``prepare`` and ``query`` (used by the sharded search).
    n_jobs : int, optional
        Threads of the tiny build; the worker's threads by default.

    Returns
    -------
    float
        Wall seconds until compiled code was available: the compilation itself, or the wait
        for another thread compiling it, or almost nothing when this process already has it.
    """
    t0 = time.perf_counter()
    key = (metric, query)
    with _COMPILING:
        if key in _COMPILED:
            return time.perf_counter() - t0
        cache_dir = use_numba_cache_dir()
        with _first_fill(cache_dir):
            from eigenstream.core.neighbors import approximate_knn
            from eigenstream.core.shards import build_shard_index

            rows = np.random.default_rng(0).standard_normal((WARMUP_ROWS, _WARMUP_COLUMNS))
            rows = rows.astype(np.float32)
            threads = n_jobs or _worker_threads()
            if query:  # the sharded search: its own index build, then queries
                index = build_shard_index(rows, _WARMUP_NEIGHBORS - 1, metric=metric, seed=0,
                                          n_jobs=threads)
                index.query(rows[:10], k=_WARMUP_NEIGHBORS)
            else:
                approximate_knn(rows, _WARMUP_NEIGHBORS - 1, metric=metric, seed=0,
                                n_jobs=threads)
        _COMPILED.add(key)
    return time.perf_counter() - t0


def needs_pynndescent(workdir, config) -> bool:
    """Will this run's neighbour stage build an NN-descent index (and is it not done yet)?"""
    from eigenstream.pipeline import expected_fingerprints
    from eigenstream.stages.neighbors import choose_method

    state = workdir.stage_state("neighbors") or {}
    if state.get("state") == "done" and (
        state.get("fingerprint") == expected_fingerprints(config)["neighbors"]
    ):
        return False
    return choose_method(config, _graph_rows(workdir, config)) == "approximate"


def _will_search(workdir, config) -> bool:
    try:
        return needs_pynndescent(workdir, config)
    except (EigenstreamError, OSError) as exc:  # the stages themselves report such problems
        log.debug("not compiling ahead: %s", exc)
        return False


def _graph_rows(workdir, config) -> int:
    """Rows the graph will be built on, known before the read stage runs."""
    if config.landmarks.count:
        return config.landmarks.count
    read = workdir.stage_state("read") or {}
    if read.get("state") == "done" and "rows" in read.get("summary", {}):
        return int(read["summary"]["rows"])
    from eigenstream.io.readers import open_source

    with open_source(config.input) as src:
        return src.n_rows


def submit_warmup(client, metric: str, query: bool = False,
                  count: int | None = None) -> list[Any]:
    """One :func:`warm_worker` task per connected worker (the first ``count`` of them).

    Returns the futures without waiting for them.
    """
    workers = sorted(client.scheduler_info().get("workers", {}))[:count]
    # allow_other_workers: a worker that leaves must not leave its future pending forever.
    return [
        client.submit(warm_worker, metric, query, workers=[address], allow_other_workers=True,
                      pure=False, key=f"warmup-{metric}-{address}-{time.time_ns()}")
        for address in workers
    ]


@contextmanager
def compile_ahead(client, workdir, config) -> Iterator[None]:
    """Around a run: start the workers' compilation now when the neighbour stage will need it."""
    key = str(Path(workdir.path).resolve())
    if os.environ.get("EIGENSTREAM_COMPILE_AHEAD", "1") != "0" and _will_search(workdir, config):
        sharded = config.graph.shards > 1
        _PENDING[key] = submit_warmup(client, config.graph.metric, query=sharded,
                                      count=None if sharded else 1)
        log.info("compiling the neighbour search in %d workers while the data is read",
                 len(_PENDING[key]))
    try:
        yield
    finally:
        _PENDING.pop(key, None)


def collect(workdir, *, cancel: bool = False) -> tuple[float | None, float, list[str]]:
    """Wait for this run's warm-up tasks.

    Returns the compile seconds (max over workers; None when no warm-up was started), the
    seconds waited here, and the addresses of the workers now warm. ``cancel=True`` drops them
    instead (the neighbour stage did not use pynndescent after all). A failed warm-up is only
    logged: the neighbour task meets the same failure and reports it.
    """
    from distributed import wait

    futures = _PENDING.pop(str(Path(workdir.path).resolve()), [])
    if cancel or not futures:
        for fut in futures:
            fut.cancel()
        return None, 0.0, []
    t0 = time.perf_counter()
    wait(futures)
    seconds, warm = [], []
    for fut in futures:
        if fut.status == "finished":
            seconds.append(float(fut.result()))
            warm.extend(fut.client.who_has([fut]).get(fut.key, ()))
        else:
            reason = fut.exception() if fut.status == "error" else fut.status
            log.warning("compiling the neighbour search ahead failed in a worker: %s", reason)
    return (max(seconds) if seconds else None), time.perf_counter() - t0, warm


__all__ = ["collect", "compile_ahead", "needs_pynndescent", "numba_cache_dir", "submit_warmup",
           "use_numba_cache_dir", "warm_worker"]
