"""Graph products on dask worker processes: equal to scipy's, and unharmed by a killed worker.

The oracle throughout is scipy: ``K @ x`` on the in-memory ``scipy.sparse`` matrix, and
``scipy.sparse.linalg.eigsh`` (ARPACK) on it for the eigensolve a worker is killed in. The
clusters are real processes on 127.0.0.1 (a LocalCluster, and `dask scheduler` / `dask worker`
started as in tests/test_cluster.py, here without a nanny so a killed worker stays dead).
"""

from __future__ import annotations

import logging
import os
import signal
import subprocess
import threading
import time
from collections import Counter
from types import SimpleNamespace

import numpy as np
import pytest
import scipy.sparse as sp
from distributed import Client, LocalCluster
from scipy.sparse.linalg import LinearOperator, eigsh

from eigenstream.io import store
from eigenstream.io.graphstore import write_csr
from eigenstream.stages.graph_on_workers import (
    PERSISTED,
    STREAMED,
    WorkerGraph,
    balanced_row_blocks,
)
from eigenstream.testing.dask_processes import start_scheduler, start_workers

pytestmark = pytest.mark.cluster

BLOCK = "graph-block-"


def random_symmetric(n: int, seed: int, per_row: float = 15.0) -> sp.csr_matrix:
    """A random sparse symmetric matrix with about ``per_row`` non-zeros a row (invented)."""
    A = sp.random(n, n, density=per_row / 2 / n, rng=np.random.default_rng(seed), format="csr")
    return (A + A.T).tocsr()


def stored(K: sp.csr_matrix, folder) -> str:
    path = str(folder / "graph.zarr")
    write_csr(store.open_group(path, mode="w"), K)
    return path


def block_keys(client: Client) -> dict[str, list[str]]:
    """Graph-block keys held in memory, per worker address."""
    return {w: sorted(k for k in keys if str(k).startswith(BLOCK))
            for w, keys in client.has_what().items()}


def block_starts():
    """A function for ``run_on_scheduler``: how often each graph-block task was started.

    Built inside a function so cloudpickle ships it by value (the scheduler cannot import
    this test module).
    """

    def count(dask_scheduler) -> dict[str, int]:
        return dict(Counter(
            t.key for t in dask_scheduler.transition_log
            if str(t.key).startswith("graph-block-") and t.finish == "processing"
        ))

    return count


def stop(procs: list[subprocess.Popen]) -> None:
    """Stop processes we started, one after the other, by PID (SIGTERM, then SIGKILL).

    One at a time: a `dask worker` sent SIGTERM after its scheduler has gone was seen still
    running a minute later.
    """
    for proc in procs:
        if proc.poll() is None:
            proc.terminate()
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(timeout=10)


# ---------------------------------------------------------------------------- fixtures


@pytest.fixture(scope="module")
def local_client():
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address="127.0.0.1:0") as cluster, Client(cluster) as client:
        yield client


@pytest.fixture
def nanny_free_workers(tmp_path):
    """`dask scheduler` and two single-thread `dask worker --no-nanny` processes on loopback."""
    scheduler_file = tmp_path / "scheduler.json"
    # The scheduler's transition log must outlast the whole solve for the recomputation count.
    procs = [start_scheduler(scheduler_file)]
    try:
        for i in range(2):
            procs.append(start_workers(scheduler_file, tmp_path / f"worker{i}", "--no-nanny"))
        with Client(scheduler_file=str(scheduler_file), timeout="30s") as client:
            client.wait_for_workers(2, timeout=60)
        yield SimpleNamespace(scheduler_file=str(scheduler_file), procs=procs)
    finally:
        stop(procs[::-1])  # workers first: they outlive their scheduler (engineering notes 2.4)


# ------------------------------------------------------------------------- products


def test_row_blocks_cover_every_row_once_with_even_nonzeros():
    K = random_symmetric(3000, seed=4)
    blocks = balanced_row_blocks(K.indptr, 7)
    assert blocks[0][0] == 0 and blocks[-1][1] == K.shape[0]
    assert all(a[1] == b[0] for a, b in zip(blocks[:-1], blocks[1:], strict=True))
    per_block = [K.indptr[e] - K.indptr[s] for s, e in blocks]
    assert len(blocks) == 7
    # Each cut misses its target by less than one row's non-zeros (rows here: < 60).
    assert max(per_block) - min(per_block) < 120, per_block
    aligned = balanced_row_blocks(K.indptr, 7, align=10_000)
    starts = K.indptr[[s for s, _ in aligned[1:]]]
    # A cut falls at the first row starting at or after a multiple of the alignment.
    assert all(p % 10_000 < 60 for p in starts), starts


