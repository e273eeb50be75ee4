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
    assert recall_on_sample(X, idx, "approximate", rows, "euclidean") == 1.0
    assert abs(recall_on_sample(X, corrupted, "approximate", rows, "euclidean") - 0.75) < 1e-12


def test_checks_compare_against_thresholds():
    good = {"max_residual": 1e-10, "components": 1, "knn_recall": 0.99,
            "trustworthiness": 0.95, "continuity": 0.95, "duplicate_fraction": 0.0,
            "bandwidth_spread": 10.0}
    assert {c["status"] for c in checks(good)} == {"pass"}
    bad = dict(good, max_residual=1e-3, components=3, knn_recall=0.5)
    warned = {c["name"] for c in checks(bad) if c["status"] == "warn"}
    assert warned == {"max_residual", "components", "knn_recall"}
    assert set(THRESHOLDS) == set(good)
