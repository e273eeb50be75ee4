"""The one place a dask.distributed Client is made for a run.

``kind = "local"`` starts a LocalCluster on this machine (loopback only, dashboard on
127.0.0.1 with a free port); ``kind = "address"`` connects to a running scheduler;
``kind = "slurm"`` / ``"pbs"`` start a scheduler in this process and submit worker jobs to
the batch queue through dask-jobqueue (dashboard still on loopback: reach it by SSH tunnel).
"""

from __future__ import annotations

import logging
import os
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import dask
from distributed import Client, LocalCluster

from eigenstream.config import ClusterConfig, memory_bytes
from eigenstream.errors import ConfigError, EigenstreamError

log = logging.getLogger(__name__)

# Per job-queue kind: dask-jobqueue class name, submit command, command that lists the queue.
_QUEUES = {
    "slurm": ("SLURMCluster", "sbatch", "squeue -u $USER"),
    "pbs": ("PBSCluster", "qsub", "qstat -u $USER"),
}
_THREAD_VARIABLES = ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS",
                     "MKL_NUM_THREADS")


def local_worker_count(cfg: ClusterConfig) -> int:
    """Workers for a local cluster: the configured number, else one per core (at most 4)."""
    if cfg.workers:
        return cfg.workers
    cores = os.cpu_count() or 1
    return max(1, min(4, cores // cfg.threads_per_worker))


def worker_lifetime(walltime_seconds: int) -> tuple[int, int]:
    """``(lifetime, stagger)`` in seconds for workers of jobs with this walltime.

    Workers retire after ``lifetime +- stagger`` so they hand their results over and leave
    before the queue kills the job; the margin is a tenth of the walltime, at least 5 minutes
    (common practice: time for a graceful retirement plus the job's start-up).
    """
    margin = max(300, walltime_seconds // 10)
    return walltime_seconds - margin, margin // 4


def _duration(seconds: int) -> str:
    """Seconds as a dask duration ("108m" when whole minutes, else "95s")."""
    return f"{seconds // 60}m" if seconds % 60 == 0 else f"{seconds}s"


def _jobqueue_setting(kind: str, key: str) -> list[str]:
    """A list-valued setting of the user's jobqueue.yaml (empty when unset)."""
    return list(dask.config.get(f"jobqueue.{kind}.{key}", default=None) or [])


def jobqueue_cluster(cfg: ClusterConfig) -> Any:
    """The dask-jobqueue cluster object for a ``slurm`` or ``pbs`` configuration.

    Starts the scheduler in this process but submits no job (``scale``/``adapt`` do), so
    ``.job_script()`` can be inspected anywhere. List settings of the user's
    ``jobqueue.yaml`` (directives, worker arguments, prologue) are kept and ours appended.

    Raises
    ------
    ConfigError
        If ``cfg.kind`` is not a job-queue kind or dask-jobqueue is not installed.
    """
    if cfg.kind not in _QUEUES:
        raise ConfigError(
            f'`[cluster] kind` = "{cfg.kind}" has no batch queue; use "slurm" or "pbs".'
        )
    try:
        import dask_jobqueue
    except ImportError:
        raise ConfigError(
            f'`[cluster] kind = "{cfg.kind}"` needs the dask-jobqueue package; '
            "install it (pip install dask-jobqueue) or choose another kind."
        ) from None
    cls = getattr(dask_jobqueue, _QUEUES[cfg.kind][0])
    lifetime, stagger = worker_lifetime(cfg.walltime_seconds())
    threads = cfg.threads_per_worker
    # The nanny honours these from the environment, and numba is not capped by dask at all.
    exports = " ".join(f"{name}={threads}" for name in _THREAD_VARIABLES)
    scheduler_options = dict(
        dask.config.get(f"jobqueue.{cfg.kind}.scheduler-options", default=None) or {}
    )
    scheduler_options["dashboard_address"] = cfg.dashboard_address
    options: dict[str, Any] = {
        "cores": cfg.cores,
        "memory": cfg.memory,
        "processes": cfg.processes_per_job,
        "walltime": cfg.walltime,
        "worker_extra_args": _jobqueue_setting(cfg.kind, "worker-extra-args") + [
            "--lifetime", _duration(lifetime), "--lifetime-stagger", _duration(stagger)
        ],
        "job_script_prologue": _jobqueue_setting(cfg.kind, "job-script-prologue")
        + [f"export {exports}"],
        "job_extra_directives": _jobqueue_setting(cfg.kind, "job-extra-directives")
        + list(cfg.job_extra),
        "scheduler_options": scheduler_options,
    }
    for key in ("queue", "account", "interface"):
        if getattr(cfg, key) is not None:
            options[key] = getattr(cfg, key)
    try:
        return cls(**options)
    except (ValueError, RuntimeError) as exc:
        # dask reports an unknown interface as "Cluster failed to start: 'x' is not valid..."
        if cfg.interface is not None and repr(cfg.interface) in str(exc):
            raise ConfigError(
                f"`[cluster] interface` = {cfg.interface!r} is not a network interface of "
                "this machine; pick one listed by `ip addr` (e.g. ib0), or leave it out."
            ) from None
        raise


def _wait_for_worker(client: Client, cfg: ClusterConfig) -> None:
    """Block until one worker is connected; a clear error after ``worker_wait_seconds``."""
    seconds = cfg.worker_wait_seconds
    try:
        client.wait_for_workers(1, timeout=seconds)
    except TimeoutError:
        wait = f"`[cluster] worker_wait_seconds` = {seconds:g}"
        if cfg.kind == "address":
            raise EigenstreamError(
                f"The dask scheduler at {cfg.address} has no worker after {seconds:g} s "
                f"({wait}); start workers with `dask worker {cfg.address}` or wait longer."
            ) from None
        queue = f"queue {cfg.queue!r}" if cfg.queue else "the default queue"
        raise EigenstreamError(
            f"No {cfg.kind.upper()} worker job started on {queue} within {seconds:g} s "
            f"({wait}); check it with `{_QUEUES[cfg.kind][2]}`, or raise the wait."
        ) from None


@contextmanager
def _quiet_dask_logs() -> Iterator[None]:
    """Keep dask's own task-failure reports off stderr: failures reach the user as one line
    from the driver. Needed for in-process (thread) workers, which log through this process."""
    logger = logging.getLogger("distributed")
    old = logger.level
    logger.setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        logger.setLevel(old)


@contextmanager
def make_client(cfg: ClusterConfig, memory_limit: str | None = None) -> Iterator[Client]:
    """Yield a connected Client for the run and close what was started afterwards.

    BLAS threads in each worker are capped to the worker's threads, because dask caps BLAS
    but not numba and oversubscribed cores slow the neighbour search; numba too, except
    that local workers may run numba on all the cluster's threads when a task asks for them
    (the single-task neighbour search; `[graph] search_threads`). With a
    ``memory_limit`` ("2GiB") each local worker process gets an equal share of it as its dask
    memory limit (thread workers get none; job-queue workers get ``[cluster] memory`` per job
    instead). For ``slurm``/``pbs`` the cluster is
    kept at ``[cluster] jobs`` jobs (retired jobs are replaced) and the run starts when the
    first worker has connected.
    """
    threads = str(cfg.threads_per_worker)
    environ = {name: threads for name in _THREAD_VARIABLES}
    if cfg.kind == "local":
        # numba's pool may grow to all local threads, for the one task that searches all
        # rows while the other workers wait (stages/neighbors.py sets the threads per call).
        environ["NUMBA_NUM_THREADS"] = str(local_worker_count(cfg) * cfg.threads_per_worker)
    with (
        dask.config.set({"distributed.nanny.pre-spawn-environ": environ}),
        _quiet_dask_logs(),
        _own_environment(),
    ):
        if cfg.kind == "address":
            with _address_client(cfg) as client:
                yield client
        elif cfg.kind in _QUEUES:
            with _jobqueue_client(cfg) as client:
                yield client
        else:
            with _local_client(cfg, memory_limit) as client:
                yield client


@contextmanager
def _own_environment() -> Iterator[None]:
    """Undo the thread variables dask's nannies leave in this process's environment.

    Nannies of a local cluster live in this process and set their pre-spawn environment
    here too (measured); numba then refuses to change its thread count in this process.
    """
    saved = {name: os.environ.get(name) for name in _THREAD_VARIABLES}

    def restore() -> None:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value

    try:
        yield
    finally:
        restore()


@contextmanager
def _address_client(cfg: ClusterConfig) -> Iterator[Client]:
    try:
        client = Client(cfg.address, timeout="20s")
    except OSError as exc:
        raise ConfigError(
            f"Cannot reach the dask scheduler at `[cluster] address` = {cfg.address!r} "
            f"({exc}); start it or fix the address."
        ) from None
    try:
        log.info("dask dashboard: %s", client.dashboard_link)
        _wait_for_worker(client, cfg)
        yield client
    finally:
        client.close()


@contextmanager
def _jobqueue_client(cfg: ClusterConfig) -> Iterator[Client]:
    submit = _QUEUES[cfg.kind][1]
    if shutil.which(submit) is None:
        raise ConfigError(
            f'`[cluster] kind = "{cfg.kind}"` submits worker jobs with `{submit}`, which is not '
            "on PATH here; run on a node of the batch system or choose another kind."
        )
    cluster = jobqueue_cluster(cfg)
    client = None
    try:
        # adapt (not scale) with min = max replaces jobs whose workers retired at --lifetime.
        cluster.adapt(minimum_jobs=cfg.jobs, maximum_jobs=cfg.jobs)
        client = Client(cluster)
        log.info("dask dashboard (on the node running this driver): %s", client.dashboard_link)
        _wait_for_worker(client, cfg)
        yield client
    finally:
        if client is not None:
            client.close()
        cluster.close()  # cancels the worker jobs still queued or running


@contextmanager
def _local_client(cfg: ClusterConfig, memory_limit: str | None) -> Iterator[Client]:
    # "auto" left unresolved (a ClusterConfig used without a run's Config): threads, as for
    # the full graph (config.worker_processes_for).
    processes = cfg.processes is True
    # Worker processes talk over loopback only; threads use in-process transport.
    network: dict[str, Any] = {"host": "127.0.0.1"} if processes else {}
    workers = local_worker_count(cfg)
    limit = memory_bytes(memory_limit) if memory_limit else None
    if limit is not None and processes:
        # Not for thread workers: they share this process, so dask would weigh the driver's
        # memory against each worker's share and pause them for good (measured); there the
        # share only sizes the row blocks (budget.py).
        network["memory_limit"] = max(limit // workers, 256 << 20)
    cluster = LocalCluster(
        n_workers=workers,
        threads_per_worker=cfg.threads_per_worker,
        processes=processes,
        dashboard_address=cfg.dashboard_address,
        silence_logs=logging.CRITICAL,
        **network,
    )
    client = Client(cluster)
    log.info("dask dashboard: %s", client.dashboard_link)
    try:
        yield client
    finally:
        client.close()
        cluster.close()
