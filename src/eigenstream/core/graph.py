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
    indices = np.asarray(indices, dtype=np.int64)
    weights = np.asarray(weights, dtype=np.float64)
    if not _repeats_within_rows(indices):
        return _union_of_lists(indices, weights, n, self_loops)
    rows = np.repeat(np.arange(indices.shape[0], dtype=np.int64), indices.shape[1])
    cols, vals = indices.ravel(), weights.ravel()
    keep = (vals > 0) & (cols != rows)  # the diagonal is decided by self_loops only
    rows, cols, vals = rows[keep], cols[keep], vals[keep]
    parts_r, parts_c, parts_v = [rows, cols], [cols, rows], [vals, vals]
    if self_loops:
        diag = np.arange(n, dtype=np.int64)
        parts_r.append(diag)
        parts_c.append(diag)
        parts_v.append(np.ones(n))
    return _csr_max(np.concatenate(parts_r), np.concatenate(parts_c), np.concatenate(parts_v), n)


def _repeats_within_rows(indices: np.ndarray) -> bool:
    """Does any row list one neighbour twice? (kNN lists never do.)"""
    if indices.shape[1] < 2:
        return False
    ordered = np.sort(indices, axis=1)
    return bool(np.any(ordered[:, 1:] == ordered[:, :-1]))


def _union_of_lists(indices: np.ndarray, weights: np.ndarray, n: int,
                    self_loops: bool) -> sp.csr_matrix:
    """max(W, W^T) (+ I) by scipy's sparse maximum, for lists holding each neighbour once.

    W is built row by row straight from the lists (each row's own entries, the diagonal
    included when ``self_loops``), without the triplet form: the union's transient memory is
    then W, its transpose and the result.
    """
    if indices.shape[0] < n:  # vertices without a list of their own: empty rows
        pad = ((0, n - indices.shape[0]), (0, 0))
        indices, weights = np.pad(indices, pad), np.pad(weights, pad)
    own = np.arange(n, dtype=np.int64)[:, None]
    keep = (weights > 0) & (indices != own)  # the diagonal is decided by self_loops only
    if self_loops:
        keep = np.c_[np.ones(n, dtype=bool), keep]
        indices = np.c_[own, indices]
        weights = np.c_[np.ones(n), weights]
    index_dtype = np.int32 if n < 2**31 else np.int64
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(keep.sum(axis=1), out=indptr[1:])
    W = sp.csr_matrix((weights[keep], indices[keep].astype(index_dtype), indptr), shape=(n, n))
    del keep, indices, weights
    W.sort_indices()
    K = W.maximum(W.T.tocsr())
    del W
    K.sort_indices()
    # scipy's result views arrays sized for nnz(W) + nnz(W^T); copies of the used part let
    # the rest go (1M rows, k = 15: 385 -> 210 MiB before the int64 indices).
    K.indices, K.indptr = K.indices.astype(np.int64), K.indptr.astype(np.int64)
    K.data = K.data.copy()
    return K


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
