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


def _block_rows(n: int, width: int, scratch_bytes: int | None = None) -> int:
    """Query rows per block so that (block x n) and (block x width) float64 scratch stay small."""
    budget = _BLOCK_BYTES if scratch_bytes is None else scratch_bytes
    return int(max(1, min(4096, budget // (8 * max(n, width, 1)))))


def exact_knn(
    data: np.ndarray,
    k: int,
    *,
    metric: str = "euclidean",
    query: np.ndarray | None = None,
    query_start: int | None = None,
    scratch_bytes: int | None = None,
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
    scratch_bytes : int, optional
        Bytes of float64 scratch per block of query rows (default 64 MiB); smaller blocks
        take a little longer.

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
    block = _block_rows(n, (k + _EXTRA_CANDIDATES) * feats.shape[1], scratch_bytes)
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

    Both metrics search with pynndescent's Euclidean build (cached on disk by
    :mod:`eigenstream.core.descent`); for cosine the rows are first scaled to unit norm, and
    zero rows are moved to distance sqrt(2) (cosine distance 1) from every unit row by an extra
    column.

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
    data = np.asarray(data)
    if not 1 <= k <= data.shape[0] - 1:
        raise ValueError(f"k must be in [1, {data.shape[0] - 1}]; got {k}.")
    from pynndescent import NNDescent  # heavy import (numba); only when needed

    route_to_cached_build()
    feats, zero = _search_features(data, metric)
    index = NNDescent(feats, metric="euclidean", n_neighbors=k + 1, random_state=seed,
                      n_jobs=n_jobs)
    idx, dist = index.neighbor_graph
    # The index (its forest, heap and search state) goes before the lists are trimmed and
    # widened, on pynndescent's int32/float32 (1M rows: this call's peak 1,297 -> 997 MiB
    # resident; the neighbour stage's 1,343 -> 1,259).
    del index
    idx, dist = drop_self(idx, dist)
    idx, dist = idx.astype(np.int64), dist.astype(np.float64)
    if metric == "cosine":
        dist = _finish(dist**2, metric, None if zero is None else zero[:, None],
                       None if zero is None else zero[idx])
    return idx, dist


def route_to_cached_build() -> bool:
    """Let pynndescent's Euclidean build run the cached copy of :mod:`eigenstream.core.descent`.

    Returns False (pynndescent's own build is used) for releases other than the copied one.
    """
    try:
        from eigenstream.core import descent
    except ImportError:  # a release without the internals the copy calls
        return False
    return descent.install()


def _search_features(data: np.ndarray, metric: str) -> tuple[np.ndarray, np.ndarray | None]:
    """C-contiguous float32 rows for the Euclidean build, and the cosine zero-row mask."""
    if metric == "euclidean":
        return np.ascontiguousarray(data, dtype=np.float32), None
    feats, zero = _as_features(data, metric)
    if zero.any():
        feats = np.hstack([feats, zero[:, None].astype(feats.dtype)])
    else:
        zero = None
    return np.ascontiguousarray(feats, dtype=np.float32), zero


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


# Bytes of scratch per query sub-block of a kernel-support search (float32 ranking matrix,
# its partitioned copy, masks and the exact re-measure of the candidate pairs).
_SUPPORT_BYTES = 64 * 2**20
# Bytes per (query row, reference row) entry of that scratch: the float32 ranking matrix and
# its partitioned copy (4 + 4) and two boolean masks (1 + 1), rounded up.
SUPPORT_ENTRY_BYTES = 12
# Candidate pairs re-measured by differences at a time.
PAIR_BLOCK = 1 << 14


def kernel_support(
    data: np.ndarray,
    query: np.ndarray,
    k: int,
    radius: np.ndarray,
    *,
    metric: str = "euclidean",
) -> tuple[np.ndarray, np.ndarray]:
    """Reference rows near each query row: its k + 8 nearest and all within their own radius.

    For each query row y this returns, with exact distances, every reference row x_j that is
    among the ``k + 8`` nearest to y or satisfies ``d(y, x_j) <= radius[j]``, and possibly a
    few more. Rows are ranked in float32 (one GEMM against all reference rows); every
    candidate within the float32 rounding bound of either test is re-measured by direct
    differences in float64, so the k nearest and the radius test are exact.

    Parameters
    ----------
    data : ndarray, shape (n, D)
        Reference rows.
    query : ndarray, shape (m, D)
    k : int
        Nearest rows wanted; 8 more are kept so that exact zero distances (copies) still
        leave k at positive distance.
    radius : ndarray, shape (n,)
        Per reference row, the distance within which it joins a query row's support.
    metric : {"euclidean", "cosine"}

    Returns
    -------
    indices : ndarray of int64, shape (m, w)
    distances : ndarray of float64, shape (m, w)
        Each row sorted by ascending distance (ties to the smaller index); rows with fewer
        than ``w`` entries are padded with index 0 at distance +inf. Rows where copies
        crowd out the k positive nearest are searched against all reference rows.

    See Also
    --------
    kernel_support_blocks : the same, one query sub-block at a time (bounded memory).
    """
    pieces = [(i, d) for _, _, i, d in kernel_support_blocks(data, query, k, radius,
                                                             metric=metric)]
    if not pieces:
        return np.zeros((0, 1), dtype=np.int64), np.full((0, 1), np.inf)
    return _stack_padded(pieces)


def nearest_in_blocks(query, blocks, k, *, metric="euclidean"):
    """Exact k nearest rows of ``query`` among reference rows given block by block.

    Parameters
    ----------
    query : ndarray, shape (m, D)
    blocks : iterable of (start, ndarray (b, D))
        Consecutive reference blocks and the number of their first row; only one block and
        the running lists are held at a time.
    k : int
    metric : {"euclidean", "cosine"}

    Returns
    -------
    indices : ndarray of int64, shape (m, k)
    distances : ndarray of float64, shape (m, k)
        Sorted by ascending distance, ties to the smaller index (as :func:`exact_knn`, which
        also excludes nothing when given a query).
    """
    m = np.shape(query)[0]
    best_i = np.zeros((m, 0), dtype=np.int64)
    best_d = np.zeros((m, 0))
    for start, block in blocks:
        # radius 0: only the k + 8 nearest (and copies) of this block come back, measured exactly
        idx, dist = kernel_support(block, query, min(k, len(block)), np.zeros(len(block)),
                                   metric=metric)
        best_i = np.concatenate([best_i, idx + start], axis=1)
        best_d = np.concatenate([best_d, dist], axis=1)
        order = np.lexsort((best_i, best_d), axis=1)[:, :k]
        best_i = np.take_along_axis(best_i, order, axis=1)
        best_d = np.take_along_axis(best_d, order, axis=1)
    if best_i.shape[1] < k or not np.all(np.isfinite(best_d)):
        raise ValueError(f"k = {k} exceeds the number of reference rows.")
    return best_i, best_d


def support_block_rows(reference_rows: int) -> int:
    """Query rows per sub-block of :func:`kernel_support_blocks` for ``reference_rows`` rows."""
    return int(max(1, min(4096, _SUPPORT_BYTES // (SUPPORT_ENTRY_BYTES * max(reference_rows, 1)))))


def kernel_support_blocks(data, query, k, radius, *, metric="euclidean"):
    """:func:`kernel_support` of consecutive query sub-blocks, as (start, stop, indices, distances).

    Sub-blocks hold :func:`support_block_rows` rows, so the scratch stays near 64 MiB and
    each padded result is only as wide as that sub-block needs.
    """
    _check_metric(metric)
    feats, zero = _as_features(data, metric)
    center = feats.mean(axis=0) if metric == "euclidean" else 0.0
    feats = feats - center
    qfeats, qzero = _as_features(query, metric)
    qfeats = qfeats - center
    n, m = feats.shape[0], qfeats.shape[0]
    if not 1 <= k <= n:
        raise ValueError(f"k must be in [1, {n}] for {n} reference rows; got {k}.")
    radius = np.asarray(radius, dtype=np.float64)
    if radius.shape != (n,):
        raise ValueError(f"radius must have shape ({n},); got {radius.shape}.")
    ref = _Reference(feats, zero, metric)
    ranker = _Ranker(ref, ref._to_d2(radius))
    block = support_block_rows(n)
    for r0 in range(0, m, block):
        sl = slice(r0, min(m, r0 + block))
        idx, dist = ranker.block(qfeats[sl], None if qzero is None else qzero[sl],
                                 min(n, k + _EXTRA_CANDIDATES), k)
        yield sl.start, sl.stop, idx, dist


class _Ranker:
    """float32 ranking of query blocks against prepared reference rows, exact re-measure."""

    def __init__(self, ref: _Reference, reach2: np.ndarray):
        self.ref = ref
        self.feats32 = ref.feats.astype(np.float32)
        self.sq32 = ref.sq.astype(np.float32)
        self.reach2 = reach2
        # rounded up, so that the float32 test never drops a pair the exact test keeps
        self.reach2_32 = np.nextafter(reach2.astype(np.float32), np.float32(np.inf))
        self.dim = ref.feats.shape[1]

    def block(self, q, qzero, c, k):
        """Support of one block of query rows as padded (indices, distances)."""
        qsq = np.einsum("ij,ij->i", q, q)
        # Rounding bound of the float32 form (inputs, products and sums; in d2 units).
        tol = (16 * np.finfo(np.float32).eps * (qsq + self.ref.sq.max()) * self.dim**0.5)
        # d2 - tol, a lower bound of every squared distance, built in place
        d2 = q.astype(np.float32) @ self.feats32.T
        d2 *= -2.0
        d2 += (qsq - tol).astype(np.float32)[:, None]
        d2 += self.sq32[None, :]
        if self.ref.zero is not None:  # cosine: zero rows sit at distance 1, i.e. d2 = 2
            d2[qzero] = 2.0 - tol[qzero].astype(np.float32)[:, None]
            d2[:, self.ref.zero] = (2.0 - tol.astype(np.float32))[:, None]
        if c < d2.shape[1]:
            kth = _kth_upper_bound(d2, c) + 2 * tol.astype(np.float32)
            mask = d2 <= kth[:, None]
        else:
            mask = np.ones(d2.shape, dtype=bool)
        mask |= d2 <= self.reach2_32[None, :]
        d2_width = d2.shape[1]
        del d2
        flat = np.flatnonzero(mask)
        del mask
        rows, cols = np.divmod(flat, d2_width)
        dist = self._measure(q, qzero, rows, cols)
        idx, out = _pad_rows(rows, cols, dist, q.shape[0])
        # The c nearest are certain to be candidates; with more than c - k copies among them
        # the k-th nearest at positive distance may lie beyond, so such rows are redone.
        copies = (out == 0).sum(axis=1)
        positive = ((out > 0) & np.isfinite(out)).sum(axis=1)
        crowded = np.flatnonzero((copies > c - k) | (positive < min(k, self.ref.feats.shape[0])))
        for r in crowded:  # copies fill the candidates: rank this row against every row
            cols_r, dist_r = self._whole_row(q[r : r + 1], None if qzero is None
                                             else qzero[r : r + 1], c)
            idx, out = _replace_row(idx, out, r, cols_r, dist_r)
        return idx, out

    def _whole_row(self, x, xzero, c):
        """Support of one query row measured exactly against every reference row."""
        every = np.arange(self.ref.feats.shape[0])
        dist = self.ref.exact(x, xzero, every[None, :], None)[0]
        order = np.lexsort((every, dist))
        positive = order[dist[order] > 0][:c]
        keep = np.zeros(every.size, dtype=bool)
        keep[positive] = True
        keep |= dist == 0
        keep |= self.ref._to_d2(dist) <= self.reach2
        return every[keep], dist[keep]

    def _measure(self, q, qzero, rows, cols):
        """Exact distances of the candidate pairs, by differences, a slice of pairs at a time."""
        dist = np.empty(rows.size, dtype=np.float64)
        for p0 in range(0, rows.size, PAIR_BLOCK):
            s = slice(p0, p0 + PAIR_BLOCK)
            r, j = rows[s], cols[s]
            diff = q[r] - self.ref.feats[j]
            zq = None if qzero is None else qzero[r]
            zx = None if self.ref.zero is None else self.ref.zero[j]
            dist[s] = _finish(np.einsum("ij,ij->i", diff, diff), self.ref.metric, zq, zx)
        return dist


def _kth_upper_bound(d2: np.ndarray, c: int, group: int = 8) -> np.ndarray:
    """Per row, a value with at least ``c`` entries of the row at or below it.

    The c-th smallest of the minima of column groups (columns j, j + n/group, ...): each of
    those c groups has an entry at or below it, and at most ``group * c`` entries are (so
    only 1/group of the width is partitioned).
    """
    n = d2.shape[1]
    whole = n - n % group
    if whole // group < c:
        return np.partition(d2, c - 1, axis=1)[:, c - 1]
    mins = d2[:, :whole].reshape(d2.shape[0], group, whole // group).min(axis=1)
    if whole < n:
        mins = np.concatenate([mins, d2[:, whole:]], axis=1)
    return np.partition(mins, c - 1, axis=1)[:, c - 1]


def _pad_rows(rows, cols, dist, m):
    """Pairs (row, col, distance) -> padded (m, w) arrays, each row by (distance, col)."""
    order = np.lexsort((cols, dist, rows))
    rows, cols, dist = rows[order], cols[order], dist[order]
    counts = np.bincount(rows, minlength=m)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    slot = np.arange(rows.size) - starts[rows]
    width = int(counts.max(initial=1))
    idx = np.zeros((m, width), dtype=np.int64)
    out = np.full((m, width), np.inf)
    idx[rows, slot], out[rows, slot] = cols, dist
    return idx, out


def _replace_row(idx, out, r, cols, dist):
    """Put one row's support (any order) into padded arrays, widening them if needed."""
    order = np.lexsort((cols, dist))
    idx, out = _pad_to(idx, out, cols.size)
    idx[r], out[r] = 0, np.inf
    idx[r, : cols.size], out[r, : cols.size] = cols[order], dist[order]
    return idx, out


def _pad_to(idx, out, width):
    extra = width - idx.shape[1]
    if extra <= 0:
        return idx, out
    return (np.pad(idx, ((0, 0), (0, extra))),
            np.pad(out, ((0, 0), (0, extra)), constant_values=np.inf))


def _stack_padded(pieces):
    """Concatenate padded (indices, distances) blocks of possibly different widths."""
    width = max(p[0].shape[1] for p in pieces)
    padded = [_pad_to(i, d, width) for i, d in pieces]
    return (np.concatenate([p[0] for p in padded]), np.concatenate([p[1] for p in padded]))
