"""Bandwidths and Gaussian weights against their defining formulas."""

import numpy as np
import pytest

from eigenstream.core.kernels import (
    adaptive_bandwidths,
    fill_zero_bandwidths,
    gaussian_weights,
    global_bandwidth,
)
from eigenstream.core.neighbors import exact_knn
from eigenstream.errors import InputError


def test_self_tuning_bandwidth_is_distance_to_kth_neighbour():
    # Zelnik-Manor & Perona, NIPS 2004: sigma_i = distance from x_i to its K-th neighbour (K=7).
    rng = np.random.default_rng(0)
    X = rng.normal(size=(200, 3))
    _, dist = exact_knn(X, 10)
    sigma = adaptive_bandwidths(dist, neighbor=7)
    full = np.linalg.norm(X[:, None] - X[None], axis=2)
    np.testing.assert_allclose(sigma, np.sort(full, axis=1)[:, 7], rtol=1e-12)  # col 0 = self


def test_duplicate_rows_fall_back_to_first_positive_then_fill():
    # methods.md §2.2: a row with >= K exact duplicates gets sigma = 0 (0/0 in the kernel).
    dist = np.array(
        [
            [0.0, 0.0, 0.0, 0.5, 0.7],  # 3 duplicates, K=2 -> first positive distance 0.5
            [0.1, 0.2, 0.3, 0.4, 0.9],  # ordinary row -> 0.2
            [0.0, 0.0, 0.0, 0.0, 0.0],  # only duplicates in its list -> 0, then filled
        ]
    )
    sigma = adaptive_bandwidths(dist, neighbor=2)
    np.testing.assert_array_equal(sigma, [0.5, 0.2, 0.0])
    np.testing.assert_array_equal(fill_zero_bandwidths(sigma), [0.5, 0.2, 0.2])
    with pytest.raises(InputError):
        fill_zero_bandwidths(np.zeros(4))
    with pytest.raises(ValueError):
        adaptive_bandwidths(dist, neighbor=6)


def test_gaussian_weights_formula_and_symmetry():
    # Self-tuning kernel exp(-d^2 / (sigma_i sigma_j)) (Zelnik-Manor & Perona 2004) is symmetric
    # in (i, j); with constant sigma it is exp(-d^2 / sigma^2), Coifman-Lafon eps = sigma^2.
    rng = np.random.default_rng(1)
    X = rng.normal(size=(120, 2))
    idx, dist = exact_knn(X, 8)
    sigma = adaptive_bandwidths(dist, neighbor=5)
    w = gaussian_weights(dist, sigma, sigma[idx])
    d = np.linalg.norm(X[:, None] - X[idx], axis=2)
    np.testing.assert_allclose(w, np.exp(-(d**2) / (sigma[:, None] * sigma[idx])), rtol=1e-12)
    dense = np.zeros((120, 120))
    dense[np.repeat(np.arange(120), 8), idx.ravel()] = w.ravel()
    both = (dense > 0) & (dense.T > 0)
    np.testing.assert_allclose(dense[both], dense.T[both], rtol=1e-12)
    eps = 0.3
    s = np.full(120, np.sqrt(eps))
    np.testing.assert_allclose(
        gaussian_weights(dist, s, s[idx]), np.exp(-(dist**2) / eps), rtol=1e-12
    )


def test_global_bandwidth_is_median_kth_distance():
    # eps = median_i r_k(i)^2, methods.md §2.1 [common practice].
    dist = np.array([[0.1, 0.4], [0.2, 0.6], [0.3, 0.5]])
    assert global_bandwidth(dist, neighbor=2) == 0.5
