"""Neighbour stage: the k-nearest-neighbour graph of the rows, written to ``neighbors/data.zarr``.

Outputs ``indices`` (n, k) int64 and ``distances`` (n, k) float64, each row sorted by distance,
the row itself excluded. Small tables (``[graph] exact_max_rows``) use exact search split into
row blocks, one dask task per block (each task writes whole chunks it owns); larger ones use
pynndescent's approximate search in one worker task. The rows are the graph rows of
:mod:`eigenstream.stages.features` (all rows or the landmarks).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from eigenstream.checkpoint import values_checksum
from eigenstream.core.neighbors import approximate_knn, exact_knn
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext
from eigenstream.stages.features import FeatureSpec, graph_rows_spec

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


def _approximate_all(spec: FeatureSpec, out_path, k, seed, n_jobs) -> int:
    data = spec.load()
    idx, dist = approximate_knn(data, k, metric=spec.metric, seed=seed, n_jobs=n_jobs)
    out = store.open_group(out_path, mode="r+")
    out["indices"][...] = idx
    out["distances"][...] = spec.distances_to_input_units(dist)
    return data.shape[0]


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
    if method == "exact":
        ranges = store.block_ranges(n, block)
        ctx.set_blocks_total(len(ranges))
        finished = ctx.finished_blocks(arrays)
        futures = {
            client.submit(_exact_block, spec, out_path, s, e, k, pure=False): number
            for number, (s, e) in enumerate(ranges)
            if number not in finished
        }
        with ctx.progress(n, "rows") as bar:
            bar.update(sum(e - s for i, (s, e) in enumerate(ranges) if i in finished))
            for fut in _as_completed(list(futures)):
                s, e, crc = fut.result()
                ctx.mark_block(futures[fut], s, e, crc)
                bar.update(e - s)
                ctx.check_stop(f"rows {s + 1}-{e}")
    else:
        n_jobs = config.cluster.threads_per_worker
        fut = client.submit(_approximate_all, spec, out_path, k, config.run.seed, n_jobs,
                            pure=False)
        with ctx.progress(n, "rows") as bar:
            bar.update(fut.result())
    return {"method": method, "neighbors": k, "rows": n, "block_rows": block, "unit": spec.unit}


def _as_completed(futures):
    from distributed import as_completed

    return as_completed(futures)


STAGE = Stage(
    name="neighbors",
    version=1,
    config_keys=(
        "graph.neighbors",
        "graph.metric",
        "graph.method",
        "graph.exact_max_rows",
        "run.seed",
        "cluster.threads_per_worker",
    ),
    inputs=("landmarks",),
    run=_run,
)
