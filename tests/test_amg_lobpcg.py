"""LOBPCG + algebraic multigrid against analytic spectra, scipy's eigsh and our Lanczos."""

import weakref

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.sparse.linalg import eigsh
from sklearn.datasets import load_digits

from eigenstream.core.amg_lobpcg import (
    amg_lobpcg,
    locality_order,
    order_laplacian,
    ordered_laplacian,
    permuted,
)
from eigenstream.core.graph import alpha_normalize, symmetric_affinity
from eigenstream.core.kernels import adaptive_bandwidths, fill_zero_bandwidths, gaussian_weights
from eigenstream.core.neighbors import exact_knn
from eigenstream.core.spectral import choose_solver, solve_embedding
from eigenstream.errors import NotConverged
from eigenstream.testing.manifolds import (
    assert_same_subspace,
    assert_same_up_to_sign,
    circle_sample,
    cycle_affinity,
    cycle_spectrum,
)


def _torus_grid(m: int) -> sp.csr_matrix:
    """Adjacency of the m x m periodic grid (4-regular)."""
    ring = sp.diags([np.ones(m - 1), np.ones(m - 1)], [1, -1], shape=(m, m)).tolil()
    ring[0, m - 1] = ring[m - 1, 0] = 1
    eye = sp.identity(m)
    return (sp.kron(ring, eye) + sp.kron(eye, ring)).tocsr()


def normalized_laplacian(K, scale):
    """I - diag(scale) K diag(scale), by scipy's own sparse products (the reference)."""
    s = sp.diags(np.asarray(scale, dtype=np.float64))
    return (sp.identity(K.shape[0]) - s @ K @ s).tocsr()


def _solve(K, count, **kw):
    g = alpha_normalize(K, 0.0)
    L = normalized_laplacian(K, g.scale)
    return amg_lobpcg(L, np.sqrt(g.degrees), count, **kw), g


def test_cycle_spectrum_with_repeated_eigenvalues():
    # Chung (1997), Spectral Graph Theory: the cycle C_n has A = W/2 with eigenvalues cos(2 pi j/n),
    # each nontrivial one twice; a block method must return both copies.
    n = 300
    res, _ = _solve(cycle_affinity(n), 7, tol=1e-10)
    np.testing.assert_allclose(res.values, cycle_spectrum(n)[:7], atol=1e-9)
    assert res.values[0] == 1.0


def test_periodic_grid_spectrum_multiplicity_four():
    # Analytic: the m x m torus grid is 4-regular, A = W/4 with eigenvalues
    # (cos(2 pi a/m) + cos(2 pi b/m)) / 2; the first nontrivial value has multiplicity 4.
    m = 40
    a = np.arange(m)
    grid = (np.cos(2 * np.pi * a / m)[:, None] + np.cos(2 * np.pi * a / m)[None, :]) / 2
    expected = np.sort(grid.ravel())[::-1][:9]
    res, _ = _solve(_torus_grid(m), 9, tol=1e-10)
    np.testing.assert_allclose(res.values, expected, atol=1e-9)
    np.testing.assert_allclose(res.values[1:5], np.cos(2 * np.pi / m) / 2 + 0.5, atol=1e-9)


def _digits_kernel():
    # scikit-learn's bundled digits (1,797 rows), Gaussian kNN kernel with self-tuning bandwidths.
    X = load_digits().data.astype(np.float64)
    idx, dist = exact_knn(X, 10)
    sigma = fill_zero_bandwidths(adaptive_bandwidths(dist, neighbor=7))
    return symmetric_affinity(idx, gaussian_weights(dist, sigma, sigma[idx]), X.shape[0])


def test_digits_pairs_match_scipy_eigsh():
    # Reference: scipy's ARPACK eigsh on the same symmetric operator (dense-accurate, tol 1e-12).
    K = _digits_kernel()
    res, g = _solve(K, 6, tol=1e-9)
    s = sp.diags(g.scale)
    A = (s @ K @ s).tocsr()
    ref_vals, ref_vecs = eigsh(A, k=6, which="LA", tol=1e-12)
    order = np.argsort(ref_vals)[::-1]
    np.testing.assert_allclose(res.values, ref_vals[order], atol=1e-9)
    assert_same_subspace(res.vectors, ref_vecs[:, order], 1 - 1e-6)
    assert np.all(res.residuals <= 1e-9)


