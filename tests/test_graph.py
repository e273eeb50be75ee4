"""Affinity symmetrization, alpha-normalization and connectivity against dense formulas."""

import numpy as np
import pytest
import scipy.sparse as sp

from eigenstream.core import graph
from eigenstream.core.graph import alpha_normalize, connected_components, symmetric_affinity
from eigenstream.core.kernels import adaptive_bandwidths, gaussian_weights
from eigenstream.core.neighbors import exact_knn
from eigenstream.errors import InputError


def _knn_kernel(n=150, k=6, seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 2))
    idx, dist = exact_knn(X, k)
    sigma = adaptive_bandwidths(dist, neighbor=3)
    return idx, gaussian_weights(dist, sigma, sigma[idx])


def test_union_rule_and_self_loops():
    # Union ("OR") symmetrization K = max(W, W^T): von Luxburg 2007, "A tutorial on spectral
    # clustering", section 2.2; self loop K_ii = 1 = dense Gaussian at distance 0 (Coifman & Lafon 2006).
    idx, w = _knn_kernel()
    n = idx.shape[0]
    W = np.zeros((n, n))
    W[np.repeat(np.arange(n), idx.shape[1]), idx.ravel()] = w.ravel()
    K = symmetric_affinity(idx, w, n, self_loops=True)
    assert sp.issparse(K) and K.format == "csr" and K.dtype == np.float64
    assert K.indptr.dtype == np.int64 and K.indices.dtype == np.int64
    np.testing.assert_array_equal(K.toarray(), np.maximum(W, W.T) + np.eye(n))
    K0 = symmetric_affinity(idx, w, n, self_loops=False)
    np.testing.assert_array_equal(K0.toarray(), np.maximum(W, W.T))
    assert K0.diagonal().max() == 0.0


@pytest.mark.parametrize("loops", [True, False])
def test_union_in_row_blocks_equals_the_dense_rule(monkeypatch, loops):
    # The same dense reference (von Luxburg 2007) with the lists copied 7 rows at a time and
    # the union taken 11 rows at a time (short last blocks; vertices 150..155 have no list),
    # and scipy's own whole-matrix maximum(W, W.T) on the directed kernel.
    idx, w = _knn_kernel()
    n = idx.shape[0] + 6
    W = np.zeros((n, n))
    W[np.repeat(np.arange(idx.shape[0]), idx.shape[1]), idx.ravel()] = w.ravel()
    monkeypatch.setattr(graph, "_LIST_BLOCK_ROWS", 7)
    directed = graph.directed_affinity(idx, w, n, self_loops=loops)
    np.testing.assert_array_equal(directed.toarray(), W + (np.eye(n) if loops else 0))
    K = graph.union_affinity(directed, block_rows=11)
    assert K.indices.dtype == np.int64 and K.indptr.dtype == np.int64 and K.has_sorted_indices
    np.testing.assert_array_equal(K.toarray(), np.maximum(W, W.T) + (np.eye(n) if loops else 0))
    ref = directed.maximum(directed.T.tocsr()).tocsr()
    ref.sort_indices()
    assert np.array_equal(K.indptr, ref.indptr) and np.array_equal(K.indices, ref.indices)
    assert np.array_equal(K.data, ref.data)


def test_union_rule_with_a_neighbour_listed_twice_keeps_the_larger_weight():
    # Lists from a search never repeat a neighbour, but the rule must not depend on it: the
    # same dense reference, max(W, W^T) with each repeated (i, j) taken at its largest weight.
    idx, w = _knn_kernel()
    idx, w = idx.copy(), w.copy()
    idx[5, 1], w[5, 1] = idx[5, 0], w[5, 0] / 2  # row 5 lists its nearest twice
    idx[9, 2], w[9, 2] = idx[9, 3], w[9, 3] * 0 + 0.999
    n = idx.shape[0]
    W = np.zeros((n, n))
    for i, (cols, ws) in enumerate(zip(idx, w, strict=True)):
        for j, v in zip(cols, ws, strict=True):
            W[i, j] = max(W[i, j], v)
    K = symmetric_affinity(idx, w, n, self_loops=True)
    assert K.indices.dtype == np.int64 and K.has_sorted_indices
    np.testing.assert_array_equal(K.toarray(), np.maximum(W, W.T) + np.eye(n))


def test_union_rule_with_zero_weights_self_entries_and_rows_without_lists():
    # The same dense reference (von Luxburg 2007) for lists a search does not produce but the
    # rule must handle: zero weights (not stored), a row listing itself (decided by self_loops
    # only) and fewer lists than vertices (vertices 150..159 have no list of their own).
    idx, w = _knn_kernel()
    idx, w = idx.copy(), w.copy()
    w[3, :2] = 0.0
    idx[7, 4] = 7
    n = idx.shape[0] + 10
    W = np.zeros((n, n))
    for i, (cols, ws) in enumerate(zip(idx, w, strict=True)):
        for j, v in zip(cols, ws, strict=True):
            if j != i:
                W[i, j] = v
    for loops, diagonal in ((True, np.eye(n)), (False, 0.0)):
        K = symmetric_affinity(idx, w, n, self_loops=loops)
        assert K.shape == (n, n) and K.has_sorted_indices and np.all(K.data > 0)
        np.testing.assert_array_equal(K.toarray(), np.maximum(W, W.T) + diagonal)


def test_alpha_normalization_matches_dense_definition():
    # Coifman & Lafon, ACHA 21(1) 2006: K^(a) = Q^-a K Q^-a, d = K^(a) 1, A = D^-1/2 K^(a) D^-1/2.
    idx, w = _knn_kernel(seed=1)
    n = idx.shape[0]
    K = symmetric_affinity(idx, w, n)
    Kd = K.toarray()
    for alpha in (0.0, 0.5, 1.0):
        g = alpha_normalize(K, alpha)
        q = Kd.sum(axis=1)
        Ka = Kd / np.outer(q**alpha, q**alpha)
        d = Ka.sum(axis=1)
        A = Ka / np.sqrt(np.outer(d, d))
        np.testing.assert_allclose(g.q, q, rtol=1e-13)
        np.testing.assert_allclose(g.degrees, d, rtol=1e-13)
        np.testing.assert_allclose(g.volume, d.sum(), rtol=1e-13)
        np.testing.assert_allclose(
            g.scale[:, None] * Kd * g.scale[None, :], A, rtol=1e-12, atol=1e-15
        )
        # Random-walk matrix P = D^-1 K^(a) is row-stochastic.
        np.testing.assert_allclose((Ka / d[:, None]).sum(axis=1), 1.0, rtol=1e-13)
        g2 = alpha_normalize(lambda x: K @ x, alpha, n=n)
        np.testing.assert_allclose(g2.scale, g.scale, rtol=1e-14)


def test_isolated_vertex_is_reported():
    K = sp.csr_matrix(np.array([[0.0, 1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 0.0]]))
    with pytest.raises(InputError, match="Row 2"):
        alpha_normalize(K, 0.5)


def test_connected_components_of_two_blobs():
    # Chung 1997: the multiplicity of eigenvalue 1 of P equals the number of components; here
    # just the component count of two far-apart blobs with k smaller than a blob.
    rng = np.random.default_rng(2)
    X = np.vstack([rng.normal(size=(60, 2)), rng.normal(size=(40, 2)) + 100.0])
    idx, dist = exact_knn(X, 5)
    K = symmetric_affinity(idx, np.exp(-(dist**2)), 100)
    count, labels = connected_components(K)
    assert count == 2
    assert len(set(labels[:60])) == 1 and len(set(labels[60:])) == 1 and labels[0] != labels[60]
