"""Symmetric affinity matrix from kNN lists, alpha-normalization and connectivity."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from scipy.sparse import csgraph

from eigenstream.errors import InputError


def symmetric_affinity(
    indices: np.ndarray, weights: np.ndarray, n: int, *, self_loops: bool = True
) -> sp.csr_matrix:
    """Symmetric sparse affinity K from directed kNN weights.

    Union rule K = max(W, W^T) (von Luxburg, Stat. Comput. 2007): an edge listed in either
    direction is kept with its kernel weight; with a symmetric kernel value this only fills in
    the missing direction. With ``self_loops`` the diagonal is set to 1, the value of the dense
    Gaussian kernel at distance 0 (Coifman & Lafon 2006). Zero weights are not stored.
    Same as ``union_affinity(directed_affinity(...))``; call those two to let the lists go
    before the union.

    Parameters
    ----------
    indices : ndarray of int, shape (n, k)
        Neighbours of row i (row i of the array), self excluded.
    weights : ndarray, shape (n, k)
        Kernel weight of each listed edge.
    n : int
        Number of vertices.
    self_loops : bool
        Put 1 on the diagonal.

    Returns
    -------
    scipy.sparse.csr_matrix, shape (n, n), float64, int64 indices, sorted, no duplicates
    """
    return union_affinity(directed_affinity(indices, weights, n, self_loops=self_loops))


def directed_affinity(
    indices: np.ndarray, weights: np.ndarray, n: int, *, self_loops: bool = True
) -> sp.csr_matrix:
    """The directed kNN kernel W: row i holds the weights of the neighbours listed for i.

    Parameters as in :func:`symmetric_affinity`. A neighbour listed twice keeps its larger
    weight; the diagonal holds 1 with ``self_loops`` and nothing otherwise.

    Returns
    -------
    scipy.sparse.csr_matrix, shape (n, n), float64, sorted, no duplicates (int32 indices
    below 2**31 rows)
    """
    indices = np.asarray(indices, dtype=np.int64)
    weights = np.asarray(weights, dtype=np.float64)
    if not _repeats_within_rows(indices):
        return _directed_from_lists(indices, weights, n, self_loops)
    rows = np.repeat(np.arange(indices.shape[0], dtype=np.int64), indices.shape[1])
    cols, vals = indices.ravel(), weights.ravel()
    keep = (vals > 0) & (cols != rows)  # the diagonal is decided by self_loops only
    rows, cols, vals = rows[keep], cols[keep], vals[keep]
    if self_loops:
        diag = np.arange(n, dtype=np.int64)
        rows, cols, vals = np.r_[rows, diag], np.r_[cols, diag], np.r_[vals, np.ones(n)]
    return _csr_max(rows, cols, vals, n)


# Row blocks of the union: at least this many rows, and at most this many blocks (each block
# takes one pass over W to cut the matching columns, W^T's rows, out of it).
UNION_BLOCK_ROWS = 1 << 14
UNION_MAX_BLOCKS = 16


def union_affinity(W: sp.csr_matrix, *, block_rows: int | None = None) -> sp.csr_matrix:
    """max(W, W^T), combined in row blocks by scipy's sparse maximum.

    W^T is never formed whole: the rows of a block of W^T are the matching column block of
    W, transposed. Transient memory is W, the result's parts and one block (scipy's maximum()
    of whole matrices sizes its result for nnz(W) + nnz(W^T) entries next to W and W^T). The
    result shares no memory with W, so the caller's W can be freed once this returns.

    Parameters
    ----------
    W : csr_matrix, shape (n, n)
    block_rows : int, optional
        Rows combined per block; default max(16,384, n / 16).

    Returns
    -------
    scipy.sparse.csr_matrix, shape (n, n), float64, int64 indices, sorted, no duplicates
    """
    W = W.tocsr()
    W.sort_indices()
    n = W.shape[0]
    if block_rows is None:
        block_rows = max(UNION_BLOCK_ROWS, -(-n // UNION_MAX_BLOCKS))
    counts = np.zeros(n, dtype=np.int64)
    parts = []
    for s in range(0, n, block_rows):
        e = min(n, s + block_rows)
        part = W[s:e].maximum(W[:, s:e].T.tocsr())
        part.sort_indices()
        counts[s:e] = np.diff(part.indptr)
        # tight copies: maximum()'s arrays are views of buffers sized for both operands
        parts.append((part.indices.copy(), part.data.copy()))
        del part
    del W
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    indices = np.empty(indptr[-1], dtype=np.int64)
    data = np.empty(indptr[-1], dtype=np.float64)
    at = 0
    parts.reverse()
    while parts:  # each part goes as soon as it is copied in
        idx, vals = parts.pop()
        indices[at:at + idx.size] = idx
        data[at:at + idx.size] = vals
        at += idx.size
    K = sp.csr_matrix((n, n), dtype=np.float64)
    # Assigned directly: the constructor would downcast the index arrays to int32.
    K.data, K.indices, K.indptr = data, indices, indptr
    K.has_sorted_indices = True
    return K


def _repeats_within_rows(indices: np.ndarray) -> bool:
    """Does any row list one neighbour twice? (kNN lists never do.)"""
    if indices.shape[1] < 2:
        return False
    ordered = np.sort(indices, axis=1)
    return bool(np.any(ordered[:, 1:] == ordered[:, :-1]))


# Rows of the lists copied into W at a time (bounds the block's padded copies to a few MiB).
_LIST_BLOCK_ROWS = 1 << 14


def _directed_from_lists(indices: np.ndarray, weights: np.ndarray, n: int,
                         self_loops: bool) -> sp.csr_matrix:
    """W built from lists holding each neighbour once, in row blocks (no triplet form).

    Memory beyond the lists: W itself, a boolean mask of the lists and one block's copies.
    """
    m = indices.shape[0]  # rows m..n-1 have no list of their own: empty rows (or the diagonal)
    keep = np.empty(indices.shape, dtype=bool)
    for s, e in _blocks(m, _LIST_BLOCK_ROWS):
        own = np.arange(s, e, dtype=np.int64)[:, None]
        # the diagonal is decided by self_loops only
        keep[s:e] = (weights[s:e] > 0) & (indices[s:e] != own)
    counts = np.zeros(n, dtype=np.int64)
    counts[:m] = keep.sum(axis=1)
    if self_loops:
        counts += 1
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=indptr[1:])
    index_dtype = np.int32 if max(n, indptr[-1]) < 2**31 else np.int64
    cols = np.empty(indptr[-1], dtype=index_dtype)
    vals = np.empty(indptr[-1], dtype=np.float64)
    for s, e in _blocks(m, _LIST_BLOCK_ROWS):
        block_cols, block_vals, block_keep = indices[s:e], weights[s:e], keep[s:e]
        if self_loops:  # the diagonal first in each row; sorted below
            block_cols = np.c_[np.arange(s, e), block_cols]
            block_vals = np.c_[np.ones(e - s), block_vals]
            block_keep = np.c_[np.ones(e - s, dtype=bool), block_keep]
        cols[indptr[s]:indptr[e]] = block_cols[block_keep]
        vals[indptr[s]:indptr[e]] = block_vals[block_keep]
    if self_loops and m < n:
        cols[indptr[m]:] = np.arange(m, n)
        vals[indptr[m]:] = 1.0
    del keep
    W = sp.csr_matrix((n, n), dtype=np.float64)
    W.data, W.indices, W.indptr = vals, cols, indptr.astype(index_dtype, copy=False)
    W.has_sorted_indices = False
    W.sort_indices()
    return W


def _blocks(n: int, rows: int):
    return [(s, min(n, s + rows)) for s in range(0, n, rows)]


def _csr_max(rows: np.ndarray, cols: np.ndarray, vals: np.ndarray, n: int) -> sp.csr_matrix:
    """CSR from triplets, combining repeated (row, col) by maximum (not sum)."""
    key = rows * n + cols
    order = np.argsort(key, kind="stable")
    key, vals = key[order], vals[order]
    starts = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    data = np.maximum.reduceat(vals, starts) if vals.size else vals
    key = key[starts]
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(key // n, minlength=n), out=indptr[1:])
    K = sp.csr_matrix((n, n), dtype=np.float64)
    # Assigned directly: the constructor would downcast the index arrays to int32.
    K.data, K.indices, K.indptr = data.astype(np.float64), (key % n).astype(np.int64), indptr
    K.has_sorted_indices = True
    return K


@dataclass(frozen=True)
class NormalizedGraph:
    """Quantities of the alpha-normalized graph (methods.md §0, §3.3).

    Attributes
    ----------
    q : ndarray, shape (n,)
        Kernel row sums q = K 1 (a density estimate up to a constant).
    degrees : ndarray, shape (n,)
        Row sums d of K^(a) = Q^-a K Q^-a.
    scale : ndarray, shape (n,)
        q^-a / sqrt(d), so that A = diag(scale) K diag(scale) = D^-1/2 K^(a) D^-1/2.
    volume : float
        sum(d).
    """

    q: np.ndarray
    degrees: np.ndarray
    scale: np.ndarray
    volume: float

    @property
    def sqrt_degrees(self) -> np.ndarray:
        """sqrt(d): A's eigenvector for eigenvalue 1, up to normalization."""
        return np.sqrt(self.degrees)