def test_resume_from_a_round_equals_uninterrupted():
    # Internal consistency (no outside oracle needed for the claim "resume = uninterrupted"):
    # rounds are fixed, so restarting from a saved block repeats the remaining rounds (equal up
    # to the rounding of threaded BLAS reductions, measured ~2e-13).
    K = _digits_kernel()
    saved = []
    full, _ = _solve(K, 5, tol=1e-10, on_round=saved.append, rng=3)
    assert saved, "the solve should need more than one round at this tolerance"
    resumed, _ = _solve(K, 5, tol=1e-10, state=saved[0], rng=99)
    np.testing.assert_allclose(resumed.values, full.values, rtol=0, atol=1e-12)
    # raw vectors: the sign of each is arbitrary until the sign rule (applied downstream)
    assert_same_up_to_sign(resumed.vectors, full.vectors, rtol=0, atol=1e-8)
    assert resumed.matvecs == full.matvecs and resumed.steps == full.steps


def test_budget_exhausted_raises_with_best_pairs():
    K = _digits_kernel()
    with pytest.raises(NotConverged, match="max_matvecs") as info:
        _solve(K, 5, tol=1e-14, max_matvecs=20)
    assert info.value.eigenvalues.shape == (5,)


def test_solve_embedding_lobpcg_equals_lanczos_on_circle():
    # Both solvers against each other on a circle sample (uniform angles): the eigenpairs are
    # those of one operator, so coordinates agree up to sign (sign rule applied by both).
    X, _ = circle_sample(3000, seed=0)
    idx, dist = exact_knn(X, 20)
    sigma = fill_zero_bandwidths(adaptive_bandwidths(dist, neighbor=7))
    K = symmetric_affinity(idx, gaussian_weights(dist, sigma, sigma[idx]), X.shape[0])
    g = alpha_normalize(K, 1.0)
    kw = dict(components=4, diffusion_time=1.0, tol=1e-10, seed=0)
    lob = solve_embedding(K, g.scale, g.degrees, solver="lobpcg", **kw)
    lan = solve_embedding(K, g.scale, g.degrees, solver="lanczos", **kw)
    np.testing.assert_allclose(lob.eigenvalues, lan.eigenvalues, atol=1e-9)
    # The circle's pairs are nearly repeated (cos/sin): compare the two-dimensional subspaces.
    assert_same_subspace(lob.u[:, :2], lan.u[:, :2], 1 - 1e-6)
    assert_same_subspace(lob.u[:, 2:4], lan.u[:, 2:4], 1 - 1e-6)
    assert np.max(lob.residuals) <= 1e-9
    assert lob.passes > 0 and lob.steps > 0


def test_fixed_seed_gives_identical_embedding():
    K = _digits_kernel()
    g = alpha_normalize(K, 1.0)
    a = solve_embedding(K, g.scale, g.degrees, components=3, diffusion_time=1.0,
                        solver="lobpcg", seed=5)
    b = solve_embedding(K, g.scale, g.degrees, components=3, diffusion_time=1.0,
                        solver="lobpcg", seed=5)
    np.testing.assert_allclose(a.coordinates, b.coordinates, rtol=0, atol=1e-10)


def test_auto_choice():
    assert choose_solver("auto", 10_000, matrix_in_memory=True) == "lanczos"
    assert choose_solver("auto", 200_000, matrix_in_memory=True) == "lobpcg"
    assert choose_solver("auto", 200_000, matrix_in_memory=False) == "lanczos"
    assert choose_solver("arpack", 200_000, matrix_in_memory=True) == "arpack"