@pytest.mark.parametrize(("worker_memory", "mode"), [(None, PERSISTED), (1, STREAMED)])
def test_products_equal_scipy_in_both_modes(local_client, tmp_path, rng, caplog,
                                            worker_memory, mode):
    caplog.set_level(logging.INFO, logger="eigenstream.stages.graph_on_workers")
    K = random_symmetric(2000, seed=7)
    x = rng.standard_normal(2000)
    X = rng.standard_normal((2000, 3))
    with WorkerGraph(local_client, stored(K, tmp_path), worker_memory=worker_memory,
                     blocks_per_worker=3) as graph:
        assert graph.mode == mode
        assert (graph.n, graph.nnz) == (K.shape[0], K.nnz)
        # Reference: scipy.sparse CSR products on the same matrix.
        assert np.allclose(graph.matvec(x), K @ x, rtol=0, atol=1e-12)
        assert np.allclose(graph.matvec(X), K @ X, rtol=0, atol=1e-12)
        assert graph.passes == 2
        held = set().union(*block_keys(local_client).values())  # a block may have 2 copies
        assert len(held) == (len(graph.blocks) if mode == PERSISTED else 0)
        with pytest.raises(ValueError, match=r"shape \(2000,\) or \(2000, b\)"):
            graph.matvec(x[:-1])
    fits = "fits in" if mode == PERSISTED else "does not fit in"
    assert f"graph products on the {mode}: K (" in caplog.text
    assert f"row blocks) {fits} the" in caplog.text
    deadline = time.monotonic() + 10
    while sum(map(len, block_keys(local_client).values())):  # close() released the blocks
        assert time.monotonic() < deadline, block_keys(local_client)
        time.sleep(0.05)


def test_mode_follows_the_workers_memory(local_client, tmp_path):
    K = random_symmetric(2000, seed=8)
    path = stored(K, tmp_path)
    graph_bytes = K.nnz * 16 + (K.shape[0] + 1) * 8
    # Two workers, half of each worker's memory usable: the threshold is graph_bytes per worker.
    with WorkerGraph(local_client, path, worker_memory=graph_bytes) as fits:
        assert fits.mode == PERSISTED
    with WorkerGraph(local_client, path, worker_memory=graph_bytes - 1) as too_big:
        assert too_big.mode == STREAMED


# ---------------------------------------------------------------------- worker loss


@pytest.mark.parametrize("worker_memory", [None, 1], ids=["persisted", "streamed"])
def test_worker_killed_mid_eigensolve(nanny_free_workers, tmp_path, worker_memory):
    n, kill_after = 5000, 40
    K = random_symmetric(n, seed=3)
    v0 = np.random.default_rng(5).standard_normal(n)
    # Reference: ARPACK (scipy eigsh) on the in-memory matrix, same start vector and options.
    ref_values, ref_vectors = eigsh(K, k=3, which="LA", v0=v0, tol=1e-10)
    with Client(scheduler_file=nanny_free_workers.scheduler_file, timeout="30s") as client:
        pids = client.run(os.getpid)
        graph = WorkerGraph(client, stored(K, tmp_path), worker_memory=worker_memory)
        killed: dict = {}

        def kill_mid_solve() -> None:
            deadline = time.monotonic() + 60
            while graph.passes < kill_after and time.monotonic() < deadline:
                time.sleep(0.001)
            held = block_keys(client)
            # Dask's work stealing may have copied some blocks to the other worker; the
            # victim is the worker holding most blocks that exist nowhere else.
            only = {w: set(keys).difference(*(held[o] for o in held if o != w))
                    for w, keys in held.items()}
            victim = max(pids, key=lambda w: len(only.get(w, ())))
            os.kill(pids[victim], signal.SIGKILL)
            killed.update(victim=victim, passes=graph.passes, only=only.get(victim, set()))

        killer = threading.Thread(target=kill_mid_solve, daemon=True)
        killer.start()
        op = LinearOperator((n, n), matvec=graph.matvec, matmat=graph.matvec, dtype=np.float64)
        values, vectors = eigsh(op, k=3, which="LA", v0=v0, tol=1e-10)
        killer.join(timeout=10)
        starts = client.run_on_scheduler(block_starts())
        survivors = set(client.scheduler_info()["workers"])
        held_after = block_keys(client)
        mode = graph.mode
        graph.close()
    assert killed and kill_after <= killed["passes"] < graph.passes  # killed mid-solve
    assert survivors == set(pids) - {killed["victim"]}  # no nanny: the dead worker stayed dead
    assert np.allclose(values, ref_values, rtol=0, atol=1e-10), values - ref_values
    signs = np.sign(np.sum(vectors * ref_vectors, axis=0))
    assert np.allclose(vectors * signs, ref_vectors, rtol=0, atol=1e-8)
    if mode == PERSISTED:
        # The blocks only the killed worker held were read from zarr again, onto the survivor.
        (survivor,) = survivors
        assert killed["only"], "every block had a copy on both workers: nothing to recompute"
        assert killed["only"] <= set(held_after[survivor])
        assert all(starts[key] >= 2 for key in killed["only"]), starts
    else:
        assert not starts and not any(held_after.values())
