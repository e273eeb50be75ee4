"""The quality stage's helpers: recall on a sample and the pass/warn verdicts."""

from __future__ import annotations

import numpy as np
from sklearn.neighbors import NearestNeighbors

from eigenstream.stages.quality import THRESHOLDS, checks, recall_on_sample


def test_recall_on_sample_matches_a_known_corruption(rng):
    # Reference neighbours: scikit-learn's exact NearestNeighbors (brute force).
    X = rng.standard_normal((400, 5))
    nn = NearestNeighbors(n_neighbors=9, algorithm="brute").fit(X)
    idx = nn.kneighbors(X, return_distance=False)[:, 1:]
    far = NearestNeighbors(n_neighbors=400, algorithm="brute").fit(X)
    farthest = far.kneighbors(X, return_distance=False)[:, -2:]
    corrupted = idx.copy()
    corrupted[:, :2] = farthest  # two of eight neighbours replaced by the two farthest rows
    rows = np.arange(0, 400, 4)

    def blocks(size):  # the rows read block by block, as the stage reads them from zarr
        return ((s, X[s : s + size]) for s in range(0, 400, size))

    for size in (400, 37, 1):  # one block, uneven blocks, one-row blocks
        assert recall_on_sample(X[rows], blocks(size), idx[rows], "approximate", rows,
                                "euclidean") == 1.0
        recall = recall_on_sample(X[rows], blocks(size), corrupted[rows], "approximate", rows,
                                  "euclidean")
        assert abs(recall - 0.75) < 1e-12


def test_nearest_in_blocks_equals_scikit_learn_brute_force(rng):
    # Reference: scikit-learn's exact NearestNeighbors (brute force) on the whole table;
    # streaming the reference rows in blocks must give the same lists and distances.
    from eigenstream.core.neighbors import nearest_in_blocks

    X = rng.standard_normal((500, 6)) * 10 + 50
    X[300:320] = X[7]  # copies: ties broken by the smaller index
    Q = X[::9]
    d_ref, i_ref = NearestNeighbors(n_neighbors=12, algorithm="brute").fit(X).kneighbors(Q)
    idx, dist = nearest_in_blocks(Q, ((s, X[s : s + 71]) for s in range(0, 500, 71)), 12)
    np.testing.assert_allclose(dist, d_ref, rtol=0, atol=1e-9)
    for r in range(Q.shape[0]):  # same sets where the order is decided by a distance gap
        inside = dist[r] < dist[r, -1]
        assert set(idx[r][inside]) == set(i_ref[r][d_ref[r] < d_ref[r, -1]])


def test_checks_compare_against_thresholds():
    good = {"max_residual": 1e-10, "components": 1, "knn_recall": 0.99,
            "trustworthiness": 0.95, "continuity": 0.95, "duplicate_fraction": 0.0,
            "bandwidth_spread": 10.0, "harmonic_residual": 0.9}
    assert {c["status"] for c in checks(good)} == {"pass"}
    bad = dict(good, max_residual=1e-3, components=3, knn_recall=0.5, harmonic_residual=0.1)
    warned = {c["name"] for c in checks(bad) if c["status"] == "warn"}
    assert warned == {"max_residual", "components", "knn_recall", "harmonic_residual"}
    assert set(THRESHOLDS) == set(good)