def test_locality_order_gives_a_shuffled_path_its_band_back():
    # A path graph has bandwidth 1 in its natural order; Cuthill-McKee orderings (Cuthill &
    # McKee 1969) recover a bandwidth-1 order of a path from any numbering. The permuted
    # matrix must equal scipy's own fancy indexing L[perm][:, perm].
    n = 2000
    shuffle = np.random.default_rng(0).permutation(n)
    path = sp.diags([np.ones(n - 1), np.ones(n - 1)], [1, -1], shape=(n, n)).tocsr()
    L = path[shuffle][:, shuffle].tocsr()
    rows, cols = L.nonzero()
    assert np.max(np.abs(rows - cols)) > 1000  # the shuffle scattered the band
    perm = locality_order(L)
    inv = np.argsort(perm)
    P = permuted(L, perm, inv)
    rows, cols = P.nonzero()
    assert np.max(np.abs(rows - cols)) == 1
    assert (P != L[perm][:, perm]).nnz == 0
    assert P.has_sorted_indices


def _with_and_without_diagonal():
    K = _digits_kernel()
    without = K.tolil()
    without.setdiag(0)
    without = without.tocsr()
    without.eliminate_zeros()
    return [K, without, K.astype(np.float32)]


@pytest.mark.parametrize("case", [0, 1, 2], ids=["diagonal stored", "no diagonal", "float32"])
def test_ordered_laplacian_equals_scipy_reordering(case):
    # Reference: scipy's own fancy indexing and sparse arithmetic, P (I - sKs + shift I) P^T.
    # Case 0 adds the diagonal in place (the union graph stores it), case 1 needs the fallback
    # that adds a new diagonal, case 2 starts from a float32 kernel.
    K = _with_and_without_diagonal()[case]
    g = alpha_normalize(K.astype(np.float64), 1.0)
    ordered = ordered_laplacian(K, g.scale, shift=1e-5)
    L = normalized_laplacian(K.astype(np.float64), g.scale)
    p = ordered.perm
    reference = (L + 1e-5 * sp.identity(K.shape[0]))[p][:, p].tocsr()
    assert ordered.matrix.dtype == np.float64 and ordered.matrix.has_canonical_format
    assert abs(ordered.matrix - reference).max() < 1e-15
    np.testing.assert_array_equal(ordered.perm[ordered.inv], np.arange(K.shape[0]))
    # A x from the ordered copy equals diag(s) K diag(s) x in the caller's order.
    X = np.random.default_rng(0).standard_normal((K.shape[0], 3))
    s = g.scale[:, None]
    np.testing.assert_allclose(ordered.affinity_times(X), s * (K.astype(np.float64) @ (s * X)),
                               rtol=0, atol=1e-13)
    # The same from a given Laplacian.
    again = order_laplacian(L, shift=1e-5)
    assert abs(again.matrix - reference).max() < 1e-15


def test_lobpcg_solve_lets_a_handed_over_kernel_go_before_iterating():
    # Memory claim of solve_embedding: after building the ordered Laplacian it keeps no
    # reference to K, so a kernel passed inline (as the solve stage does) is freed before the
    # iteration. Checked with a weak reference from inside the round callback.
    K = _digits_kernel()
    g = alpha_normalize(K, 1.0)
    alive = []
    refs = []

    def handed_over():
        matrix = K.copy()
        refs.append(weakref.ref(matrix))
        return matrix

    solve_embedding(handed_over(), g.scale, g.degrees, components=4, diffusion_time=1.0,
                    tol=1e-11, solver="lobpcg", seed=0,
                    on_restart=lambda state: alive.append(refs[0]() is not None))
    assert alive, "the solve should need more than one round at this tolerance"
    assert not any(alive)
    # Control: a kernel the caller keeps stays alive, so the probe can see a live matrix.
    kept = K.copy()
    probe = weakref.ref(kept)
    alive.clear()
    solve_embedding(kept, g.scale, g.degrees, components=4, diffusion_time=1.0, tol=1e-11,
                    solver="lobpcg", seed=0,
                    on_restart=lambda state: alive.append(probe() is not None))
    assert alive and all(alive)
