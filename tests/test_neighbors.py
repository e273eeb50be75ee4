"""Exact and approximate kNN against scikit-learn's brute-force search."""

import numpy as np
import pytest
from sklearn.datasets import load_digits
from sklearn.neighbors import NearestNeighbors

from eigenstream.core.neighbors import (
    approximate_knn,
    drop_self,
    exact_knn,
    kernel_support,
    knn_recall,
)


def _with_duplicates(seed=0):
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(400, 6))
    X[50:70] = X[3]  # 21 copies of row 3: more copies than k
    X[100:104] = X[7]
    X[200] = X[201]
    return X


def _assert_same_lists(idx, dist, ref_idx, ref_dist):
    """Equal distances, and equal neighbour sets where the order is decided by a distance gap
    (scikit-learn orders exact ties arbitrarily; our rule is smaller index first)."""
    np.testing.assert_allclose(dist, ref_dist, rtol=0, atol=1e-12)
    k = idx.shape[1]
    for r in range(idx.shape[0]):
        assert set(idx[r][dist[r] < dist[r, -1]]) == set(ref_idx[r][ref_dist[r] < ref_dist[r, -1]])
        assert len(set(idx[r])) == k


@pytest.mark.parametrize("scratch", [None, 8 * 400 * 3])  # default blocks, 3-row blocks
@pytest.mark.parametrize("metric", ["euclidean", "cosine"])
def test_exact_matches_sklearn_brute(metric, scratch):
    # Reference: scikit-learn NearestNeighbors(algorithm="brute").kneighbors() with no query,
    # which also leaves each point out of its own list by index.
    X = _with_duplicates()
    k = 15
    idx, dist = exact_knn(X, k, metric=metric, scratch_bytes=scratch)
    ref_d, ref_i = (
        NearestNeighbors(n_neighbors=k, algorithm="brute", metric=metric).fit(X).kneighbors()
    )
    assert idx.dtype == np.int64 and dist.dtype == np.float64 and idx.shape == (400, k)
    _assert_same_lists(idx, dist, ref_i, ref_d)
    assert not np.any(idx == np.arange(400)[:, None])  # never itself, even among 21 copies
    # Ties go to the smaller index: the copies of row 3 list the other copies in index order.
    copies = np.r_[3, 50:70]
    assert np.array_equal(idx[50], np.setdiff1d(copies, [50])[:k])
    assert np.all(dist[50] == 0.0)
    assert np.all(np.diff(dist, axis=1) >= 0)


def test_query_start_excludes_self_by_index_and_blocks_agree():
    X = _with_duplicates(1)
    full_i, full_d = exact_knn(X, 10)
    part_i, part_d = exact_knn(X, 10, query=X[40:120], query_start=40)
    assert np.array_equal(part_i, full_i[40:120])
    assert np.array_equal(part_d, full_d[40:120])
    # Without query_start a query row that is also a data row finds itself at distance 0.
    own_i, own_d = exact_knn(X, 1, query=X[5:6])
    assert own_i[0, 0] == 5 and own_d[0, 0] == 0.0


def test_cosine_zero_rows_are_at_distance_one():
    # Convention (scikit-learn's cosine_distances does the same): a zero row has cos = 0.
    X = np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0], [0.0, 3.0], [0.0, 0.0]])
    idx, dist = exact_knn(X, 2, metric="cosine")
    assert np.array_equal(idx[0], [1, 2]) and np.array_equal(dist[0], [1.0, 1.0])
    assert idx[1, 0] == 2 and dist[1, 0] == 0.0
    ref = NearestNeighbors(n_neighbors=2, algorithm="brute", metric="cosine").fit(X).kneighbors()[0]
    np.testing.assert_allclose(dist, ref, atol=1e-12)


def test_drop_self_handles_missing_self_and_recall_counts():
    idx = np.array([[0, 5, 6], [7, 8, 9], [4, 2, 3]])
    dist = np.array([[0.0, 1, 2], [1, 2, 3], [0.5, 0.0, 1]])
    out_i, out_d = drop_self(idx, dist)
    assert np.array_equal(out_i, [[5, 6], [7, 8], [4, 3]])
    assert np.array_equal(out_d, [[1, 2], [1, 2], [0.5, 1]])
    assert knn_recall(np.array([[1, 2], [3, 4]]), np.array([[2, 1], [3, 5]])) == 0.75


@pytest.fixture(scope="module")
def digits_graphs():
    # pynndescent compiles for ~50 s on first use in a process: one fixture, one test.
    X = load_digits().data.astype(np.float64)  # ships with scikit-learn, 1797 x 64
    approx = approximate_knn(X, 15, seed=0, n_jobs=1)
    exact = exact_knn(X, 15)
    return X, approx, exact


