"""Nystrom extension: exact reproduction at training rows and sensible values for new rows."""

import numpy as np
import pytest

from eigenstream.core.graph import alpha_normalize, symmetric_affinity
from eigenstream.core.kernels import adaptive_bandwidths, fill_zero_bandwidths, gaussian_weights
from eigenstream.core.neighbors import exact_knn
from eigenstream.core.nystrom import nystrom_extend, transition_rows
from eigenstream.core.spectral import solve_embedding
from eigenstream.errors import InputError
from eigenstream.testing.manifolds import circle_sample


def _rows_of(K, X, rows):
    """Each row's complete kernel support from the CSR K (forward + reverse neighbours + self
    loop), padded to a rectangle with distance inf (weight exp(-inf) = 0)."""
    width = max(K.indptr[r + 1] - K.indptr[r] for r in rows)
    idx = np.zeros((len(rows), width), dtype=np.int64)
    dist = np.full((len(rows), width), np.inf)
    for i, r in enumerate(rows):
        cols = K.indices[K.indptr[r] : K.indptr[r + 1]]
        idx[i, : cols.size] = cols
        dist[i, : cols.size] = np.linalg.norm(X[cols] - X[r], axis=1)  # self -> exactly 0
    return idx, dist


@pytest.mark.parametrize("alpha, t", [(0.0, 1), (0.5, 2), (1.0, 0.5)])
def test_training_rows_are_reproduced(alpha, t):
    # methods.md §5.1 / §9.7 (Bengio et al. 2004; Coifman & Lafon 2006b): with the identical
    # kernel row, psi(x_i) = (1/lambda) sum_j p_ij psi(x_j) is the eigen-equation itself.
    rng = np.random.default_rng(0)
    X = rng.normal(size=(500, 3))
    knn_i, knn_d = exact_knn(X, 10)
    sigma = fill_zero_bandwidths(adaptive_bandwidths(knn_d, neighbor=5))
    K = symmetric_affinity(knn_i, gaussian_weights(knn_d, sigma, sigma[knn_i]), 500)
    g = alpha_normalize(K, alpha)
    emb = solve_embedding(
        K, g.scale, g.degrees, components=4, diffusion_time=t, tol=1e-14, max_matvecs=50_000, seed=0
    )
    rows = np.arange(0, 500, 7)
    idx, dist = _rows_of(K, X, rows)
    coords = nystrom_extend(
        dist,
        idx,
        sigma[rows],
        sigma,
        g.q,
        g.degrees,
        emb.psi,
        emb.eigenvalues,
        alpha=alpha,
        diffusion_time=t,
    )
    np.testing.assert_allclose(coords, emb.coordinates[rows], rtol=0, atol=1e-10)


def test_new_points_near_circle_land_at_their_angle():
    # A point at angle phi just off the unit circle should be mapped where the training map puts
    # the training rows at angle ~phi (Nystrom extension interpolates, Bengio et al. 2004); and
    # that map is theta -> +-theta + c (Coifman & Lafon 2006). Tolerances are ours.
    X, theta = circle_sample(1000, seed=2)
    k = 30
    knn_i, knn_d = exact_knn(X, k)
    eps = np.median(knn_d[:, -1] ** 2)  # methods.md §2.1 [common practice]
    s = np.full(1000, np.sqrt(eps))
    K = symmetric_affinity(knn_i, gaussian_weights(knn_d, s, s[knn_i]), 1000)
    g = alpha_normalize(K, 1.0)
    emb = solve_embedding(
        K, g.scale, g.degrees, components=2, diffusion_time=1, tol=1e-10, max_matvecs=50_000, seed=0
    )
    phase = np.angle(emb.coordinates[:, 0] + 1j * emb.coordinates[:, 1])
    order = np.argsort(theta)
    turn = np.sign(np.mean(np.sin(np.diff(np.unwrap(phase[order])))))
    offset = np.angle(np.mean(np.exp(1j * (phase - turn * theta))))
    rng = np.random.default_rng(3)
    phi = rng.uniform(0, 2 * np.pi, 40)
    radius = 1 + 0.01 * rng.standard_normal(40)
    Y = np.column_stack([radius * np.cos(phi), radius * np.sin(phi)])
    new_i, new_d = exact_knn(X, k, query=Y)
    coords = nystrom_extend(
        new_d,
        new_i,
        np.full(40, np.sqrt(eps)),
        s,
        g.q,
        g.degrees,
        emb.psi,
        emb.eigenvalues,
        alpha=1.0,
        diffusion_time=1,
    )
    predicted = np.angle(coords[:, 0] + 1j * coords[:, 1])
    # Training phase interpolated at phi (periodic), the map's value at that angle.
    at_phi = _periodic_interp(phi, theta[order], np.unwrap(phase[order]))
    gap = np.abs(np.angle(np.exp(1j * (predicted - at_phi))))
    assert gap.max() < 0.02
    ideal = np.abs(np.angle(np.exp(1j * (predicted - turn * phi - offset))))
    assert ideal.max() < 0.1  # the training map's own angle error is of this size (§9.3 bar)
    train_r = np.hypot(emb.coordinates[:, 0], emb.coordinates[:, 1]).mean()
    np.testing.assert_allclose(np.hypot(coords[:, 0], coords[:, 1]), train_r, rtol=0.1)


def _periodic_interp(x, xp, fp):
    """Interpolate samples fp(xp) of an unwrapped phase, xp sorted in [0, 2 pi), at x."""
    turn = np.round((fp[-1] - fp[0]) / (2 * np.pi)) * 2 * np.pi  # advance over one turn: +-2 pi
    xs = np.concatenate([xp[-1:] - 2 * np.pi, xp, xp[:1] + 2 * np.pi])
    fs = np.concatenate([fp[-1:] - turn, fp, fp[:1] + turn])
    return np.interp(x, xs, fs)


def test_transition_rows_are_stochastic_far_rows_attach_and_empty_rows_are_refused():
    dist = np.array([[0.0, 1.0, 2.0], [0.5, 0.5, 0.5]])
    idx = np.array([[0, 1, 2], [2, 1, 0]])
    p = transition_rows(dist, idx, np.ones(2), np.ones(3), np.array([1.0, 2.0, 4.0]), alpha=1.0)
    np.testing.assert_allclose(p.sum(axis=1), 1.0)
    # alpha = 1, equal distances: p_j proportional to 1/q_j.
    np.testing.assert_allclose(p[1], np.array([1 / 4, 1 / 2, 1.0]) / 1.75)
    # Far from everything (kernel values underflow to 0): the row still attaches to its
    # nearest training rows, in the limit ratio exp(-(d1^2 - d0^2)/sigma^2) (same formula).
    far = transition_rows(np.array([[1e3, 1e3 + 1e-3]]), np.array([[0, 1]]), np.ones(1),
                          np.ones(2), np.ones(2), alpha=0.5)
    ratio = np.exp(-((1e3 + 1e-3) ** 2 - 1e6))
    np.testing.assert_allclose(far[0], np.array([1.0, ratio]) / (1 + ratio), rtol=1e-9)
    with pytest.raises(InputError, match="New row 1"):
        transition_rows(
            np.array([[np.inf]]), np.array([[0]]), np.ones(1), np.ones(1), np.ones(1), alpha=0.5
        )
