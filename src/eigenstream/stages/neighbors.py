"""Neighbour stage: the k-nearest-neighbour graph of the rows, written to ``neighbors/data.zarr``.

Outputs ``indices`` (n, k) int64 and ``distances`` (n, k) float64, each row sorted by distance,
the row itself excluded. Small tables (``[graph] exact_max_rows``) use exact search split into
row blocks, one dask task per block (each task writes whole chunks it owns); larger ones use
pynndescent's approximate search in one worker task. The features are the stored rows,
standardised first when ``[prep] standardize`` is on.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from eigenstream.core.moments import standardizer
from eigenstream.core.neighbors import approximate_knn, exact_knn
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext

# Exact search holds a (block, n) distance matrix per task; this caps it near 128 MiB.
_EXACT_BLOCK_ELEMENTS = 1 << 24


def load_features(rows_path: str, mean: np.ndarray | None, scale: np.ndarray | None) -> np.ndarray:
    """The feature matrix as the neighbour search sees it (standardised when asked)."""
    rows = np.asarray(store.open_group(rows_path, mode="r")["rows"][...])
    if mean is None:
        return rows
    return ((rows - mean) / scale).astype(rows.dtype, copy=False)


def _exact_block(rows_path, out_path, start, stop, k, metric, mean, scale) -> tuple[int, int]:
    data = load_features(rows_path, mean, scale)
    idx, dist = exact_knn(data, k, metric=metric, query=data[start:stop], query_start=start)
    out = store.open_group(out_path, mode="r+")
    out["indices"][start:stop] = idx
    out["distances"][start:stop] = dist
    return start, stop


def _approximate_all(rows_path, out_path, k, metric, seed, n_jobs, mean, scale) -> int:
    data = load_features(rows_path, mean, scale)
    idx, dist = approximate_knn(data, k, metric=metric, seed=seed, n_jobs=n_jobs)
    out = store.open_group(out_path, mode="r+")
    out["indices"][...] = idx
    out["distances"][...] = dist
    return data.shape[0]


def choose_method(config, n_rows: int) -> str:
    """"exact" or "approximate" for ``n_rows`` rows under ``[graph] method``."""
    method = config.graph.method
    if method == "auto":
        return "exact" if n_rows <= config.graph.exact_max_rows else "approximate"
    return method


def _run(ctx: StageContext) -> dict[str, Any]:
    config = ctx.config
    rows_path = str(ctx.workdir.stage_store("read"))
    read_group = ctx.input_store("read")
    n = read_group["rows"].shape[0]
    k = config.graph.neighbors
    mean = scale = None
    if config.prep.standardize:
        mean, scale = standardizer(read_group["mean"][...], read_group["std"][...])
    method = choose_method(config, n)
    block = max(1, min(config.run.chunk_rows, _EXACT_BLOCK_ELEMENTS // max(n, 1)))
    if method == "approximate":
        block = config.run.chunk_rows
    out = ctx.store(mode="w")
    store.create_array(out, "indices", shape=(n, k), chunk_rows=block, dtype=np.int64)
    store.create_array(out, "distances", shape=(n, k), chunk_rows=block, dtype=np.float64)
    out_path = str(ctx.workdir.stage_store(ctx.name))
    client = ctx.client
    if method == "exact":
        ranges = store.block_ranges(n, block)
        futures = [
            client.submit(
                _exact_block, rows_path, out_path, s, e, k, config.graph.metric, mean, scale,
                pure=False,
            )
            for s, e in ranges
        ]
        with ctx.progress(n, "rows") as bar:
            for fut in _as_completed(futures):
                s, e = fut.result()
                bar.update(e - s)
    else:
        n_jobs = config.cluster.threads_per_worker
        fut = client.submit(
            _approximate_all, rows_path, out_path, k, config.graph.metric, config.run.seed,
            n_jobs, mean, scale, pure=False,
        )
        with ctx.progress(n, "rows") as bar:
            bar.update(fut.result())
    return {"method": method, "neighbors": k, "rows": n, "block_rows": block}


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
        "prep.standardize",
        "run.seed",
        "cluster.threads_per_worker",
    ),
    inputs=("read",),
    run=_run,
)
