"""k-nearest-neighbour search: exact (blocked brute force) and approximate (NN-descent).

Conventions shared by both searches: a row is never its own neighbour (it is removed by
index, so duplicate rows still list each other at distance 0), lists are sorted by ascending
distance, distances are float64 and indices int64. Cosine distance is ``1 - cos``; a row of
zero norm is at cosine distance 1 from every row (including other zero rows).
"""

from __future__ import annotations

import numpy as np

METRICS = ("euclidean", "cosine")

# Bytes of float64 scratch per block of the (block x n) distance matrix.
_BLOCK_BYTES = 64 * 2**20
# Extra candidates re-checked with exact differences beyond the k requested.
_EXTRA_CANDIDATES = 8


def _check_metric(metric: str) -> None:
    if metric not in METRICS:
        raise ValueError(f"metric must be one of {METRICS}; got {metric!r}.")


def _as_features(x: np.ndarray, metric: str) -> tuple[np.ndarray, np.ndarray | None]:
    """Rows in the space where the distance is (a multiple of) squared Euclidean.

    For cosine the rows are scaled to unit norm, since ``1 - cos = |u - v|^2 / 2`` for unit
    vectors; the boolean mask of zero-norm rows is returned alongside.
    """
    x = np.asarray(x, dtype=np.float64)
    if metric == "euclidean":
        return x, None
    norms = np.linalg.norm(x, axis=1)
    zero = norms == 0
    safe = np.where(zero, 1.0, norms)
    return x / safe[:, None], zero


def _finish(d2: np.ndarray, metric: str, zero_q, zero_x) -> np.ndarray:
    """Squared feature distances -> reported distances (broadcasting zero masks)."""
    if metric == "euclidean":
        return np.sqrt(d2)
    dist = 0.5 * d2
    if zero_q is not None:
        # A zero row has no direction: distance 1 is what 1 - cos gives with cos := 0.
        dist = np.where(zero_q | zero_x, 1.0, dist)
    return dist


