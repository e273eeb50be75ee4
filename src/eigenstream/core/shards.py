"""k nearest neighbours when one index cannot hold all rows: shard, query every shard, merge.

Rows are split into S shards; one NN-descent index is built per shard (Dong, Charikar & Li
2011, pynndescent), every row is queried against every shard's index, and each row keeps the k
nearest of its S candidate lists. Each candidate list is a per-shard search, so recall stays that
of a single index (engineering notes: 0.986-0.991 vs 0.993 for one index on a 40k-row mixture)
without any clustering step; the cost is S index builds and S queries of every row. This is the
"partition, search each part, merge the top-k" scheme used for exact blockwise kNN on clusters
(e.g. Dashti et al., PLoS ONE 2013), with an approximate index per part.
"""

from __future__ import annotations

import numpy as np


def shard_ranges(n: int, shards: int) -> list[tuple[int, int]]:
    """``shards`` contiguous row ranges of near-equal size covering 0..n."""
    edges = np.linspace(0, n, shards + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True) if b > a]


def build_shard_index(data: np.ndarray, k: int, *, metric: str, seed: int, n_jobs: int = 1):
    """A prepared NN-descent index over one shard's rows."""
    from pynndescent import NNDescent

    from eigenstream.core.neighbors import route_to_cached_build

    route_to_cached_build()  # the Euclidean build compiles once per machine
    index = NNDescent(data, metric=metric, n_neighbors=min(k + 1, data.shape[0] - 1),
                      random_state=seed, n_jobs=n_jobs)
    index.prepare()
    return index


def query_shard(index, rows: np.ndarray, k: int, *, offset: int, row_ids: np.ndarray,
                epsilon: float = 0.2) -> tuple[np.ndarray, np.ndarray]:
    """k candidates (global ids, distances) of ``rows`` in one shard, their own row excluded.

    ``offset`` is the global id of the shard's first row; ``row_ids`` the global ids of the
    queried rows (a row is never its own neighbour).
    """
    width = min(k + 1, index._raw_data.shape[0])
    idx, dist = index.query(rows, k=width, epsilon=epsilon)
    idx = np.asarray(idx, dtype=np.int64) + offset
    dist = np.asarray(dist, dtype=np.float64)
    dist[idx == row_ids[:, None]] = np.inf  # exclude self by identity, not by position
    order = np.argsort(dist, axis=1, kind="stable")[:, :k]
    return np.take_along_axis(idx, order, axis=1), np.take_along_axis(dist, order, axis=1)


def merge_candidates(lists: list[tuple[np.ndarray, np.ndarray]], k: int):
    """Per row, the k nearest among several (indices, distances) candidate lists."""
    idx = np.concatenate([i for i, _ in lists], axis=1)
    dist = np.concatenate([d for _, d in lists], axis=1)
    order = np.lexsort((idx, dist), axis=1)[:, :k]  # by distance, ties by smaller id
    out_i = np.take_along_axis(idx, order, axis=1)
    out_d = np.take_along_axis(dist, order, axis=1)
    if not np.all(np.isfinite(out_d)):
        raise ValueError("too few candidates to fill every neighbour list; use fewer shards.")
    return out_i, out_d
