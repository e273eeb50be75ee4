"""Connecting a disconnected affinity graph before the eigensolve.

A graph with c components has eigenvalue 1 with multiplicity c; the eigenvectors are arbitrary
mixtures of component indicators and the map is meaningless (Chung 1997; von Luxburg 2007).
Policy used here ("bridging"): every component other than the largest is linked to the largest
one by one edge between their closest pair of rows (so one pass always connects the graph), with weight equal to the median
off-diagonal kernel weight of the graph. The map then places each component as a compact group;
the distance between groups across a bridge says only that they are separate.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from eigenstream.core.neighbors import exact_knn


def closest_pairs(
    data: np.ndarray,
    labels: np.ndarray,
    *,
    metric: str = "euclidean",
    max_candidates: int = 20_000,
    rng: np.random.Generator | None = None,
) -> list[tuple[int, int, float]]:
    """For each component except the largest, its closest row pair to the largest component.

    Parameters
    ----------
    data : ndarray, shape (n, D)
    labels : ndarray of int, shape (n,)
        Component label of each row.
    metric : {"euclidean", "cosine"}
    max_candidates : int, default=20000
        At most this many rows on each side of a search (a seeded sample beyond that), so the
        cost stays bounded for large components; the pair found is then close, not closest.
    rng : numpy Generator, optional

    Returns
    -------
    list of (row_in_component, row_outside, distance)
    """
    rng = np.random.default_rng(0) if rng is None else rng
    sizes = np.bincount(labels)
    largest = int(np.argmax(sizes))
    pairs = []
    for comp in np.argsort(sizes)[::-1]:
        if comp == largest or sizes[comp] == 0:
            continue
        inside = np.flatnonzero(labels == comp)
        outside = np.flatnonzero(labels == largest)
        inside = _subsample(inside, max_candidates, rng)
        outside = _subsample(outside, max_candidates, rng)
        idx, dist = exact_knn(data[outside], 1, metric=metric, query=data[inside])
        best = int(np.argmin(dist[:, 0]))
        pairs.append((int(inside[best]), int(outside[idx[best, 0]]), float(dist[best, 0])))
    return pairs


def _subsample(rows: np.ndarray, limit: int, rng: np.random.Generator) -> np.ndarray:
    if rows.size <= limit:
        return rows
    return np.sort(rng.choice(rows, size=limit, replace=False))


def bridge(K: sp.csr_matrix, pairs: list[tuple[int, int, float]]) -> tuple[sp.csr_matrix, float]:
    """Add symmetric bridge edges to ``K`` with the median off-diagonal weight.

    Returns the new matrix and the weight used.
    """
    if not pairs:
        return K, 0.0
    coo = K.tocoo()
    off = coo.data[coo.row != coo.col]
    weight = float(np.median(off)) if off.size else 1.0
    rows = np.array([p[0] for p in pairs] + [p[1] for p in pairs])
    cols = np.array([p[1] for p in pairs] + [p[0] for p in pairs])
    links = sp.csr_matrix((np.full(rows.size, weight), (rows, cols)), shape=K.shape)
    return (K + links).tocsr(), weight
