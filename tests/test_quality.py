"""Trustworthiness, continuity, kNN preservation and eigengap against outside references."""

import numpy as np
import pytest
from scipy.linalg import block_diag
from sklearn.datasets import load_digits
from sklearn.decomposition import PCA
from sklearn.manifold import trustworthiness as sk_trustworthiness
from sklearn.neighbors import NearestNeighbors

from eigenstream.core.neighbors import exact_knn, knn_recall
from eigenstream.core.quality import (
    continuity,
    eigengap,
    knn_preservation,
    neighbor_ranks,
    trustworthiness,
)


def _noisy_projection(rng, n, dim=6, noise=0.3):
    X = rng.normal(size=(n, dim))
    return X, X[:, :2] + noise * rng.normal(size=(n, 2))


def _expected_random_t(n, k):
    # Venna & Kaski normalisation with ranks uniform on 1..n-1 (methods.md §7, derived):
    # E[sum_j (r-k)_+] = k (n-1-k)(n-k) / (2(n-1))  =>  E[T] = 1 - (n-1-k)(n-k)/((n-1)(2n-3k-1)).
    return 1 - (n - 1 - k) * (n - k) / ((n - 1) * (2 * n - 3 * k - 1))


def test_exact_values_equal_sklearn_on_random_data(rng):
    # Reference: sklearn.manifold.trustworthiness; continuity = trustworthiness(Y, X) (§7).
    X, Y = _noisy_projection(rng, 300)
    for k in (1, 5, 12):
        assert trustworthiness(X, Y, n_neighbors=k) == pytest.approx(
            sk_trustworthiness(X, Y, n_neighbors=k), abs=1e-12
        )
        assert continuity(X, Y, n_neighbors=k) == pytest.approx(
            sk_trustworthiness(Y, X, n_neighbors=k), abs=1e-12
        )


def test_exact_values_equal_sklearn_on_digits_subset():
    # scikit-learn's bundled digits (first 600 rows). Raw pixels are integers, so many distances
    # tie and sklearn's argsort order would decide ranks; rescaling columns by random factors
    # breaks those ties while keeping the data's structure.
    digits = load_digits().data[:600]
    X = digits * np.random.default_rng(1).uniform(1.0, 2.0, size=digits.shape[1])
    for Y in (PCA(2).fit_transform(X), PCA(3).fit_transform(digits)):
        for k in (5, 10, 15):
            assert trustworthiness(X, Y, n_neighbors=k) == pytest.approx(
                sk_trustworthiness(X, Y, n_neighbors=k), abs=1e-12
            )
            assert continuity(X, Y, n_neighbors=k) == pytest.approx(
                sk_trustworthiness(Y, X, n_neighbors=k), abs=1e-12
            )


def test_raw_digits_ties_only_help_and_published_values_hold():
    # With tied input distances a tied neighbour gets the smallest rank, so T can only be >= the
    # value for any tie order (sklearn's among them), by a hair.
    X = load_digits().data
    Y = PCA(2).fit_transform(X)
    ours, ref = trustworthiness(X, Y, n_neighbors=5), sk_trustworthiness(X, Y, n_neighbors=5)
    assert ref - 1e-12 <= ours <= ref + 1e-3
    # methods.md §9.6 (measured with sklearn 1.9.1): PCA 2-D T(5) = 0.8304, C(5) = 0.9569, Q(10) = 0.118.
    assert ours == pytest.approx(0.8304, abs=1e-3)
    assert continuity(X, Y, n_neighbors=5) == pytest.approx(0.9569, abs=1e-3)
    assert knn_preservation(X, Y, n_neighbors=10) == pytest.approx(0.118, abs=2e-3)


def test_knn_preservation_is_neighbour_set_overlap(rng):
    # Lee & Verleysen 2009: Q(k) = mean_i |N_k(i) ∩ N^_k(i)| / k; reference sets from sklearn.
    X, Y = _noisy_projection(rng, 400)
    k = 10
    nx = NearestNeighbors(n_neighbors=k).fit(X).kneighbors(return_distance=False)
    ny = NearestNeighbors(n_neighbors=k).fit(Y).kneighbors(return_distance=False)
    overlap = np.mean([len(set(a) & set(b)) for a, b in zip(nx, ny, strict=True)]) / k
    q = knn_preservation(X, Y, n_neighbors=k)
    assert q == pytest.approx(overlap, abs=1e-12)
    # Same number from the project's own kNN search and recall.
    assert q == pytest.approx(knn_recall(exact_knn(Y, k)[0], exact_knn(X, k)[0]), abs=1e-12)


def test_ranks_equal_brute_force_with_ties_and_duplicates(rng):
    # Rank = 1 + number of other rows strictly closer (integer data: many ties, duplicates).
    X = rng.integers(0, 3, size=(150, 3)).astype(float)
    Y = rng.normal(size=(150, 2))
    k = 6
    nbrs, _ = exact_knn(Y, k)
    d2 = ((X[:, None] - X[None]) ** 2).sum(-1)
    np.fill_diagonal(d2, np.inf)
    brute = np.array([[1 + np.sum(d2[i] < d2[i, j]) for j in nbrs[i]] for i in range(150)])
    np.testing.assert_array_equal(neighbor_ranks(X, Y, n_neighbors=k), brute)
    rows = np.array([0, 3, 77, 149])
    np.testing.assert_array_equal(neighbor_ranks(X, Y, n_neighbors=k, rows=rows), brute[rows])


