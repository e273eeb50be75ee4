"""Neighbour stage: the k-nearest-neighbour graph of the rows, written to ``neighbors/data.zarr``.

Outputs ``indices`` (n, k) int64 and ``distances`` (n, k) float64, each row sorted by distance,
the row itself excluded. Small tables (``[graph] exact_max_rows``) use exact search split into
row blocks, one dask task per block (each task writes whole chunks it owns); larger ones use
pynndescent's approximate search in one worker task. The rows are the graph rows of
:mod:`eigenstream.stages.features` (all rows or the landmarks). For the approximate search the
summary keeps pynndescent's compile time apart from the search time (:mod:`eigenstream.warmup`).
"""

from __future__ import annotations

import logging
import time
from functools import partial
from typing import Any

import numpy as np

from eigenstream import warmup
from eigenstream.checkpoint import values_checksum
from eigenstream.core.neighbors import approximate_knn, exact_knn
from eigenstream.core.shards import (
    build_shard_index,
    merge_candidates,
    query_shard,
    shard_ranges,
)
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext
from eigenstream.stages.features import FeatureSpec, graph_rows_spec

log = logging.getLogger(__name__)

# Exact search holds a (block, n) distance matrix per task; this caps it near 128 MiB.
_EXACT_BLOCK_ELEMENTS = 1 << 24


def _exact_block(spec: FeatureSpec, out_path, start, stop, k):
    data = spec.load()
    idx, dist = exact_knn(data, k, metric=spec.metric, query=data[start:stop], query_start=start)
    idx = idx.astype(np.int64, copy=False)
    dist = spec.distances_to_input_units(dist)
    out = store.open_group(out_path, mode="r+")
    out["indices"][start:stop] = idx
    out["distances"][start:stop] = dist
    return start, stop, values_checksum([idx, dist])


def _approximate_all(spec: FeatureSpec, out_path, k, seed, n_jobs) -> tuple[int, float, int]:
    """Search every row with ``n_jobs`` threads (at most numba's limit in this process).

    Returns the rows, the seconds this task spent compiling pynndescent and the threads used.
    """
    n_jobs = _pool_threads(n_jobs)
    compiled = warmup.warm_worker(spec.metric, n_jobs=n_jobs)
    data = spec.load()
    idx, dist = approximate_knn(data, k, metric=spec.metric, seed=seed, n_jobs=n_jobs)
    del data  # the rows are not needed for writing the lists
    out = store.open_group(out_path, mode="r+")
    store.write_rows(out["indices"], idx)
    store.write_rows(out["distances"], spec.distances_to_input_units(dist))
    return idx.shape[0], compiled, n_jobs


def _pool_threads(n_jobs: int) -> int:
    """``n_jobs``, at most the size of numba's thread pool in this process."""
    import numba

    return min(n_jobs, numba.config.NUMBA_NUM_THREADS)


def search_threads(config) -> int:
    """Threads of the single-task approximate search.

    ``[graph] search_threads`` when set; else every thread of a local cluster (its other
    workers wait while the one task runs), or one worker's threads on other cluster kinds.
    """
    from eigenstream.cluster import local_worker_count

    cluster = config.cluster
    if config.graph.search_threads:
        return config.graph.search_threads
    if cluster.kind == "local":
        return local_worker_count(cluster) * cluster.threads_per_worker
    return cluster.threads_per_worker


def _shard_candidates(spec: FeatureSpec, out_path, shard: int, a: int, b: int, k: int,
                      seed: int, n_jobs: int, block: int) -> tuple[int, float]:
    """Build shard ``shard``'s index and write every row's k candidates in it.

    Returns the shard and the seconds this task spent compiling pynndescent.
    """
    import numba

    compiled = warmup.warm_worker(spec.metric, query=True, n_jobs=n_jobs)
    index = build_shard_index(spec.load(a, b), k, metric=spec.metric, seed=seed, n_jobs=n_jobs)
    out = store.open_group(out_path, mode="r+")
    cand_i, cand_d = out[f"shard{shard}/indices"], out[f"shard{shard}/distances"]
    n = spec.n_rows
    before = numba.get_num_threads()
    numba.set_num_threads(_pool_threads(n_jobs))  # this thread only
    try:
        for s, e in store.block_ranges(n, block):
            idx, dist = query_shard(index, spec.load(s, e), k, offset=a, row_ids=np.arange(s, e))
            cand_i[s:e] = idx
            cand_d[s:e] = dist
    finally:
        numba.set_num_threads(before)
    return shard, compiled


def _merge_block(spec: FeatureSpec, out_path, shards: int, start: int, stop: int, k: int):
    out = store.open_group(out_path, mode="r+")
    lists = [
        (np.asarray(out[f"shard{j}/indices"][start:stop]),
         np.asarray(out[f"shard{j}/distances"][start:stop]))
        for j in range(shards)
    ]
    idx, dist = merge_candidates(lists, k)
    dist = spec.distances_to_input_units(dist)
    out["indices"][start:stop] = idx
    out["distances"][start:stop] = dist
    return start, stop, values_checksum([idx, dist])


