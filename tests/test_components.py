"""Bridging a disconnected graph: connected afterwards, map finite, each group compact."""

from __future__ import annotations

import numpy as np

import eigenstream
from eigenstream.core.components import bridge, closest_pairs
from eigenstream.core.graph import connected_components, symmetric_affinity
from eigenstream.core.kernels import adaptive_bandwidths, fill_zero_bandwidths, gaussian_weights
from eigenstream.core.neighbors import exact_knn


def three_blobs(rng, n=150):
    centres = np.array([[0.0, 0.0, 0.0], [50.0, 0.0, 0.0], [0.0, 80.0, 0.0]])
    return np.vstack([c + rng.standard_normal((n, 3)) for c in centres]), np.repeat([0, 1, 2], n)


def test_bridges_connect_and_pick_the_closest_pair(rng):
    X, truth = three_blobs(rng)
    idx, dist = exact_knn(X, 10, query_start=0)
    sigma = fill_zero_bandwidths(adaptive_bandwidths(dist, neighbor=7))
    K = symmetric_affinity(idx, gaussian_weights(dist, sigma, sigma[idx]), len(X))
    count, labels = connected_components(K)
    assert count == 3  # Chung 1997: one zero Laplacian eigenvalue per component
    pairs = closest_pairs(X, labels)
    assert len(pairs) == 2
    largest = np.argmax(np.bincount(labels))
    for a, b, d in pairs:
        # brute-force oracle: the closest pair between that component and the largest one
        inside, outside = X[labels == labels[a]], X[labels == largest]
        brute = np.sqrt(((inside[:, None, :] - outside[None, :, :]) ** 2).sum(-1)).min()
        assert np.isclose(d, brute) and labels[b] == largest
    K2, weight = bridge(K, pairs)
    assert connected_components(K2)[0] == 1
    assert (K2 - K2.T).nnz == 0 and weight > 0


def test_pipeline_maps_separated_blobs_as_compact_groups(tmp_path, rng):
    X, truth = three_blobs(rng)
    np.save(tmp_path / "blobs.npy", X)
    cfg = {
        "input": {"path": str(tmp_path / "blobs.npy")},
        "graph": {"neighbors": 10},
        "embedding": {"components": 2},
        "run": {"workdir": str(tmp_path / "w")},
        "cluster": {"processes": False, "workers": 1},
    }
    result = eigenstream.run(cfg, progress=False)
    Y = np.asarray(result.coordinates[...])
    assert np.isfinite(Y).all() and np.all(result.residuals < 1e-6)
    centres = np.array([Y[truth == g].mean(axis=0) for g in range(3)])
    spread = max(np.linalg.norm(Y[truth == g] - centres[g], axis=1).max() for g in range(3))
    gaps = min(np.linalg.norm(centres[a] - centres[b]) for a in range(3) for b in range(a + 1, 3))
    assert spread < 0.25 * gaps  # each blob compact compared with the distances between blobs
    summary = result._wd.stage_state("affinity")["summary"]
    assert summary["connected_components"] == 3 and len(summary["bridges"]) == 2