def _block_rows(n: int, width: int) -> int:
    """Query rows per block so that (block x n) and (block x width) float64 scratch stay small."""
    return int(max(1, min(4096, _BLOCK_BYTES // (8 * max(n, width, 1)))))


def exact_knn(
    data: np.ndarray,
    k: int,
    *,
    metric: str = "euclidean",
    query: np.ndarray | None = None,
    query_start: int | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Exact k nearest rows of ``data`` for each query row.

    Parameters
    ----------
    data : ndarray, shape (n, D)
        Reference rows.
    k : int
        Neighbours per query row.
    metric : {"euclidean", "cosine"}
        Distance. Cosine distance is ``1 - cos``; zero-norm rows are at distance 1.
    query : ndarray, shape (m, D), optional
        Query rows; defaults to ``data``.
    query_start : int, optional
        When given, query row ``r`` is data row ``query_start + r`` and is excluded from its
        own list by index. With ``query=None`` it defaults to 0 (self excluded).

    Returns
    -------
    indices : ndarray of int64, shape (m, k)
    distances : ndarray of float64, shape (m, k)
        Sorted by ascending distance; ties go to the smaller index. Memory is
        O(block * n), not O(m * n).
    """
    _check_metric(metric)
    feats, zero = _as_features(data, metric)
    # Centering leaves Euclidean distances unchanged and shrinks the GEMM cancellation error.
    center = feats.mean(axis=0) if metric == "euclidean" else 0.0
    feats = feats - center
    if query is None:
        qfeats, qzero = feats, zero
        query_start = 0 if query_start is None else query_start
    else:
        qfeats, qzero = _as_features(query, metric)
        qfeats = qfeats - center
    n, m = feats.shape[0], qfeats.shape[0]
    available = n - (1 if query_start is not None else 0)
    if not 1 <= k <= available:
        raise ValueError(f"k must be in [1, {available}] for {n} reference rows; got {k}.")
    if query_start is not None and not 0 <= query_start <= n - m:
        raise ValueError(f"query_start={query_start} puts {m} query rows outside {n} data rows.")
    ref = _Reference(feats, zero, metric)
    block = _block_rows(n, (k + _EXTRA_CANDIDATES) * feats.shape[1])
    out_i = np.empty((m, k), dtype=np.int64)
    out_d = np.empty((m, k), dtype=np.float64)
    for r0 in range(0, m, block):
        sl = slice(r0, min(m, r0 + block))
        selves = None if query_start is None else query_start + np.arange(sl.start, sl.stop)
        out_i[sl], out_d[sl] = ref.block(
            qfeats[sl], None if qzero is None else qzero[sl], k, selves
        )
    return out_i, out_d


class _Reference:
    """Reference rows prepared once for blocked exact search."""

    def __init__(self, feats: np.ndarray, zero: np.ndarray | None, metric: str):
        self.feats, self.zero, self.metric = feats, zero, metric
        self.sq = np.einsum("ij,ij->i", feats, feats)

    def exact(self, q, qzero, cols, selves):
        """Distances of query rows ``q`` (m, D) to reference ``cols`` (m, c) by differences."""
        diff = q[:, None, :] - self.feats[cols]
        zq = None if qzero is None else qzero[:, None]
        zx = None if self.zero is None else self.zero[cols]
        dist = _finish(np.einsum("ijk,ijk->ij", diff, diff), self.metric, zq, zx)
        if selves is not None:
            dist[cols == selves[:, None]] = np.inf
        return dist

    def block(self, q, qzero, k, selves):
        """Exact kNN of one block of query rows.

        The GEMM form ranks all columns cheaply; the best ``k + extra`` are re-measured by
        direct differences (exact zeros for duplicates, no cancellation), and rows where an
        excluded column could still tie or win within the GEMM rounding bound are redone.
        """
        m, n = q.shape[0], self.feats.shape[0]
        qsq = np.einsum("ij,ij->i", q, q)
        # Squared feature distances rank like the reported ones; built in place to save memory.
        d2 = q @ self.feats.T
        d2 *= -2.0
        d2 += qsq[:, None]
        d2 += self.sq[None, :]
        np.maximum(d2, 0.0, out=d2)  # rounding can make tiny squared distances negative
        if self.zero is not None:  # cosine: zero rows sit at distance 1, i.e. d2 = 2
            d2[qzero] = 2.0
            d2[:, self.zero] = 2.0
        if selves is not None:
            d2[np.arange(m), selves] = np.inf
        # Rounding bound of the GEMM form (in d2 units).
        tol = 16 * np.finfo(np.float64).eps * (qsq + self.sq.max()) * q.shape[1] ** 0.5
        c = min(n, k + _EXTRA_CANDIDATES)
        if c < n:
            cand = np.argpartition(d2, c - 1, axis=1)[:, :c]
        else:
            cand = np.tile(np.arange(n), (m, 1))
        dist = self.exact(q, qzero, cand, selves)
        order = np.lexsort((cand, dist), axis=1)[:, :k]
        idx = np.take_along_axis(cand, order, axis=1)
        dist = np.take_along_axis(dist, order, axis=1)
        if c < n:
            np.put_along_axis(d2, cand, np.inf, axis=1)
            kth2 = self._to_d2(dist[:, -1])
            unsure = d2.min(axis=1) - tol <= kth2 + tol
            for r in np.flatnonzero(unsure):
                idx[r], dist[r] = self._redo_row(
                    q[r], qzero, r, d2[r], kth2[r] + 2 * tol[r], idx[r], k, selves
                )
        return idx, dist

    def _to_d2(self, dist: np.ndarray) -> np.ndarray:
        """Reported distances -> squared feature distances (inverse of ``_finish``)."""
        return dist * dist if self.metric == "euclidean" else 2.0 * dist

    def _redo_row(self, x, qzero, r, d2_row, limit, current, k, selves):
        """One row whose candidate set was too small (many near-ties): widen and re-rank."""
        extra = np.flatnonzero(d2_row <= limit)
        cols = np.union1d(current, extra)
        dist = self.exact(
            x[None, :],
            None if qzero is None else qzero[r : r + 1],
            cols[None, :],
            None if selves is None else selves[r : r + 1],
        )[0]
        order = np.lexsort((cols, dist))[:k]
        return cols[order], dist[order]


def approximate_knn(
    data: np.ndarray,
    k: int,
    *,
    metric: str = "euclidean",
    seed: int = 0,
    n_jobs: int = 1,
) -> tuple[np.ndarray, np.ndarray]:
    """Approximate k nearest neighbours of every row by NN-descent (pynndescent).

    Parameters
    ----------
    data : ndarray, shape (n, D)
    k : int
        Neighbours per row (self excluded).
    metric : {"euclidean", "cosine"}
    seed : int
        Random state of the search; the graph depends on ``(seed, n_jobs)``.
    n_jobs : int
        Threads used by the search.

    Returns
    -------
    indices : ndarray of int64, shape (n, k)
    distances : ndarray of float64, shape (n, k)
        Sorted by ascending distance.
    """
    _check_metric(metric)
    from pynndescent import NNDescent  # heavy import (numba); only when needed

    data = np.asarray(data)
    if not 1 <= k <= data.shape[0] - 1:
        raise ValueError(f"k must be in [1, {data.shape[0] - 1}]; got {k}.")
    index = NNDescent(data, metric=metric, n_neighbors=k + 1, random_state=seed, n_jobs=n_jobs)
    idx, dist = index.neighbor_graph
    return drop_self(np.asarray(idx, dtype=np.int64), np.asarray(dist, dtype=np.float64))


def drop_self(indices: np.ndarray, distances: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Remove each row's own index from its (k+1)-list; rows without it lose the last column.

    Parameters
    ----------
    indices : ndarray of int, shape (n, k+1)
    distances : ndarray of float, shape (n, k+1)

    Returns
    -------
    indices, distances : ndarrays, shape (n, k)
    """
    n, kp1 = indices.shape
    is_self = indices == np.arange(n)[:, None]
    has_self = is_self.any(axis=1)
    drop = np.where(has_self, is_self.argmax(axis=1), kp1 - 1)
    keep = np.ones_like(is_self)
    keep[np.arange(n), drop] = False
    out_i = indices[keep].reshape(n, kp1 - 1)
    out_d = distances[keep].reshape(n, kp1 - 1)
    if np.any(out_i < 0):
        raise ValueError(
            "the approximate search left some neighbour slots empty; use fewer neighbours."
        )
    return out_i, out_d


def knn_recall(approx_indices: np.ndarray, exact_indices: np.ndarray) -> float:
    """Mean fraction of each row's exact neighbours found by the approximate search.

    Parameters
    ----------
    approx_indices, exact_indices : ndarray of int, shape (n, k)

    Returns
    -------
    float in [0, 1]
    """
    a = np.asarray(approx_indices, dtype=np.int64)
    e = np.asarray(exact_indices, dtype=np.int64)
    if a.shape[0] != e.shape[0]:
        raise ValueError("approx_indices and exact_indices must have the same number of rows.")
    span = int(max(a.max(initial=0), e.max(initial=0))) + 1
    # Offset each row's ids so one flat membership test answers all rows at once.
    a_keys = (a + span * np.arange(a.shape[0])[:, None]).ravel()
    e_keys = (e + span * np.arange(e.shape[0])[:, None]).ravel()
    found = np.isin(e_keys, a_keys).reshape(e.shape)
    return float(found.mean())
