"""The one place a dask.distributed Client is made for a run.

``kind = "local"`` starts a LocalCluster on this machine (loopback only, dashboard on
127.0.0.1 with a free port); ``kind = "address"`` connects to a running scheduler.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Iterator
from contextlib import contextmanager

import dask
from distributed import Client, LocalCluster

from eigenstream.config import ClusterConfig, memory_bytes
from eigenstream.errors import ConfigError

log = logging.getLogger(__name__)


def local_worker_count(cfg: ClusterConfig) -> int:
    """Workers for a local cluster: the configured number, else one per core (at most 4)."""
    if cfg.workers:
        return cfg.workers
    cores = os.cpu_count() or 1
    return max(1, min(4, cores // cfg.threads_per_worker))


@contextmanager
def make_client(cfg: ClusterConfig, memory_limit: str | None = None) -> Iterator[Client]:
    """Yield a connected Client for the run and close what was started afterwards.

    Numba and BLAS threads in each worker are capped to the worker's threads, because dask
    caps BLAS but not numba and oversubscribed cores slow the neighbour search. With a
    ``memory_limit`` ("2GiB") each local worker gets an equal share of it.
    """
    threads = str(cfg.threads_per_worker)
    environ = {
        "NUMBA_NUM_THREADS": threads,
        "OMP_NUM_THREADS": threads,
        "OPENBLAS_NUM_THREADS": threads,
        "MKL_NUM_THREADS": threads,
    }
    with dask.config.set({"distributed.nanny.pre-spawn-environ": environ}):
        if cfg.kind == "address":
            try:
                client = Client(cfg.address, timeout="20s")
            except OSError as exc:
                raise ConfigError(
                    f"Cannot reach the dask scheduler at `[cluster] address` = {cfg.address!r} "
                    f"({exc}); start it or fix the address."
                ) from None
            try:
                yield client
            finally:
                client.close()
            return
        # Worker processes talk over loopback only; threads use in-process transport.
        network = {"host": "127.0.0.1"} if cfg.processes else {}
        workers = local_worker_count(cfg)
        limit = memory_bytes(memory_limit) if memory_limit else None
        if limit is not None:
            network["memory_limit"] = max(limit // workers, 256 << 20)
        cluster = LocalCluster(
            n_workers=workers,
            threads_per_worker=cfg.threads_per_worker,
            processes=cfg.processes,
            dashboard_address=cfg.dashboard_address,
            silence_logs=logging.ERROR,
            **network,
        )
        client = Client(cluster)
        log.info("dask dashboard: %s", client.dashboard_link)
        try:
            yield client
        finally:
            client.close()
            cluster.close()