def test_approximate_knn_recall_on_digits(digits_graphs):
    X, (a_idx, a_dist), (e_idx, e_dist) = digits_graphs
    assert a_idx.dtype == np.int64 and a_dist.dtype == np.float64 and a_idx.shape == (1797, 15)
    assert not np.any(a_idx == np.arange(1797)[:, None])
    assert np.all(np.diff(a_dist, axis=1) >= -1e-6)
    # Reported distances are true distances of the listed pairs (pynndescent works in float32).
    true = np.linalg.norm(X[a_idx] - X[:, None, :], axis=2)
    np.testing.assert_allclose(a_dist, true, rtol=1e-5)
    # NN-descent: "typically > 90 % recall" (Dong, Charikar & Li, WWW 2011); 0.95 bar is
    # common practice for a 1797-row set.
    assert knn_recall(a_idx, e_idx) >= 0.95


def test_approximate_cosine_matches_exact_and_zero_rows_sit_at_one():
    # Reference: scikit-learn's brute-force cosine kNN on digits (rows scaled by random
    # factors, which cosine ignores) plus two zero rows, which by our convention (and
    # scikit-learn's cosine_distances) are at distance 1 from every row.
    X = load_digits().data.astype(np.float64)[:900]
    X = X * np.random.default_rng(1).uniform(0.1, 10.0, (X.shape[0], 1))
    X[[10, 500]] = 0.0
    idx, dist = approximate_knn(X, 10, metric="cosine", seed=0, n_jobs=1)
    ref_d, ref_i = NearestNeighbors(n_neighbors=10, algorithm="brute",
                                    metric="cosine").fit(X).kneighbors()
    live = np.setdiff1d(np.arange(X.shape[0]), [10, 500])
    assert knn_recall(idx[live], ref_i[live]) >= 0.95  # common practice bar, as for Euclidean
    true = np.take_along_axis(
        1.0 - (X @ X.T) / np.maximum(np.outer(*2 * [np.linalg.norm(X, axis=1)]), 1e-300), idx,
        axis=1)
    true[[10, 500]] = 1.0
    true[np.isin(idx, [10, 500])] = 1.0
    np.testing.assert_allclose(dist, true, atol=1e-6)
    assert np.all(dist[[10, 500]] == 1.0)
    assert not np.isin(idx[live], [10, 500]).any()  # distance 1: never among the 10 nearest


def _brute_support(train, query, k, radius, metric):
    """Reference: scipy.spatial.distance.cdist over all pairs, then the rule written out."""
    from scipy.spatial.distance import cdist

    d = cdist(query, train, metric="sqeuclidean" if metric == "euclidean" else "cosine")
    d = np.sqrt(d) if metric == "euclidean" else d
    if metric == "cosine":  # a zero row has no direction: 1 - cos with cos := 0
        zq = np.linalg.norm(query, axis=1) == 0
        zx = np.linalg.norm(train, axis=1) == 0
        d[zq] = 1.0
        d[:, zx] = 1.0
    want = []
    for r in range(d.shape[0]):
        order = np.lexsort((np.arange(d.shape[1]), d[r]))
        nearest = order[d[r, order] > 0][:k]
        # a pair exactly at the radius (a copy of the row that defines it) is decided by the
        # last bit of rounding, which differs between cdist and differences: not required
        inside = d[r] <= radius * (1 - 1e-12)
        within = set(np.flatnonzero(inside)) | set(np.flatnonzero(d[r] == 0))
        want.append(set(nearest) | within)
    return d, want


@pytest.mark.parametrize("metric", ["euclidean", "cosine"])
@pytest.mark.parametrize("n_train", [37, 203, 1000])  # below and above 8 groups of k + 8
def test_kernel_support_holds_every_exact_edge(metric, n_train):
    # Reference: all-pairs distances from scipy's cdist; the support must contain every
    # row's k nearest at positive distance, every training row within its own radius and
    # every copy, with distances equal to cdist's to 1e-12 (float32 only ranks).
    rng = np.random.default_rng(n_train)
    train = rng.normal(size=(n_train, 7)) * 30.0 + 100.0  # far from the origin: GEMM rounding
    copies = np.repeat(train[9:10], 30, 0)
    query = np.vstack([rng.normal(size=(150, 7)) * 30.0 + 100.0, train[:5], copies])
    train[20:35] = train[9]  # 16 copies of row 9: more than k + 8, crowding the k nearest out
    if metric == "cosine":
        train[-1], query[3] = 0.0, 0.0
    k = 6
    radius = np.sort(_brute_support(train, train, 1, np.zeros(n_train), metric)[0], axis=1)[:, k]
    idx, dist = kernel_support(train, query, k, radius, metric=metric)
    d, want = _brute_support(train, query, k, radius, metric)
    for r in range(query.shape[0]):
        finite = np.isfinite(dist[r])
        got = idx[r][finite]
        assert want[r] <= set(got), r
        np.testing.assert_allclose(dist[r][finite], d[r, got], rtol=0, atol=1e-12 * d.max())
        assert np.all(np.diff(dist[r][finite]) >= 0)