def test_sampled_estimates_within_three_standard_errors(rng):
    # methods.md §7: the s-row estimate is unbiased; drawn without replacement its standard error
    # is sd/sqrt(s) * sqrt((n-s)/(n-1)), with sd the population sd of the per-row terms
    # (computed here exactly from all rows). n = 2000, s = 300.
    n, s, k = 2000, 300, 10
    X, Y = _noisy_projection(rng, n, noise=0.5)
    fpc = np.sqrt((n - s) / (n - 1))
    norm = 2.0 / (k * (2 * n - 3 * k - 1))

    def penalty_terms(ranks):  # Venna & Kaski per-row term, averaged it gives T
        return 1 - norm * np.maximum(ranks - k, 0).sum(1)

    cases = [
        (trustworthiness, penalty_terms(neighbor_ranks(X, Y, n_neighbors=k))),
        (continuity, penalty_terms(neighbor_ranks(Y, X, n_neighbors=k))),
        (knn_preservation, (neighbor_ranks(X, Y, n_neighbors=k) <= k).mean(1)),
    ]
    for measure, terms in cases:
        exact = measure(X, Y, n_neighbors=k)
        assert exact == pytest.approx(terms.mean(), abs=1e-12)
        se = terms.std() / np.sqrt(s) * fpc
        est = measure(X, Y, n_neighbors=k, sample=s, rng=7)
        assert est != exact  # really a subsample
        assert abs(est - exact) < 3 * se, (measure.__name__, est, exact, se)
    # sample >= n falls back to the exact value.
    assert trustworthiness(X, Y, n_neighbors=k, sample=n, rng=0) == trustworthiness(
        X, Y, n_neighbors=k
    )


def test_random_embedding_matches_analytic_baseline(rng):
    # methods.md §7 [derived, verified]: E[T] = E[C] = 1 - (n-1-k)(n-k)/((n-1)(2n-3k-1)), E[Q] = k/(n-1).
    n, k, reps = 1000, 5, 4
    X = rng.normal(size=(n, 5))
    # Derivation check: ranks of the other rows are a permutation of 1..n-1 (no ties), so the
    # mean penalty over a uniformly random neighbour is (n-1-k)(n-k) / (2(n-1)).
    r = np.arange(1, n)
    assert 1 - 2 / (k * (2 * n - 3 * k - 1)) * k * np.maximum(r - k, 0).mean() == pytest.approx(
        _expected_random_t(n, k), abs=1e-12
    )
    t = [trustworthiness(X, rng.normal(size=(n, 2)), n_neighbors=k) for _ in range(reps)]
    c = [continuity(X, rng.normal(size=(n, 2)), n_neighbors=k) for _ in range(reps)]
    q = [knn_preservation(X, rng.normal(size=(n, 2)), n_neighbors=k) for _ in range(reps)]
    # sd of one T is about 1/sqrt(12 n k) (n k nearly independent uniform ranks); 4 sd of the mean.
    tol = 4 / np.sqrt(12 * n * k * reps)
    assert np.mean(t) == pytest.approx(_expected_random_t(n, k), abs=tol)
    assert np.mean(c) == pytest.approx(_expected_random_t(n, k), abs=tol)
    p = k / (n - 1)
    assert np.mean(q) == pytest.approx(p, abs=4 * np.sqrt(p / (n * k * reps)))
    # methods.md §9.6: digits, random N(0,1) 2-D, T(5) = 0.5022, analytic 0.5006.
    assert _expected_random_t(1797, 5) == pytest.approx(0.5006, abs=1e-4)


def test_isometry_scores_one(rng):
    # methods.md §7: any isometry/similarity transform of X gives T = C = Q = 1.
    X = rng.normal(size=(300, 5))
    rot, _ = np.linalg.qr(rng.normal(size=(5, 5)))
    Y = 3.0 * X @ rot + 7.0
    for measure in (trustworthiness, continuity, knn_preservation):
        assert measure(X, Y, n_neighbors=7) == 1.0
        assert measure(X, Y, n_neighbors=7, sample=50, rng=1) == 1.0
    # Digits (integer pixels, many tied distances): permuted, sign-flipped columns are an exact
    # isometry; tied neighbours are never penalised, so all three are exactly 1.
    D = load_digits().data[:500]
    perm = rng.permutation(D.shape[1])
    Yd = D[:, perm] * rng.choice([-1.0, 1.0], size=D.shape[1])
    for measure in (trustworthiness, continuity, knn_preservation):
        assert measure(D, Yd, n_neighbors=10) == 1.0


def test_eigengap_on_disjoint_cliques():
    # Chung 1997, Spectral Graph Theory: K_n has random-walk eigenvalues 1 and -1/(n-1) (x n-1).
    # Three disjoint K_5: 1 (x3), -1/4 (x12) -> gap 1.25 after the third value (index 2).
    block = (np.ones((5, 5)) - np.eye(5)) / 4
    values = np.linalg.eigvalsh(block_diag(block, block, block))
    index, gap = eigengap(values)
    assert index == 2
    assert gap == pytest.approx(1.25, abs=1e-12)
    assert eigengap([0.5, 1.0, 0.97, 0.45, 0.98]) == (2, pytest.approx(0.47))


def test_bad_inputs_are_rejected(rng):
    X, Y = _noisy_projection(rng, 20)
    with pytest.raises(ValueError, match="n/2"):
        trustworthiness(X, Y, n_neighbors=10)  # sklearn's limit: k < n/2
    with pytest.raises(ValueError, match="rows"):
        continuity(X, Y[:-1])
    bad = X.copy()
    bad[3, 1] = np.nan
    with pytest.raises(ValueError, match="NaN"):
        knn_preservation(bad, Y)
    with pytest.raises(ValueError, match="sample"):
        trustworthiness(X, Y, sample=0)
    with pytest.raises(ValueError):
        eigengap([1.0])