def alpha_normalize(
    K: sp.spmatrix | Callable[[np.ndarray], np.ndarray], alpha: float, *, n: int | None = None
) -> NormalizedGraph:
    """alpha-normalization of Coifman & Lafon (ACHA 2006).

    K^(a) = Q^-a K Q^-a with Q = diag(K 1); d = K^(a) 1; the symmetric operator actually
    solved is A = D^-1/2 K^(a) D^-1/2 = diag(scale) K diag(scale).

    Parameters
    ----------
    K : sparse matrix (n, n) or callable
        The symmetric kernel, or a function applying it to a float64 vector of length n.
    alpha : float in [0, 1]
        0: normalized graph Laplacian; 1: density-independent (Laplace–Beltrami) limit.
    n : int, optional
        Size of K; required when K is a callable.

    Returns
    -------
    NormalizedGraph

    Raises
    ------
    InputError
        When a row of K sums to 0 (an isolated vertex without self loop).
    """
    if callable(K):
        if n is None:
            raise ValueError("pass n= when the affinity is given as a matvec callable.")
        apply = K
    else:
        n = K.shape[0]

        def apply(x):
            return K @ x

    q = np.asarray(apply(np.ones(n)), dtype=np.float64)
    _check_positive(q, "row sums of the affinity")
    qa = q ** (-float(alpha))
    degrees = qa * np.asarray(apply(qa), dtype=np.float64)
    _check_positive(degrees, "degrees of the normalized affinity")
    return NormalizedGraph(
        q=q, degrees=degrees, scale=qa / np.sqrt(degrees), volume=float(degrees.sum())
    )


def _check_positive(values: np.ndarray, what: str) -> None:
    bad = np.flatnonzero(~(values > 0))
    if bad.size:
        raise InputError(
            f"Row {bad[0]} (and {bad.size - 1} more) has zero {what}: it has no neighbour with "
            "positive weight; keep self loops, use more neighbours or a larger bandwidth."
        )


def connected_components(K: sp.spmatrix) -> tuple[int, np.ndarray]:
    """Connected components of the (symmetric) affinity graph.

    Parameters
    ----------
    K : sparse matrix, shape (n, n)

    Returns
    -------
    count : int
    labels : ndarray of int, shape (n,)
    """
    count, labels = csgraph.connected_components(K, directed=False)
    return int(count), labels
