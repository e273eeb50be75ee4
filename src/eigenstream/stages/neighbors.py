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

from eigenstream.checkpoint import values_checksum
from eigenstream.core.moments import standardizer
from eigenstream.core.neighbors import approximate_knn, exact_knn
from eigenstream.io import store
from eigenstream.pipeline import Stage, StageContext

# Exact search holds a (block, n) distance matrix per task; this caps it near 128 MiB.
_EXACT_BLOCK_ELEMENTS = 1 << 24


def load_features(rows_path: str, mean: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """The feature matrix as the neighbour search sees it: (rows - mean) / scale."""
    rows = np.asarray(store.open_group(rows_path, mode="r")["rows"][...])
    return ((rows - mean) / scale).astype(rows.dtype, copy=False)


def feature_transform(group, standardize: bool) -> tuple[np.ndarray, np.ndarray, float]:
    """Shift, per-column scale and distance unit of the features.

    Without standardisation the rows are only divided by a power of two near their
    root-mean-square value: exact in floating point, and it keeps squared distances of
    tables holding 1e30 or 1e-30 inside float32 range. Distances are multiplied back by
    that unit, so they are in the input's units.
    """
    mean, std = np.asarray(group["mean"][...]), np.asarray(group["std"][...])
    if standardize:
        shift, scale = standardizer(mean, std)
        return shift, scale, 1.0
    rms = float(np.sqrt(np.mean(std**2 + mean**2)))
    unit = 2.0 ** np.round(np.log2(rms)) if rms > 0 and np.isfinite(rms) else 1.0
    return np.zeros_like(mean), np.full_like(mean, unit), unit


def _exact_block(rows_path, out_path, start, stop, k, metric, shift, scale, unit):
    data = load_features(rows_path, shift, scale)
    idx, dist = exact_knn(data, k, metric=metric, query=data[start:stop], query_start=start)
    idx = idx.astype(np.int64, copy=False)
    dist = dist * (unit if metric == "euclidean" else 1.0)
    out = store.open_group(out_path, mode="r+")
    out["indices"][start:stop] = idx
    out["distances"][start:stop] = dist
    return start, stop, values_checksum([idx, dist])


def _approximate_all(rows_path, out_path, k, metric, seed, n_jobs, shift, scale, unit) -> int:
    data = load_features(rows_path, shift, scale)
    idx, dist = approximate_knn(data, k, metric=metric, seed=seed, n_jobs=n_jobs)
    out = store.open_group(out_path, mode="r+")
    out["indices"][...] = idx
    out["distances"][...] = dist * (unit if metric == "euclidean" else 1.0)
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
    shift, scale, unit = feature_transform(read_group, config.prep.standardize)
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
            client.submit(
                _exact_block, rows_path, out_path, s, e, k, config.graph.metric, shift, scale,
                unit, pure=False,
            ): number
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
        fut = client.submit(
            _approximate_all, rows_path, out_path, k, config.graph.metric, config.run.seed,
            n_jobs, shift, scale, unit, pure=False,
        )
        with ctx.progress(n, "rows") as bar:
            bar.update(fut.result())
    return {"method": method, "neighbors": k, "rows": n, "block_rows": block, "unit": unit}


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