def _sharded(ctx: StageContext, spec: FeatureSpec, out, out_path: str, n: int, k: int,
             block: int, arrays) -> float:
    """The sharded construction (core/shards.py): shard tasks, then merge tasks per block.

    Returns the longest time a shard task spent compiling pynndescent.
    """
    from distributed import as_completed

    config = ctx.config
    ranges = shard_ranges(n, min(config.graph.shards, n // (k + 2)))
    for j in range(len(ranges)):
        for name, dtype in (("indices", np.int64), ("distances", np.float64)):
            ctx.array(out, f"shard{j}/{name}", shape=(n, k), chunk_rows=block, dtype=dtype)
    folder = ctx.workdir.stage_dir(ctx.name)
    pending = [j for j in range(len(ranges)) if not (folder / f"shard{j}.done").exists()]
    compiled = 0.0
    with ctx.progress(len(ranges), "shards", desc="neighbors (shard indexes)") as bar:
        bar.update(len(ranges) - len(pending))
        futures = [
            ctx.client.submit(_shard_candidates, spec, out_path, j, *ranges[j], k,
                              config.run.seed, config.cluster.threads_per_worker, block,
                              pure=False)
            for j in pending
        ]
        for fut in as_completed(futures):
            shard, seconds = fut.result()
            compiled = max(compiled, seconds)
            (folder / f"shard{shard}.done").write_text("{}")
            bar.update(1)
            ctx.check_stop("a shard index")
    blocks = store.block_ranges(n, block)
    ctx.set_blocks_total(len(blocks))
    finished = ctx.finished_blocks(arrays)
    merges = [
        (i, partial(ctx.client.submit, _merge_block, spec, out_path, len(ranges), s, e, k,
                    pure=False))
        for i, (s, e) in enumerate(blocks) if i not in finished
    ]
    ctx.collect_blocks(merges, blocks, finished, desc="neighbors (merge)")
    return compiled


def choose_method(config, n_rows: int) -> str:
    """"exact" or "approximate" for ``n_rows`` rows under ``[graph] method``."""
    method = config.graph.method
    if method == "auto":
        return "exact" if n_rows <= config.graph.exact_max_rows else "approximate"
    return method


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    spec = graph_rows_spec(ctx.workdir, config)
    n = spec.n_rows
    k = config.graph.neighbors
    method = choose_method(config, n)
    block = max(1, min(config.run.chunk_rows, _EXACT_BLOCK_ELEMENTS // max(n, 1)))
    if method == "approximate":
        block = config.run.chunk_rows
    out = ctx.store(mode="w")
    arrays = [
        ctx.array(out, "indices", shape=(n, k), chunk_rows=block, dtype=np.int64),
        ctx.array(out, "distances", shape=(n, k), chunk_rows=block, dtype=np.float64),
    ]
    out_path = str(ctx.workdir.stage_store(ctx.name))
    client = ctx.client
    timing: dict[str, float] = {}
    if method == "exact":
        warmup.collect(ctx.workdir, cancel=True)
        ranges = store.block_ranges(n, block)
        ctx.set_blocks_total(len(ranges))
        finished = ctx.finished_blocks(arrays)
        tasks = [
            (number, partial(client.submit, _exact_block, spec, out_path, s, e, k, pure=False))
            for number, (s, e) in enumerate(ranges)
            if number not in finished
        ]
        ctx.collect_blocks(tasks, ranges, finished)
    else:
        ahead, waited, warm = warmup.collect(ctx.workdir)
        t0 = time.perf_counter()
        if config.graph.shards > 1:
            in_task = _sharded(ctx, spec, out, out_path, n, k, block, arrays)
        else:
            n_jobs = search_threads(config)
            # to a worker that has compiled already (any other when it has left)
            fut = client.submit(_approximate_all, spec, out_path, k, config.run.seed, n_jobs,
                                pure=False, workers=warm or None,
                                allow_other_workers=bool(warm))
            with ctx.progress(n, "rows") as bar:
                rows, in_task, used = fut.result()
                bar.update(rows)
            timing["search_threads"] = used
        timing.update(_timing(ahead, waited, in_task, time.perf_counter() - t0))
    if method == "approximate" and config.graph.shards > 1:
        method = f"approximate, {config.graph.shards} shards"
    return {"method": method, "neighbors": k, "rows": n, "block_rows": block, "unit": spec.unit,
            **timing}


def _timing(ahead: float | None, waited: float, in_task: float, elapsed: float) -> dict:
    """Compile and search seconds of an approximate search, logged and for the summary.

    ``compile_seconds`` is the longest any worker spent compiling (ahead of the stage or inside
    its task); ``compile_wait_seconds`` the part of it the stage waited for (not overlapped
    with the earlier stages); ``search_seconds`` the rest of the stage.
    """
    timing = {
        "compile_seconds": round(max(ahead or 0.0, in_task), 3),
        "compile_wait_seconds": round(waited, 3),
        "search_seconds": round(max(elapsed - in_task, 0.0), 3),
    }
    log.info("neighbors: compile %.1f s (waited %.1f s of it), search %.1f s",
             timing["compile_seconds"], timing["compile_wait_seconds"], timing["search_seconds"])
    return timing


STAGE = Stage(
    name="neighbors",
    version=1,
    config_keys=(
        "graph.neighbors",
        "graph.metric",
        "graph.method",
        "graph.exact_max_rows",
        "graph.shards",
        "graph.search_threads",
        "run.seed",
        "cluster.threads_per_worker",
    ),
    inputs=("landmarks",),
    run=_run,
)
