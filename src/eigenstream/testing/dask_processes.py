"""Real `dask scheduler` / `dask worker` processes on loopback, for tests of cluster behaviour."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

_QUIET = {"stdout": subprocess.DEVNULL, "stderr": subprocess.DEVNULL}


def start_scheduler(scheduler_file: Path, *, log_length: int = 10_000_000) -> subprocess.Popen:
    """A scheduler on 127.0.0.1 writing its address to ``scheduler_file``.

    ``log_length`` keeps that many scheduler transitions, so tests can count task starts after
    runs whose eigensolver products add thousands of tasks (dask keeps 1,000 by default).
    """
    env = {**os.environ, "DASK_DISTRIBUTED__ADMIN__LOW_LEVEL_LOG_LENGTH": str(log_length)}
    return subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
         "--port", "0", "--dashboard-address", "127.0.0.1:0",
         "--scheduler-file", str(scheduler_file)], env=env, **_QUIET,
    )


def start_workers(scheduler_file: Path, local_directory: Path, *options: str) -> subprocess.Popen:
    """`dask worker` with one thread and 1 GiB per process, plus ``options`` (e.g. --no-nanny)."""
    return subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_worker",
         "--scheduler-file", str(scheduler_file), "--host", "127.0.0.1",
         "--nthreads", "1", "--memory-limit", "1GiB", *options,
         "--local-directory", str(local_directory),
         "--dashboard-address", "127.0.0.1:0"], **_QUIET,
    )
